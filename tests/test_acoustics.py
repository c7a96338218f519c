"""Room-acoustics formulas against their published check values."""

import math

import pytest

from render import acoustics
from render.catalogue import din18041_target_s
from render.errors import ParameterError


@pytest.mark.parametrize("theta_c, expected", [(20.0, 343.2), (0.0, 331.3)])
def test_speed_of_sound(theta_c, expected):
    # c = 331.3 sqrt(1 + θ/273.15); 20 °C -> 343.2 m/s (REFERENCES.md, text, secondary / derived)
    assert acoustics.speed_of_sound(temperature_c=theta_c) == pytest.approx(expected, abs=0.05)


@pytest.mark.parametrize("volume, absorption, expected", [(200.0, 40.0, 0.805), (1000.0, 161.0, 1.0)])
def test_sabine(volume, absorption, expected):
    # Sabine T = 0.161 V / A (REFERENCES.md, text, secondary)
    assert acoustics.sabine_decay_s(volume_m3=volume, absorption_m2=absorption) == pytest.approx(expected, abs=1e-3)
    assert acoustics.sabine_absorption_m2(volume_m3=volume, decay_s=expected) == pytest.approx(absorption, rel=2e-3)


def test_eyring_tends_to_sabine_for_small_absorption():
    # Eyring -> Sabine as ᾱ -> 0, since -ln(1 - ᾱ) ≈ ᾱ (textbook limit; Eyring formula from memory)
    v, s, t = 5000.0, 2000.0, 20.0
    alpha = acoustics.eyring_absorption_coefficient(volume_m3=v, surface_m2=s, decay_s=t)
    assert alpha * s == pytest.approx(acoustics.sabine_absorption_m2(volume_m3=v, decay_s=t), rel=0.02)
    assert -s * math.log(1 - alpha) == pytest.approx(0.161 * v / t, rel=1e-12)


@pytest.mark.parametrize("decay, volume, expected", [(2.0, 2000.0, 63.25), (0.5, 50.0, 200.0)])
def test_schroeder_frequency(decay, volume, expected):
    # f = 2000 sqrt(T / V) (Schroeder, "The Schroeder frequency revisited", JASA 1996); values derived
    assert acoustics.schroeder_frequency_hz(decay_s=decay, volume_m3=volume) == pytest.approx(expected, abs=0.01)


def test_critical_distance_formula_and_its_diffuse_field_origin():
    # r_c = 0.057 sqrt(Q V / T) (diffuse-field theory, from memory); V = 2000 m³, T = 2 s -> 1.80 m (derived)
    assert acoustics.critical_distance_m(volume_m3=2000.0, decay_s=2.0) == pytest.approx(1.80, abs=0.005)
    # The constant is sqrt(6 ln 10 / (4π c)) at c ≈ 343 m/s: direct energy 1/(4πr²) equals the
    # diffuse energy 4/A with A = 0.161 V / T (derived).
    assert math.sqrt(6 * math.log(10) / (4 * math.pi * 343.0)) == pytest.approx(0.057, abs=5e-4)


def test_din18041_classroom_check_value():
    # DIN 18041:2016 A3: 0.32 lg V - 0.17; 200 m³ -> 0.57 s (REFERENCES.md check value)
    assert din18041_target_s("A3", 200.0) == pytest.approx(0.566, abs=1e-3)


def test_mean_free_path_of_a_cube():
    # 4V/S for a cube of side a is 2a/3 (derived)
    assert acoustics.mean_free_path_m(volume_m3=27.0, surface_m2=54.0) == pytest.approx(2.0)


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: acoustics.speed_of_sound(temperature_c=99.0), "temperature_c = 99.0"),
        (lambda: acoustics.sabine_decay_s(volume_m3=-1.0, absorption_m2=1.0), "volume_m3 = -1.0"),
        (lambda: acoustics.critical_distance_m(volume_m3=10.0, decay_s=0.0), "decay_s = 0.0"),
    ],
)
def test_errors(call, match):
    with pytest.raises(ParameterError, match=match):
        call()
