"""Delivery targets: loudness presets with their sources, and the gain decision (pure).

>>> PRESETS["ebu-r128"].target_lufs, PRESETS["ebu-r128"].ceiling_dbtp
(-23.0, -1.0)
>>> decide_gain(-20.0, target_lufs=-23.0, true_peak_dbtp=-1.0, ceiling_dbtp=-1.0, over_ceiling="lower").gain_db
-3.0
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Optional

from .errors import ParameterError

__all__ = ["Preset", "PRESETS", "GainDecision", "decide_gain", "OVER_CEILING", "NORMALIZE"]

OVER_CEILING = ("limit", "lower", "fail")
NORMALIZE = ("file", "group")


@dataclass(frozen=True)
class Preset:
    """A delivery target: integrated loudness, true-peak ceiling, QC tolerance, and where they come from."""

    name: str
    target_lufs: Optional[float]
    ceiling_dbtp: Optional[float]
    tolerance_lu: Optional[float]
    source: str


PRESETS = {
    p.name: p
    for p in (
        Preset("off", None, None, None, "no normalisation: the source's level is kept and only reported "
               "(the default, for dialogue matched to production sound)"),
        Preset("ebu-r128", -23.0, -1.0, 0.2, "EBU R128 (revision 2020): -23.0 LUFS, maximum true peak -1 dBTP, "
               "±0.2 LU for file-based QC"),
        Preset("atsc-a85", -24.0, -2.0, 2.0, "ATSC A/85: -24 LKFS; -2 dBTP as commonly specified; ±2 dB "
               "tolerance (from memory)"),
        Preset("podcast-stereo", -16.0, -1.0, 1.0, "podcasts in stereo: -16 LUFS at -1 dBTP (common practice, "
               "inside AES TD1004's -16 to -20 LUFS range); ±1 LU (common practice)"),
        Preset("podcast-mono", -19.0, -1.0, 1.0, "podcasts in mono: -19 LUFS at -1 dBTP (common practice: a "
               "mono file reads 3.01 LU below the same signal on two channels); ±1 LU (common practice)"),
        Preset("speech-streaming", -18.0, -1.0, 1.0, "speech-anchored streaming: -18 LUFS, peaks <= -1 dBTP "
               "(AES TD1008, 2021); ±1 LU (common practice)"),
    )
}


@dataclass(frozen=True)
class GainDecision:
    """What to do to one file (or group): a gain, and whether the limiter runs.

    ``shortfall_lu`` is how far below the target the output stays when the
    gain had to be lowered for the ceiling; ``fail`` says why the file must
    not be delivered (``over_ceiling = "fail"``).
    """

    gain_db: float
    limit: bool
    shortfall_lu: float = 0.0
    fail: Optional[str] = None


def decide_gain(measured_lufs, *, target_lufs, true_peak_dbtp, ceiling_dbtp, over_ceiling):
    """The normalisation gain and ceiling handling for one measured mix.

    Parameters
    ----------
    measured_lufs : float or None
        Integrated loudness of the un-normalised mix (None: not measurable,
        then the gain is 0 dB).
    target_lufs : float or None
        Target loudness; None keeps the level (gain 0 dB).
    true_peak_dbtp : float
        True peak of the un-normalised mix, dBTP.
    ceiling_dbtp : float or None
        Highest true peak allowed after the gain; None: no ceiling.
    over_ceiling : {"limit", "lower", "fail"}
        What to do when ``true_peak + gain`` passes the ceiling: run the
        limiter, lower the gain (report the shortfall), or fail the file.
    """
    if over_ceiling not in OVER_CEILING:
        raise ParameterError(f"over_ceiling = {over_ceiling!r}: must be one of {', '.join(OVER_CEILING)}")
    gain = 0.0 if (target_lufs is None or measured_lufs is None) else float(target_lufs - measured_lufs)
    if ceiling_dbtp is None or true_peak_dbtp + gain <= ceiling_dbtp:
        return GainDecision(gain_db=gain, limit=False)
    over = true_peak_dbtp + gain - ceiling_dbtp
    if over_ceiling == "limit":
        return GainDecision(gain_db=gain, limit=True)
    if over_ceiling == "lower":
        return GainDecision(gain_db=gain - over, limit=False, shortfall_lu=over if target_lufs is not None else 0.0)
    return GainDecision(
        gain_db=gain,
        limit=False,
        fail=f"true peak would be {true_peak_dbtp + gain:+.2f} dBTP after {gain:+.2f} dB of gain, above the "
        f"ceiling of {ceiling_dbtp:+.2f} dBTP (over_ceiling = \"fail\")",
    )
