"""Textbook room-acoustics formulas (pure functions, SI units).

Each formula names its source; the tests check them against published values.

>>> round(speed_of_sound(temperature_c=20.0), 1)
343.2
>>> round(sabine_decay_s(volume_m3=200.0, absorption_m2=40.0), 3)
0.805
"""

from __future__ import annotations

import math

from .errors import ParameterError

__all__ = [
    "speed_of_sound",
    "sabine_decay_s",
    "sabine_absorption_m2",
    "eyring_absorption_coefficient",
    "schroeder_frequency_hz",
    "critical_distance_m",
    "mean_free_path_m",
    "mixing_time_s",
    "OCTAVE_BANDS_HZ",
]

#: Octave-band centre frequencies used throughout (ISO 3382-1 range, 125 Hz to 8 kHz).
OCTAVE_BANDS_HZ = (125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0, 8000.0)

#: Sabine's constant 24·ln(10)/c in s/m at c = 343 m/s, as usually printed (0.161).
SABINE_CONSTANT_S_PER_M = 0.161


def _positive(name, value):
    if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
        raise ParameterError(f"{name} = {value!r}: must be a finite number > 0")
    return float(value)


def speed_of_sound(*, temperature_c):
    """Speed of sound in air, ``c = 331.3 * sqrt(1 + θ / 273.15)`` m/s.

    Parameters
    ----------
    temperature_c : float
        Air temperature in °C, -50 to 60.
    """
    if not (-50.0 <= temperature_c <= 60.0):
        raise ParameterError(f"temperature_c = {temperature_c!r}: must be between -50 and 60 °C")
    return 331.3 * math.sqrt(1.0 + temperature_c / 273.15)


def sabine_decay_s(*, volume_m3, absorption_m2):
    """Sabine reverberation time ``T = 0.161 V / A`` in seconds."""
    return SABINE_CONSTANT_S_PER_M * _positive("volume_m3", volume_m3) / _positive("absorption_m2", absorption_m2)


def sabine_absorption_m2(*, volume_m3, decay_s):
    """Equivalent absorption area ``A = 0.161 V / T`` in m² (Sabine)."""
    return SABINE_CONSTANT_S_PER_M * _positive("volume_m3", volume_m3) / _positive("decay_s", decay_s)


def eyring_absorption_coefficient(*, volume_m3, surface_m2, decay_s):
    """Mean absorption coefficient that gives ``decay_s`` by Eyring's formula.

    Eyring: ``T = 0.161 V / (-S ln(1 - ᾱ))``, so ``ᾱ = 1 - exp(-0.161 V / (S T))``;
    always below 1, so it also describes very dead rooms.
    """
    v = _positive("volume_m3", volume_m3)
    s = _positive("surface_m2", surface_m2)
    t = _positive("decay_s", decay_s)
    return 1.0 - math.exp(-SABINE_CONSTANT_S_PER_M * v / (s * t))


def schroeder_frequency_hz(*, decay_s, volume_m3):
    """Schroeder frequency ``2000 sqrt(T / V)`` in Hz (Schroeder, JASA 1996)."""
    return 2000.0 * math.sqrt(_positive("decay_s", decay_s) / _positive("volume_m3", volume_m3))


def critical_distance_m(*, volume_m3, decay_s, directivity=1.0):
    """Critical distance ``0.057 sqrt(Q V / T)`` in metres (diffuse-field theory)."""
    q = _positive("directivity", directivity)
    return 0.057 * math.sqrt(q * _positive("volume_m3", volume_m3) / _positive("decay_s", decay_s))


def mean_free_path_m(*, volume_m3, surface_m2):
    """Mean free path ``4 V / S`` in metres."""
    return 4.0 * _positive("volume_m3", volume_m3) / _positive("surface_m2", surface_m2)


def mixing_time_s(*, volume_m3):
    """Time after which the response is treated as diffuse: ``sqrt(V)`` ms.

    A common rule of thumb (value from memory, no published source confirmed
    here), floored at 10 ms and capped at 150 ms for the blend of early
    reflections into the late tail.
    """
    return min(0.150, max(0.010, 1e-3 * math.sqrt(_positive("volume_m3", volume_m3))))
