"""Room descriptions: a frozen, validated dataclass in physical terms.

A :class:`Room` says how a space sounds the way an acoustician's survey
would: reverberation time (one value at 1 kHz with optional values at 125 Hz
and 4 kHz, or a full octave-band table), the room's size, where the talker and
the microphone are, and a few controls of our own (``diffusion``, ``spread``,
``seed``).  Everything else (volume, critical distance, ...) is derived.

>>> room = Room(name="study", decay_s=0.5, size_m=(5.0, 4.0, 2.5))
>>> round(room.volume_m3, 1), round(room.critical_distance_m, 2)
(50.0, 0.57)
>>> [round(t, 3) for t in room.band_targets_s]
[0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5]
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from dataclasses import dataclass, field
from typing import Optional, Tuple

import numpy as np

from . import acoustics
from .acoustics import OCTAVE_BANDS_HZ
from .errors import RoomError

__all__ = ["Room", "MAX_DECAY_S", "MIN_DECAY_S", "ROOM_FIELDS"]

MAX_DECAY_S = 30.0
MIN_DECAY_S = 0.05
MAX_SIZE_M = 500.0
MIN_SIZE_M = 0.5
MAX_PREDELAY_MS = 500.0
#: Nearest a source or listener may be to a wall, in metres (keeps image sources distinct).
WALL_MARGIN_M = 0.1


def _fmt(value):
    if isinstance(value, tuple):
        return "[" + ", ".join(_fmt(v) for v in value) + "]"
    if isinstance(value, float):
        return repr(round(value, 6))
    return repr(value)


def _fail(name, value, expected):
    raise RoomError(f"{name} = {_fmt(value)}: {expected}", field=name, value=value, expected=expected)


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _check_decay(name, value):
    if not _is_number(value) or not (MIN_DECAY_S <= value <= MAX_DECAY_S):
        _fail(name, value, f"must be a reverberation time from {MIN_DECAY_S} to {MAX_DECAY_S} s")
    return float(value)


def _check_unit(name, value):
    if not _is_number(value) or not (0.0 <= value <= 1.0):
        _fail(name, value, "must be a number from 0 to 1")
    return float(value)


def _check_point(name, value, size):
    if value is None:
        return None
    if not (isinstance(value, (tuple, list)) and len(value) == 3 and all(_is_number(v) for v in value)):
        _fail(name, value, "must be three numbers [x, y, z] in metres")
    point = tuple(float(v) for v in value)
    for axis, (v, limit) in enumerate(zip(point, size)):
        if not (WALL_MARGIN_M <= v <= limit - WALL_MARGIN_M):
            _fail(
                name,
                value,
                f"must lie inside the room, at least {WALL_MARGIN_M} m from every wall "
                f"(axis {'xyz'[axis]}: {WALL_MARGIN_M} to {limit - WALL_MARGIN_M:.2f} m)",
            )
    return point


@dataclass(frozen=True)
class Room:
    """A room, described in physical terms.

    Parameters
    ----------
    name : str
        A label (not part of the sound: two rooms differing only in name sound the same).
    decay_s : float, optional
        Reverberation time T60 at 1 kHz in seconds, 0.05 to 30.  Give either this
        (optionally with ``decay_lf_s`` and ``decay_hf_s``) or ``decay_bands_s``.
    decay_lf_s, decay_hf_s : float, optional
        Reverberation time at 125 Hz and at 4 kHz; default: ``decay_s``.
    decay_bands_s : tuple of 7 floats, optional
        Reverberation time in the octave bands 125, 250, 500, 1000, 2000, 4000, 8000 Hz.
    size_m : (float, float, float)
        Length, width and height of a shoebox room in metres, 0.5 to 500 each.
    source_m, listener_m : (float, float, float), optional
        Talker and microphone positions in metres from the room's corner.  Give
        both, or ``distance_m``, or neither (then ``distance_m`` defaults to a
        third of the room's length, at most 2 m).
    distance_m : float, optional
        Talker-to-microphone distance in metres; the positions are then chosen by us.
    predelay_ms : float
        Extra delay of the whole wet response after the direct sound, 0 to 500 ms.
    diffusion : float
        Allpass diffusion of the tail, 0 (none) to 1 (allpass gain 0.7).
    spread : float
        Stereo decorrelation of the tail, 0 (identical channels) to 1 (independent).
    temperature_c : float
        Air temperature in °C (sets the speed of sound), -20 to 50.
    seed : int
        Seed of every random choice in the network (delay jitter, phases).
    description, reference : str
        Free text; for catalogue rooms ``reference`` names the source of the values.
    """

    name: str = "room"
    decay_s: Optional[float] = None
    decay_lf_s: Optional[float] = None
    decay_hf_s: Optional[float] = None
    decay_bands_s: Optional[Tuple[float, ...]] = None
    size_m: Tuple[float, float, float] = (6.0, 4.5, 2.7)
    source_m: Optional[Tuple[float, float, float]] = None
    listener_m: Optional[Tuple[float, float, float]] = None
    distance_m: Optional[float] = None
    predelay_ms: float = 0.0
    diffusion: float = 0.7
    spread: float = 1.0
    temperature_c: float = 20.0
    seed: int = 0
    description: str = field(default="", compare=False)
    reference: str = field(default="", compare=False)

    # -- validation -----------------------------------------------------------------
    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name:
            _fail("name", self.name, "must be a non-empty string")
        for text_field in ("description", "reference"):
            if not isinstance(getattr(self, text_field), str):
                _fail(text_field, getattr(self, text_field), "must be text")
        size = self.size_m
        if not (isinstance(size, (tuple, list)) and len(size) == 3 and all(_is_number(v) for v in size)):
            _fail("size_m", size, "must be three numbers [length, width, height] in metres")
        size = tuple(float(v) for v in size)
        if not all(MIN_SIZE_M <= v <= MAX_SIZE_M for v in size):
            _fail("size_m", size, f"every dimension must be from {MIN_SIZE_M} to {MAX_SIZE_M} m")
        object.__setattr__(self, "size_m", size)

        if self.decay_bands_s is not None:
            if self.decay_s is not None or self.decay_lf_s is not None or self.decay_hf_s is not None:
                _fail(
                    "decay_bands_s",
                    self.decay_bands_s,
                    "give either decay_bands_s or decay_s (with decay_lf_s / decay_hf_s), not both",
                )
            bands = self.decay_bands_s
            if not (isinstance(bands, (tuple, list)) and len(bands) == len(OCTAVE_BANDS_HZ)):
                _fail(
                    "decay_bands_s",
                    bands,
                    f"must be {len(OCTAVE_BANDS_HZ)} reverberation times for "
                    + ", ".join(f"{f:g}" for f in OCTAVE_BANDS_HZ) + " Hz",
                )
            object.__setattr__(
                self, "decay_bands_s", tuple(_check_decay(f"decay_bands_s[{i}]", t) for i, t in enumerate(bands))
            )
        else:
            if self.decay_s is None:
                _fail("decay_s", None, "a room needs decay_s (T60 at 1 kHz) or decay_bands_s")
            object.__setattr__(self, "decay_s", _check_decay("decay_s", self.decay_s))
            for name in ("decay_lf_s", "decay_hf_s"):
                value = getattr(self, name)
                if value is not None:
                    object.__setattr__(self, name, _check_decay(name, value))

        if not _is_number(self.predelay_ms) or not (0.0 <= self.predelay_ms <= MAX_PREDELAY_MS):
            _fail("predelay_ms", self.predelay_ms, f"must be from 0 to {MAX_PREDELAY_MS:g} ms")
        object.__setattr__(self, "predelay_ms", float(self.predelay_ms))
        object.__setattr__(self, "diffusion", _check_unit("diffusion", self.diffusion))
        object.__setattr__(self, "spread", _check_unit("spread", self.spread))
        if not _is_number(self.temperature_c) or not (-20.0 <= self.temperature_c <= 50.0):
            _fail("temperature_c", self.temperature_c, "must be from -20 to 50 °C")
        object.__setattr__(self, "temperature_c", float(self.temperature_c))
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or not (0 <= self.seed < 2**63):
            _fail("seed", self.seed, "must be a whole number from 0 to 2**63 - 1")

        source = _check_point("source_m", self.source_m, size)
        listener = _check_point("listener_m", self.listener_m, size)
        if (source is None) != (listener is None):
            missing = "listener_m" if listener is None else "source_m"
            present = "source_m" if listener is None else "listener_m"
            _fail(missing, None, f"must be given together with {present}")
        if source is not None:
            if self.distance_m is not None:
                _fail("distance_m", self.distance_m, "give either distance_m or source_m and listener_m, not both")
            if math.dist(source, listener) < 0.05:
                _fail("listener_m", listener, "must be at least 0.05 m from source_m")
        else:
            if self.distance_m is not None:
                if not _is_number(self.distance_m) or self.distance_m < 0.05:
                    _fail("distance_m", self.distance_m, "must be a distance of at least 0.05 m")
            source, listener = _place(self, size)
        object.__setattr__(self, "source_m", source)
        object.__setattr__(self, "listener_m", listener)
        object.__setattr__(self, "distance_m", float(math.dist(source, listener)))

    # -- derived values -------------------------------------------------------------
    @property
    def volume_m3(self) -> float:
        """Volume V = length · width · height in m³."""
        l, w, h = self.size_m
        return l * w * h

    @property
    def surface_m2(self) -> float:
        """Boundary surface S = 2 (lw + lh + wh) in m²."""
        l, w, h = self.size_m
        return 2.0 * (l * w + l * h + w * h)

    @property
    def mean_free_path_m(self) -> float:
        """Mean free path 4V/S in metres."""
        return acoustics.mean_free_path_m(volume_m3=self.volume_m3, surface_m2=self.surface_m2)

    @property
    def speed_of_sound(self) -> float:
        """Speed of sound in m/s at ``temperature_c``."""
        return acoustics.speed_of_sound(temperature_c=self.temperature_c)

    @property
    def band_targets_s(self) -> Tuple[float, ...]:
        """Target reverberation time in each octave band of :data:`OCTAVE_BANDS_HZ`, in seconds."""
        return tuple(float(t) for t in self.decay_at(np.array(OCTAVE_BANDS_HZ)))

    @property
    def decay_mid_s(self) -> float:
        """Reverberation time at 1 kHz in seconds (used by the single-number formulas)."""
        return float(self.decay_at(np.array([1000.0]))[0])

    @property
    def decay_max_s(self) -> float:
        """Longest reverberation time at any frequency, in seconds."""
        return max(self._control_points()[1])

    @property
    def schroeder_frequency_hz(self) -> float:
        """Schroeder frequency 2000·√(T/V) in Hz, with T at 1 kHz."""
        return acoustics.schroeder_frequency_hz(decay_s=self.decay_mid_s, volume_m3=self.volume_m3)

    @property
    def critical_distance_m(self) -> float:
        """Critical distance 0.057·√(V/T) in metres (omnidirectional talker), with T at 1 kHz."""
        return acoustics.critical_distance_m(volume_m3=self.volume_m3, decay_s=self.decay_mid_s)

    @property
    def sabine_absorption_m2(self) -> float:
        """Equivalent absorption area 0.161·V/T in m² (Sabine), with T at 1 kHz."""
        return acoustics.sabine_absorption_m2(volume_m3=self.volume_m3, decay_s=self.decay_mid_s)

    @property
    def reverberant_ratio_db(self) -> float:
        """Reverberant-to-direct energy ratio at ``distance_m``: 20·log10(r / r_c) dB."""
        return 20.0 * math.log10(self.distance_m / self.critical_distance_m)

    def _control_points(self):
        if self.decay_bands_s is not None:
            return OCTAVE_BANDS_HZ, self.decay_bands_s
        lf = self.decay_s if self.decay_lf_s is None else self.decay_lf_s
        hf = self.decay_s if self.decay_hf_s is None else self.decay_hf_s
        return (125.0, 1000.0, 4000.0), (lf, self.decay_s, hf)

    def decay_at(self, freqs_hz):
        """Target reverberation time T60(f) in seconds at the given frequencies.

        The control points (the octave table, or 125 Hz / 1 kHz / 4 kHz) are
        joined by straight lines on a log-frequency axis and held constant
        beyond the first and last point.

        Parameters
        ----------
        freqs_hz : array_like
            Frequencies in Hz (0 is allowed and takes the lowest point's value).

        Returns
        -------
        numpy.ndarray
            T60 in seconds, same shape as ``freqs_hz``.
        """
        points_hz, times_s = self._control_points()
        f = np.maximum(np.asarray(freqs_hz, dtype=float), 1e-3)
        return np.interp(np.log10(f), np.log10(points_hz), np.asarray(times_s, dtype=float))

    # -- identity -------------------------------------------------------------------
    def sound_fields(self) -> dict:
        """The fields that shape the sound, as plain JSON-ready values (no name or notes)."""
        out = {}
        for f in dataclasses.fields(self):
            if f.name in ("name", "description", "reference"):
                continue
            value = getattr(self, f.name)
            out[f.name] = list(value) if isinstance(value, tuple) else value
        return out

    def fingerprint(self) -> str:
        """sha256 (hex) of :meth:`sound_fields`: equal for rooms that sound the same."""
        text = json.dumps(self.sound_fields(), sort_keys=True, separators=(",", ":"))
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def replace(self, **changes) -> "Room":
        """A copy with some fields changed, validated again.

        Changing the decay form (``decay_s`` against ``decay_bands_s``) or the
        geometry form (``distance_m`` against positions) clears the other form.
        """
        current = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        if "decay_bands_s" in changes:
            current.update(decay_s=None, decay_lf_s=None, decay_hf_s=None)
        elif {"decay_s", "decay_lf_s", "decay_hf_s"} & set(changes):
            current["decay_bands_s"] = None
            if "decay_s" not in changes and current["decay_s"] is None:
                _fail("decay_s", None, "decay_lf_s / decay_hf_s need decay_s when the base room uses decay_bands_s")
        if "distance_m" in changes:
            current.update(source_m=None, listener_m=None)
        elif "source_m" in changes or "listener_m" in changes:
            current["distance_m"] = None
        elif "size_m" in changes:
            current.update(source_m=None, listener_m=None)  # re-placed at the same distance
        else:
            current["distance_m"] = None  # the resolved positions stand
        current.update(changes)
        return Room(**current)


def _place(room: Room, size):
    """Choose talker and microphone positions for a distance (or the default one)."""
    length, width, height = size
    z = min(1.5, 0.55 * height)
    distance = room.distance_m if room.distance_m is not None else min(2.0, length / 3.0)
    # An off-centre point, so that image sources do not coincide (flutter).
    centre = np.array([0.47 * length, 0.43 * width, z])
    margin = WALL_MARGIN_M + 1e-9
    lo = np.array([margin, margin, margin])
    hi = np.array(size) - margin
    directions = [np.array([1.0, 0.0, 0.0]), np.array([length, width, 0.0]), np.array([length, width, height])]
    for d in directions:
        d = d / np.linalg.norm(d)
        # Largest distance along d that fits, centred on ``centre`` as far as possible.
        span = np.array([(hi - lo)[i] / abs(d[i]) if d[i] else np.inf for i in range(3)]).min()
        if distance <= span:
            half = distance / 2.0
            mid = np.clip(centre, lo + half * np.abs(d), hi - half * np.abs(d))
            source, listener = mid - half * d, mid + half * d
            return tuple(float(v) for v in source), tuple(float(v) for v in listener)
    longest = float(np.linalg.norm(hi - lo))
    _fail("distance_m", room.distance_m, f"must fit inside the room (at most {longest:.2f} m here)")


def _room_fields():
    return tuple(f.name for f in dataclasses.fields(Room))


#: Names of the fields a room table in a job file may set.
ROOM_FIELDS = _room_fields()
