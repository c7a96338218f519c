"""Built-in rooms, each with physical values and the source of those values.

Markers used in ``reference``: a published source by name; "derived" where a
value is computed from a published formula or from published end points;
"common practice" where the value is usual in the trade with no published
source; "from memory" where it was recalled and not checked in a text.

>>> sorted(CATALOGUE)[:3]
['brick-stairwell', 'civic-concert-hall', 'home-office']
>>> round(get_room("school-classroom").decay_mid_s, 3)   # DIN 18041 A3 for 216 m³
0.577
"""

from __future__ import annotations

import math
from typing import Dict

import numpy as np

from .acoustics import OCTAVE_BANDS_HZ
from .errors import RoomError
from .room import Room

__all__ = ["CATALOGUE", "get_room", "din18041_target_s"]


def din18041_target_s(group, volume_m3):
    """DIN 18041:2016 target reverberation time for room groups A1–A5.

    A1 music 0.45 lg V + 0.07; A2 speech 0.37 lg V − 0.14; A3 teaching
    0.32 lg V − 0.17; A4 inclusive teaching 0.26 lg V − 0.14; A5 sport
    0.75 lg V − 1.00 (V in m³).
    """
    coeffs = {"A1": (0.45, 0.07), "A2": (0.37, -0.14), "A3": (0.32, -0.17), "A4": (0.26, -0.14), "A5": (0.75, -1.00)}
    if group not in coeffs:
        raise RoomError(f"group = {group!r}: must be one of {', '.join(coeffs)}", field="group", value=group)
    a, b = coeffs[group]
    return a * math.log10(volume_m3) + b


def _log_line(t_first, t_last):
    """Seven octave values on a straight line (log frequency) between 125 Hz and 8 kHz."""
    x = np.log10(np.array(OCTAVE_BANDS_HZ))
    w = (x - x[0]) / (x[-1] - x[0])
    return tuple(float(round(t_first + (t_last - t_first) * v, 3)) for v in w)


def _build() -> Dict[str, Room]:
    rooms = [
        Room(
            name="speech-booth",
            decay_s=0.18,
            decay_lf_s=0.25,
            decay_hf_s=0.15,
            size_m=(2.2, 1.8, 2.3),
            distance_m=0.4,
            diffusion=0.5,
            description="Small treated booth for voice recording: close, dry, a little low-end hang.",
            reference="Voice booths 0.1-0.3 s (from memory); more decay at 125 Hz than at 4 kHz in small "
            "treated rooms (common practice).",
        ),
        Room(
            name="home-office",
            decay_s=0.5,
            decay_lf_s=0.6,
            decay_hf_s=0.45,
            size_m=(4.0, 3.5, 2.7),
            distance_m=1.0,
            description="Small office, hard desk and window, some soft furnishing.",
            reference="Offices 0.4-0.8 s (from memory); spectral tilt common practice.",
        ),
        Room(
            name="living-room",
            decay_bands_s=_log_line(0.69, 0.40),
            size_m=(5.5, 4.2, 2.5),
            distance_m=1.5,
            description="Furnished domestic living room.",
            reference="Everest, Master Handbook of Acoustics: living rooms ~0.69 s at 125 Hz falling to "
            "~0.40 s at 8 kHz (50 British rooms); bands between derived on a log-frequency line.",
        ),
        Room(
            name="school-classroom",
            decay_s=round(din18041_target_s("A3", 9.0 * 7.5 * 3.2), 3),
            decay_lf_s=0.65,
            decay_hf_s=0.52,
            size_m=(9.0, 7.5, 3.2),
            distance_m=3.0,
            description="Classroom of 216 m³ built to speech-teaching targets.",
            reference="DIN 18041:2016 group A3 (0.32 lg V - 0.17 = 0.577 s at 216 m³, derived); ANSI/ASA "
            "S12.60: <= 0.6 s for V <= 283 m³ (1 kHz). Band tilt common practice.",
        ),
        Room(
            name="raked-auditorium",
            decay_s=round(din18041_target_s("A2", 18.0 * 14.0 * 5.0), 3),
            decay_lf_s=1.2,
            decay_hf_s=0.9,
            size_m=(18.0, 14.0, 5.0),
            distance_m=5.0,
            description="Raked auditorium of 1260 m³ built to speech targets.",
            reference="DIN 18041:2016 group A2 (0.37 lg V - 0.14 = 1.006 s at 1260 m³, derived). Band tilt "
            "common practice.",
        ),
        Room(
            name="brick-stairwell",
            decay_s=2.6,
            decay_lf_s=2.4,
            decay_hf_s=1.9,
            size_m=(6.0, 3.2, 14.0),
            distance_m=2.5,
            diffusion=0.9,
            description="Tall bare stairwell of brick and concrete: long, bright flutter.",
            reference="Hard, untreated stair cores 2-3 s (common practice, no published source).",
        ),
        Room(
            name="underground-car-park",
            decay_s=3.0,
            decay_lf_s=3.4,
            decay_hf_s=2.2,
            size_m=(48.0, 32.0, 2.8),
            distance_m=6.0,
            description="Low concrete parking deck: long, dark, wide.",
            reference="Bare concrete parking decks 2.5-3.5 s (from memory); high-frequency loss from air "
            "absorption over long paths (common practice).",
        ),
        Room(
            name="parish-hall",
            decay_s=round(din18041_target_s("A1", 24.0 * 13.0 * 8.0), 3),
            decay_lf_s=1.8,
            decay_hf_s=1.4,
            size_m=(24.0, 13.0, 8.0),
            distance_m=4.0,
            description="Wooden-floored community hall of 2496 m³ used for music.",
            reference="DIN 18041:2016 group A1 (0.45 lg V + 0.07 = 1.598 s at 2496 m³, derived). Band tilt "
            "common practice.",
        ),
        Room(
            name="civic-concert-hall",
            decay_bands_s=(2.4, 2.3, 2.1, 2.0, 1.9, 1.7, 1.4),
            size_m=(44.0, 27.0, 18.0),
            distance_m=12.0,
            spread=1.0,
            description="Shoebox concert hall of 21 400 m³, mid-frequency decay 2.0 s.",
            reference="Concert halls 1.8-2.2 s at mid frequencies (Beranek, Concert Halls and Opera Houses, "
            "2004); rise at 125 Hz and fall at 8 kHz common practice.",
        ),
        Room(
            name="stone-nave",
            decay_bands_s=(6.0, 5.8, 5.4, 5.0, 4.4, 3.4, 2.4),
            size_m=(60.0, 22.0, 24.0),
            distance_m=10.0,
            diffusion=0.9,
            description="Large stone church nave: very long decay, darker at the top.",
            reference="Large stone churches up to ~8 s (weak source); 5 s at 1 kHz chosen as a moderate case "
            "(common practice).",
        ),
    ]
    return {r.name: r for r in rooms}


#: The built-in rooms by name.
CATALOGUE: Dict[str, Room] = _build()


def get_room(name):
    """The built-in room called ``name``; RoomError listing the names otherwise."""
    try:
        return CATALOGUE[name]
    except KeyError:
        raise RoomError(
            f"room {name!r} is not built in: choose one of {', '.join(sorted(CATALOGUE))}",
            field="base",
            value=name,
            expected="a built-in room",
        ) from None
