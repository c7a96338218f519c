"""The room description: validation, derived values, identity."""

import math

import numpy as np
import pytest

from render.catalogue import CATALOGUE
from render.errors import RoomError
from render.room import Room


def test_derived_values():
    room = Room(decay_s=0.8, size_m=(10.0, 5.0, 4.0))
    assert room.volume_m3 == pytest.approx(200.0)
    assert room.surface_m2 == pytest.approx(2 * (50 + 40 + 20))
    assert room.mean_free_path_m == pytest.approx(4 * 200 / 220)
    # Sabine A = 0.161 V / T (REFERENCES.md)
    assert room.sabine_absorption_m2 == pytest.approx(0.161 * 200 / 0.8)
    # Schroeder frequency 2000 sqrt(T/V) (Schroeder 1996); critical distance 0.057 sqrt(V/T) (from memory)
    assert room.schroeder_frequency_hz == pytest.approx(2000 * math.sqrt(0.8 / 200))
    assert room.critical_distance_m == pytest.approx(0.057 * math.sqrt(200 / 0.8))


def test_three_point_decay_curve_is_linear_on_log_frequency():
    room = Room(decay_s=1.0, decay_lf_s=2.0, decay_hf_s=0.5, size_m=(8.0, 6.0, 3.0))
    # halfway between 125 Hz and 1 kHz on a log axis is sqrt(125 * 1000) Hz
    assert room.decay_at([math.sqrt(125e3)])[0] == pytest.approx(1.5)
    assert room.decay_at([2000.0])[0] == pytest.approx(0.75)
    assert room.decay_at([20.0, 16000.0]).tolist() == [2.0, 0.5]  # held beyond the end points
    assert room.band_targets_s[3] == 1.0


def test_band_table_form():
    bands = (1.2, 1.1, 1.0, 0.9, 0.8, 0.7, 0.6)
    room = Room(decay_bands_s=bands, size_m=(8.0, 6.0, 3.0))
    assert room.band_targets_s == pytest.approx(bands)
    assert room.decay_mid_s == pytest.approx(0.9)
    assert room.decay_max_s == pytest.approx(1.2)


def test_distance_places_talker_and_microphone_inside():
    room = Room(decay_s=0.5, size_m=(5.0, 4.0, 2.5), distance_m=3.0)
    assert math.dist(room.source_m, room.listener_m) == pytest.approx(3.0)
    for p in (room.source_m, room.listener_m):
        assert all(0 < v < s for v, s in zip(p, room.size_m))


def test_positions_give_the_distance():
    room = Room(decay_s=0.5, size_m=(5.0, 4.0, 2.5), source_m=(1.0, 1.0, 1.2), listener_m=(4.0, 3.0, 1.2))
    assert room.distance_m == pytest.approx(math.hypot(3.0, 2.0))


def test_fingerprint_ignores_labels_and_sees_sound():
    a = Room(name="a", decay_s=0.5, description="x")
    b = Room(name="b", decay_s=0.5, description="y")
    c = Room(name="a", decay_s=0.51)
    assert a.fingerprint() == b.fingerprint() != c.fingerprint()


def test_replace_switches_decay_form_and_geometry():
    base = CATALOGUE["living-room"]
    r = base.replace(decay_s=0.55, predelay_ms=6.0)
    assert r.decay_bands_s is None and r.decay_mid_s == pytest.approx(0.55) and r.predelay_ms == 6.0
    assert base.replace(distance_m=2.5).distance_m == pytest.approx(2.5)
    assert base.replace(size_m=(6.0, 5.0, 3.0)).distance_m == pytest.approx(base.distance_m)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(decay_s=-1.0), r"decay_s = -1\.0: must be a reverberation time from 0\.05 to 30\.0 s"),
        (dict(decay_s=31.0), r"decay_s = 31\.0"),
        (dict(), r"decay_s = None: a room needs decay_s"),
        (dict(decay_s=1.0, decay_lf_s=0.0), r"decay_lf_s = 0\.0"),
        (dict(decay_s=1.0, decay_bands_s=(1.0,) * 7), r"decay_bands_s = .*not both"),
        (dict(decay_bands_s=(1.0,) * 6), r"decay_bands_s = .*must be 7"),
        (dict(decay_bands_s=(1.0, 1.0, -2.0, 1.0, 1.0, 1.0, 1.0)), r"decay_bands_s\[2\] = -2\.0"),
        (dict(decay_s=1.0, size_m=(0.1, 2.0, 2.0)), r"size_m = .*0\.5 to 500"),
        (dict(decay_s=1.0, size_m=(2.0, 2.0)), r"size_m = .*three numbers"),
        (dict(decay_s=1.0, size_m=(4.0, 3.0, 2.5), source_m=(1.0, 1.0, 1.0), listener_m=(5.0, 1.0, 1.0)),
         r"listener_m = .*inside the room"),
        (dict(decay_s=1.0, source_m=(1.0, 1.0, 1.0)), r"listener_m = None: must be given together with source_m"),
        (dict(decay_s=1.0, size_m=(4.0, 3.0, 2.5), distance_m=50.0), r"distance_m = 50\.0: must fit inside"),
        (dict(decay_s=1.0, distance_m=0.0), r"distance_m = 0\.0"),
        (dict(decay_s=1.0, predelay_ms=-5.0), r"predelay_ms = -5\.0: must be from 0 to 500 ms"),
        (dict(decay_s=1.0, diffusion=1.5), r"diffusion = 1\.5: must be a number from 0 to 1"),
        (dict(decay_s=1.0, spread=-0.1), r"spread = -0\.1"),
        (dict(decay_s=1.0, temperature_c=80.0), r"temperature_c = 80\.0"),
        (dict(decay_s=1.0, seed=-1), r"seed = -1"),
        (dict(decay_s=1.0, seed=1.5), r"seed = 1\.5"),
        (dict(decay_s=1.0, name=""), r"name = ''"),
        (dict(decay_s=float("nan")), r"decay_s = nan"),
    ],
)
def test_validation_errors_name_the_field_value_and_range(kwargs, match):
    with pytest.raises(RoomError, match=match):
        Room(**kwargs)


def test_room_error_carries_field_for_the_job_layer():
    with pytest.raises(RoomError) as info:
        Room(decay_s=-1.0)
    assert (info.value.field, info.value.value) == ("decay_s", -1.0)


@pytest.mark.parametrize("name", sorted(CATALOGUE))
def test_catalogue_rooms_are_valid_and_cite_a_source(name):
    room = CATALOGUE[name]
    assert room.reference, f"{name} must say where its values come from"
    assert np.all(np.array(room.band_targets_s) > 0)
    assert room.distance_m > 0


def test_catalogue_published_values():
    # Everest, Master Handbook of Acoustics: living rooms ~0.69 s at 125 Hz to ~0.40 s at 8 kHz
    lr = CATALOGUE["living-room"].band_targets_s
    assert (lr[0], lr[-1]) == (0.69, 0.40)
    # ANSI/ASA S12.60: classrooms <= 0.6 s for V <= 283 m³
    cls = CATALOGUE["school-classroom"]
    assert cls.volume_m3 <= 283 and cls.decay_mid_s <= 0.6
    # Beranek (2004): concert halls 1.8-2.2 s at mid frequencies
    assert 1.8 <= CATALOGUE["civic-concert-hall"].decay_mid_s <= 2.2
    assert len(CATALOGUE) >= 8
