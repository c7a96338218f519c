"""Describe a room from a recording made in it: the DSP core of ``render fit`` (no I/O).

Two kinds of recording are handled.

**Impulse responses** (a measured response, or a clap or a starter pistol in
a quiet room) are recognised by their shape (see :func:`looks_impulsive`) and
measured with the ISO 3382-1 analysis of :mod:`render.analysis`: T30 per
octave band (T20 where T30 cannot be measured), the direct-to-reverberant
ratio from the energy within 1.25 ms either side of the direct sound's peak
against everything after it, and the initial time gap from the direct sound
to the first reflection stronger than -20 dB re the direct peak.

**Running speech** (the production sound of a scene) gets a blind estimate of
the reverberation time per octave band from the free decays after speech
offsets.  The decay model and the estimator are those of Ratnam, Jones,
Wheeler, O'Brien, Lansing and Feng, "Blind estimation of reverberation
time", JASA 114(5), 2003: the reverberant tail is an exponentially damped
Gaussian process, and its decay rate is found by maximum likelihood.  As in
Löllmann, Yilmaz, Jeub and Vary, "An improved algorithm for blind
reverberation time estimation", IWAENC 2010, the likelihood is evaluated on a
downsampled signal (here: energies of 5 ms blocks) and only on segments
pre-selected because their sub-frame energies fall monotonically.  Per band:

1. Filter the recording into the octave band (the time-reversed Butterworth
   filter of :func:`render.analysis.octave_band_sos`, as ISO 3382 permits
   for decays: the filter's own ringing then lies before each offset, not
   in the decay) and sum the squared samples of all channels in 5 ms blocks.
   Multichannel recordings are analysed as this power sum, so channels in
   anti-phase do not cancel and the direct/reverberant balance is kept.
2. Noise floor: the 2nd percentile of the sub-frame energies; speech level:
   the 95th percentile; their ratio is the band's estimated SNR.
3. Pre-selection (Löllmann et al.): runs of sub-frames whose energy falls
   from each sub-frame to the next, starting at a local maximum and stopping
   10 dB above the noise floor (the ISO 3382-1 margin).  A run is a candidate
   decay when it spans at least 3 sub-frames, 0.1 s and 20 dB.  The
   sub-frame length is adapted to the decay being measured, the way
   Lundeby et al. (Acustica 81, 1995) adapt their averaging interval: about
   2 dB of decay per sub-frame (5 per 10 dB), and at least long enough that
   this step is 3 standard deviations of the difference of two sub-frame
   levels, so that a true decay is not broken up by chance (a sub-frame of
   s seconds in a band B Hz wide holds a chi-square energy with 2Bs degrees
   of freedom, standard deviation about ``4.34 / sqrt(B·s)`` dB; B·s ≥ 5 in
   any case).  A first pass over a ladder of sub-frame lengths (shortest
   first, doubling up to 0.25 s) gives a rough decay rate, from which the
   second pass chooses the length (twice, the second time from the second
   pass's own estimate).
4. Per candidate: the free decay starts somewhere after the run's first
   sub-frame.  A line is fitted (maximum likelihood) to the second half of
   the run; the knee is the end of the last sub-frame, before the middle of
   the fitted part, whose level lies more than 2 dB off that line, either
   way: above it the direct sound is still present (the level of speech
   often falls before it stops), below it the reverberation is still fed
   by a source that fades out gradually (which Ratnam et al. name as a
   failure of the model).  The fit then starts 5 dB of decay after the knee
   (the start of ISO 3382's T20 and T30 ranges) and runs to the end of the
   run; knee and fit are found again until the start no longer moves (at
   most 4 times).  The noise floor's energy is subtracted from each block
   first.  A fit must span at least 10 dB.
5. The decay rate ``b`` (nepers of power per block) maximises the
   likelihood of the block energies ``E_j`` under ``E_j = c·exp(-b·j)·χ²``:
   it solves ``Σ_j (j - (J-1)/2)·exp(b·j)·E_j = 0`` (Ratnam et al.'s
   estimating equation; with blocks of one sample it is theirs exactly, and
   with longer blocks it is the maximum-likelihood equation of the block
   energies under a piecewise-constant envelope).  T60 = 6·ln(10)/b blocks.
6. The per-decay estimates are combined by their **median**, over the
   decays whose fitted part spans at least 25 dB when there are 3 or more
   of them (T30 is fitted over 30 dB, and a decay's early part can be
   steeper or flatter than its late part), else over all; ``decays`` counts
   the ones used and the spread is their interquartile range in % of the
   median.  Ratnam et al. take the most likely value of an order-statistics
   filter over their estimates and Löllmann et al. the peak of a histogram
   (both from memory), since decays overlapping with ongoing sound come
   out too long while none can be faster than the room.  Here the knee and
   the 5 dB start remove the usual cause of too-short estimates (the direct
   sound's own offset) and the strict pre-selection most overlapping
   decays, so the estimates scatter on both sides: on closed-loop material
   (invented speech-like signals and the demo media, 7 rooms of 0.4-2.7 s,
   40 s each, SNR 40-60 dB, bands 500 Hz - 4 kHz) this median had an rms
   error of 2.6 % (invented) and 4.4 % (media), a kernel-density mode (5 %
   wide, like a histogram peak) about the same, and the 25th percentile
   read 1.4 % and 5.4 % short on average.

Verdicts per band: ``"not measurable"`` (with the reason: too short, too
noisy, too dry, no free decays, continuous signal), ``"uncertain"`` (fewer
than 6 decays, a spread above 20 %, or an estimated SNR below 35 dB) or
``"ok"``.  A recording with no usable decays is not refused here: every band
comes back "not measurable" with its reason, so that the caller can show
them; :func:`fit_room` and :func:`room_table` refuse (AnalysisError) when
fewer than 3 of the bands 500 Hz - 4 kHz are measurable.

Limits of the blind estimate: decays below 0.2 s cannot be told from the
talker's own offsets (dry synthetic speech reads 0.18-0.31 s), so such
bands are "too dry"; where the reverberation time changes steeply from one
octave to the next, the band's decay leans towards the neighbour the speech
spectrum favours (+15 % was seen at 4 kHz for 0.95 s at 2 kHz against
0.65 s at 4 kHz); the 125 and 250 Hz bands get fewer and shorter decays.

The direct-to-reverberant ratio of speech comes from the same decays: over
the 0.1 s before an offset the level is direct plus reverberant sound, and
the fitted line, continued back to the offset, gives the reverberant part
alone, so ``DRR = 10·lg(P_before / P_line - 1)``.  It is given (the median
over the decays of the bands 500 Hz - 2 kHz that are measurable) only when
at least 8 decays give one and their interquartile range is at most 6 dB;
otherwise it is "not estimated" (None) with a note.  It is rough and reads
low: on the closed-loop material 0-2.4 dB low in rooms of 1-1.6 s and 1-7 dB
low in a room of 0.55 s (true DRR 0 to +12 dB).  It assumes the reverberant
field had built up before the offset and that the last 0.1 s of speech is as
loud as the speech that built it, which a phrase's falling end is not.

Level convention (as :mod:`render.synthesis`): a response has unit energy,
so a wet stem at ``wet_db`` has ``wet_db`` dB of reverberant energy re the
dry (direct) energy: ``wet_db = -DRR``.  By diffuse-field theory the
reverberant-to-direct ratio at distance r is ``20·lg(r / r_c)`` dB with the
critical distance ``r_c = 0.057·sqrt(V / T)`` (T at 1 kHz), so a DRR gives
``r = r_c·10^(-DRR / 20)``; :func:`fit_room` sets ``distance_m`` to that.

>>> import numpy as np
>>> rate_hz = 48000
>>> t = np.arange(rate_hz) / rate_hz
>>> noise = np.random.default_rng(0).standard_normal(rate_hz)
>>> ir = (noise * np.exp(-3.0 * np.log(10.0) * t / 0.5))[:, np.newaxis]
>>> result = fit_recording(ir, rate_hz=rate_hz)
>>> result.kind, [round(b.decay_s, 1) for b in result.bands]
('impulse', [0.5, 0.5, 0.5, 0.5, 0.5, 0.5, 0.5])
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from typing import NamedTuple, Optional, Tuple

import numpy as np
import scipy.signal

from . import analysis, early
from .acoustics import OCTAVE_BANDS_HZ, SABINE_CONSTANT_S_PER_M
from .errors import AnalysisError, ParameterError
from .room import MAX_DECAY_S, MAX_SIZE_M, MIN_DECAY_S, MIN_SIZE_M, WALL_MARGIN_M, Room
from .units import db_to_power, power_to_db

__all__ = [
    "FitBand",
    "FitResult",
    "CompareRow",
    "fit_recording",
    "looks_impulsive",
    "fit_room",
    "room_table",
    "compare",
    "format_compare",
    "format_fit",
    "guess_size_m",
    "JND_PCT",
    "VERDICTS",
]

#: Verdicts a band can get.
VERDICTS = ("ok", "uncertain", "not measurable")

#: Just-noticeable difference of the reverberation time, % (ISO 3382-1:2009, Annex A).
JND_PCT = 5.0

# ----------------------------------------------------------------- speech: choices
#: Energy block of the envelope (the downsampled signal of the estimator), s.
BLOCK_S = 0.005
#: Shortest speech recording analysed, s.
MIN_SPEECH_S = 5.0
#: A candidate decay falls at least this much (dB) ...
MIN_FALL_DB = 20.0
#: ... over at least this long (s) ...
MIN_RUN_S = 0.1
#: ... and this many sub-frames of falling energy (Löllmann et al.'s pre-selection).
MIN_SUBFRAMES = 3
#: The fitted part of a decay spans at least this much (dB).
MIN_FIT_DB = 10.0
#: Decays whose fitted part spans at least this much (dB) are preferred (T30 spans 30 dB).
DEEP_FIT_DB = 25.0
#: The fit starts this far into the reverberant decay (ISO 3382-1: T20 and T30 start at -5 dB).
SKIP_DB = 5.0
#: A sub-frame this far off the fitted line (either way) is not yet free decay (dB).
KNEE_DB = 2.0
#: Decays are used down to this far above the noise floor (ISO 3382-1's 10 dB margin).
NOISE_MARGIN_DB = 10.0
#: Decay per sub-frame aimed at (dB): Lundeby et al.'s 5 intervals per 10 dB.
STEP_DB = 2.0
#: The step between sub-frames is at least this many standard deviations of their difference.
FLUCTUATION_Z = 3.0
#: Smallest bandwidth-time product of a sub-frame (a chi-square energy with 2 B s = 10 degrees of freedom).
MIN_BANDWIDTH_TIME = 5.0
#: Longest sub-frame, s.
MAX_SUBFRAME_S = 0.25
#: Percentiles of the sub-frame energies taken as noise floor and as speech level.
NOISE_PERCENTILE = 2.0
LEVEL_PERCENTILE = 95.0
#: Frame levels (20 ms, all bands) spanning less than this (dB) make a continuous signal.
CONTINUOUS_SPAN_DB = 10.0
#: Below this estimated SNR (dB) a band is not measurable, below the second one uncertain.
MIN_SNR_DB = 20.0
OK_SNR_DB = 35.0
#: Fewer decays than the first make a band not measurable, fewer than the second uncertain.
MIN_DECAYS = 3
OK_DECAYS = 6
#: A spread (interquartile range, % of the median) above this makes a band uncertain.
OK_SPREAD_PCT = 20.0
#: Decays faster than this (T60, s) cannot be told from the talker's own offsets.
MIN_SPEECH_DECAY_S = 0.2
#: Window before an offset whose mean power is taken as direct plus reverberant sound, s.
DRR_WINDOW_S = 0.1
#: A DRR is reported from at least this many decays whose DRRs have at most this IQR (dB).
MIN_DRR_DECAYS = 8
MAX_DRR_IQR_DB = 6.0

# ----------------------------------------------------------------- impulse: choices
#: Window around the direct sound's peak holding the direct sound (ms, in total).
DIRECT_WINDOW_MS = 2.5
#: First reflection: the first sample after the direct window at or above this re the direct peak (dB) ...
REFLECTION_DB = -20.0
#: ... within this time after the direct peak (ms).
REFLECTION_SEARCH_MS = 100.0
#: Frame of the impulse test, s (long enough to bridge the gaps between early reflections).
IMPULSE_FRAME_S = 0.05
#: Impulse test: energy before the onset at most this fraction of the total ...
IMPULSE_PRE_FRACTION = 0.05
#: ... the loudest frame at most this long after the onset (s) ...
IMPULSE_RISE_S = 0.2
#: ... no frame after the peak more than this above the lowest frame before it (dB), while
#: that lowest frame is above the second value re the peak ...
IMPULSE_REGROWTH_DB = 10.0
IMPULSE_DEPTH_DB = -60.0
#: ... and a fall of at least this from the peak frame (dB).
IMPULSE_FALL_DB = 20.0

# ----------------------------------------------------------------- room guess
#: Mean absorption coefficient assumed for the size guess (common practice for furnished rooms).
GUESS_ABSORPTION = 0.2
#: Proportions length : width : height of the guessed shoebox (common practice).
GUESS_PROPORTIONS = (1.6, 1.25, 1.0)
#: Lowest ceiling of a guessed room, m (common practice).
GUESS_MIN_HEIGHT_M = 2.4

_LN10 = math.log(10.0)
_DB_PER_NEPER = 10.0 / _LN10
_EDGE = math.sqrt(2.0)
_MIN_RATE_HZ = 1000.0
_CENTRAL_BANDS_HZ = (500.0, 1000.0, 2000.0, 4000.0)
_DRR_BANDS_HZ = (500.0, 1000.0, 2000.0)


# ================================================================= results


def _band_label(band_hz):
    return f"{band_hz / 1000.0:g} kHz" if band_hz >= 1000.0 else f"{band_hz:g} Hz"


@dataclass(frozen=True)
class FitBand:
    """The fitted reverberation time of one octave band.

    Attributes
    ----------
    band_hz : float
        Octave-band centre frequency in Hz.
    decay_s : float or None
        Reverberation time T60 in seconds; None when not measurable.
    decays : int
        Number of decays the value rests on: free decays for speech, channels
        with a measured T30 (or T20) for an impulse response.
    spread_pct : float or None
        Speech: interquartile range of the per-decay estimates in % of their
        median.  Impulse response with several channels: (max - min) / mean
        of the channels' values in %.  None with fewer than two values.
    verdict : str
        ``"ok"``, ``"uncertain"`` or ``"not measurable"``.
    reason : str or None
        Why the verdict is not "ok" (None when it is).
    """

    band_hz: float
    decay_s: Optional[float]
    decays: int
    spread_pct: Optional[float]
    verdict: str
    reason: Optional[str]

    def to_dict(self):
        """JSON-ready dict of the fields."""
        return {
            "band_hz": self.band_hz,
            "decay_s": self.decay_s,
            "decays": self.decays,
            "spread_pct": self.spread_pct,
            "verdict": self.verdict,
            "reason": self.reason,
        }


@dataclass(frozen=True)
class FitResult:
    """What :func:`fit_recording` found.

    Attributes
    ----------
    kind : str
        ``"impulse"`` (analysed by ISO 3382-1) or ``"speech"`` (blind estimate).
    rate_hz : float
        Sample rate in Hz.
    duration_s : float
        Length of the recording in seconds.
    snr_db : float or None
        Speech: estimated SNR in dB (95th over 2nd percentile of 20 ms frame
        energies, all channels and frequencies).  Impulse: the broadband
        decay range of ISO 3382-1 (peak to noise floor of the decay), mean
        over channels.  None when it cannot be estimated.
    bands : tuple of FitBand
        The octave bands 125 Hz - 8 kHz whose upper edge lies below Nyquist.
    predelay_ms : float or None
        Impulse: the initial time gap, direct sound to the first strong
        reflection, in ms.  None when not estimated (always for speech).
    drr_db : float or None
        Direct-to-reverberant energy ratio in dB; None when not estimated.
    notes : tuple of str
        Plain-language remarks (what was assumed, what was not estimated).
    """

    kind: str
    rate_hz: float
    duration_s: float
    snr_db: Optional[float]
    bands: Tuple[FitBand, ...]
    predelay_ms: Optional[float]
    drr_db: Optional[float]
    notes: Tuple[str, ...] = ()

    def to_dict(self):
        """JSON-ready dict of the fields (bands as a list of dicts, notes as a list)."""
        return {
            "kind": self.kind,
            "rate_hz": self.rate_hz,
            "duration_s": self.duration_s,
            "snr_db": self.snr_db,
            "bands": [b.to_dict() for b in self.bands],
            "predelay_ms": self.predelay_ms,
            "drr_db": self.drr_db,
            "notes": list(self.notes),
        }

    def band(self, band_hz):
        """The :class:`FitBand` at ``band_hz``, or None when the band was not analysed."""
        for b in self.bands:
            if b.band_hz == float(band_hz):
                return b
        return None

    @property
    def wet_db(self):
        """``-drr_db``: the wet gain that reproduces the measured balance (None without a DRR)."""
        return None if self.drr_db is None else -self.drr_db


# ================================================================= validation


def _is_real(value):
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


def _check_rate(rate_hz):
    if not (_is_real(rate_hz) and math.isfinite(rate_hz) and rate_hz >= _MIN_RATE_HZ):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a finite number ≥ {_MIN_RATE_HZ:g} Hz")
    return float(rate_hz)


def _check_signal(signal):
    arr = np.asarray(signal)
    if arr.dtype.kind not in "fiu":
        raise ParameterError(f"signal has dtype {arr.dtype}: expected real samples (float64)")
    if arr.ndim != 2:
        raise ParameterError(f"signal has shape {arr.shape}: expected (frames, channels); mono is (frames, 1)")
    if arr.shape[0] < 2 or arr.shape[1] == 0:
        raise ParameterError(f"signal has shape {arr.shape}: expected at least two frames and one channel")
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ParameterError("signal contains NaN or infinite samples: expected finite values")
    if not np.any(arr):
        raise AnalysisError(f"signal is all zeros ({arr.shape[0]} frames): there is nothing to fit")
    return arr


def _usable_bands(rate):
    return tuple(b for b in OCTAVE_BANDS_HZ if b * _EDGE < 0.5 * rate)


def _bandwidth_hz(band_hz):
    return band_hz * (_EDGE - 1.0 / _EDGE)


# ================================================================= shared helpers


def _frame_energies(power, frame):
    """Sums of ``power`` (1-D) over consecutive frames of ``frame`` samples (the last partial one dropped)."""
    count = power.shape[0] // frame
    if count == 0:
        return np.zeros(0)
    return power[: count * frame].reshape(count, frame).sum(axis=1)


def _percentile_ratio_db(energies, high=LEVEL_PERCENTILE, low=NOISE_PERCENTILE):
    """(level, floor, ratio in dB) of frame energies: the ``high`` and ``low`` percentiles."""
    level = float(np.percentile(energies, high))
    floor = float(np.percentile(energies, low))
    if not level > 0:
        return level, floor, 0.0
    if not floor > 0:
        return level, floor, math.inf
    return level, floor, power_to_db(level / floor)


# ================================================================= impulse detection


def looks_impulsive(signal, *, rate_hz):
    """Whether a recording is an impulse response (or a clap in a quiet room) rather than running sound.

    On 50 ms frame energies summed over channels (long enough to bridge the
    gaps between early reflections), all four must hold:

    - the onset (the first frame within 20 dB of the loudest, the ISO 3382-1
      onset rule applied to frames) comes at most 0.2 s before the loudest
      frame (in a large hall without direct sound the reverberation takes
      that long to build up);
    - at most 5 % of the energy comes before the onset;
    - after the loudest frame, no frame is more than 10 dB above the lowest
      frame between it and the loudest one (no second onset), as long as
      that lowest frame is within 60 dB of the loudest;
    - some frame after the loudest one is at least 20 dB below it (a decay).

    Running speech fails the third test at its first pause, continuous
    sound the second (its loudest frame is anywhere) or the fourth.  A
    single short sound in a quiet room (a door slam, one isolated word)
    passes: its decay is the room's.

    Parameters
    ----------
    signal : array_like, shape (frames, channels)
        The recording, float64.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.

    Returns
    -------
    bool

    Examples
    --------
    >>> import numpy as np
    >>> t = np.arange(24000) / 48000
    >>> ir = np.random.default_rng(1).standard_normal(24000) * np.exp(-13.8 * t / 0.3)
    >>> looks_impulsive(ir[:, None], rate_hz=48000)
    True
    >>> looks_impulsive(np.random.default_rng(2).standard_normal((48000, 1)), rate_hz=48000)
    False
    """
    x = _check_signal(signal)
    rate = _check_rate(rate_hz)
    return _looks_impulsive(x, rate)


def _looks_impulsive(x, rate):
    frame = max(1, int(round(IMPULSE_FRAME_S * rate)))
    energy = _frame_energies(np.einsum("ij,ij->i", x, x), frame)
    if energy.shape[0] < 4 or not energy.max() > 0:
        return False
    peak = int(np.argmax(energy))
    top = float(energy[peak])
    onset = int(np.argmax(energy >= top * db_to_power(-20.0)))
    if (peak - onset) * frame / rate > IMPULSE_RISE_S:
        return False
    if float(energy[:onset].sum()) > IMPULSE_PRE_FRACTION * float(energy.sum()):
        return False
    after = power_to_db(np.maximum(energy[peak:], 1e-300) / top)
    lowest = np.minimum.accumulate(after)
    watched = lowest > IMPULSE_DEPTH_DB  # far below the peak, a rise no longer matters
    if np.any((after - lowest)[watched] > IMPULSE_REGROWTH_DB):
        return False
    return bool(lowest[-1] <= -IMPULSE_FALL_DB)


# ================================================================= impulse path


def _direct_and_gap(x, rate):
    """(drr_db, gap_ms, notes) from the direct sound's peak in the channel sum of |x|.

    A response without its direct sound (as :func:`render.synthesis.synthesize` makes them) reads
    its first reflection as the direct sound.
    """
    notes = []
    magnitude = np.sqrt(np.einsum("ij,ij->i", x, x))
    half = int(round(0.5e-3 * DIRECT_WINDOW_MS * rate))
    # The direct sound is the first arrival: the first sample within 20 dB of the strongest, and its
    # peak is the largest sample from there to 1.25 ms later (a reflection may be stronger, later).
    first = int(np.argmax(magnitude >= float(magnitude.max()) * 0.1))
    peak = first + int(np.argmax(magnitude[first : first + half + 1]))
    top = float(magnitude[peak])
    lo, hi = max(0, peak - half), min(x.shape[0], peak + half + 1)
    power = magnitude * magnitude
    direct = float(power[lo:hi].sum())
    rest = float(power[hi:].sum())
    drr = power_to_db(direct / rest) if rest > 0 else None
    if drr is None:
        notes.append("no energy after the direct sound: no direct-to-reverberant ratio")
    stop = min(x.shape[0], peak + int(round(1e-3 * REFLECTION_SEARCH_MS * rate)) + 1)
    strong = np.flatnonzero(magnitude[hi:stop] >= top * math.sqrt(db_to_power(REFLECTION_DB)))
    gap = None
    if strong.size:
        gap = 1e3 * (hi + int(strong[0]) - peak) / rate
    else:
        notes.append(
            f"no reflection within {REFLECTION_SEARCH_MS:g} ms reaches {REFLECTION_DB:g} dB re the direct "
            "sound: no initial gap"
        )
    return drr, gap, notes


def _fit_impulse(x, rate):
    result = analysis.analyze(x, rate_hz=rate)
    bands = []
    for k, band in enumerate(_usable_bands(rate)):
        per_channel = [ch.bands[k] for ch in result.channels]
        t30 = [b.t30_s for b in per_channel if b.t30_s is not None]
        t20 = [b.t20_s for b in per_channel if b.t20_s is not None]
        reasons = []
        if len(t30) == len(per_channel):
            values, used, verdict = t30, "T30", "ok"
        elif t30:
            values, used, verdict = t30, "T30", "uncertain"
            reasons.append(f"T30 measured in {len(t30)} of {len(per_channel)} channels")
        elif t20:
            values, used, verdict = t20, "T20", "uncertain"
            reasons.append("T30 not measurable, T20 used")
        else:
            values, used, verdict = [], None, "not measurable"
        for b in per_channel:
            for note in b.notes:
                # what analysis says about the value used: why it failed, curvature, filter bias
                relevant = note.startswith(("T30:", "T20:")) and verdict != "ok"
                warning = note.startswith("curvature") or (
                    used is not None and "band filter" in note and used in note.split(" shorter")[0]
                )
                if warning and verdict == "ok":
                    verdict = "uncertain"
                if (relevant or warning) and note not in reasons:
                    reasons.append(note)
        decay = float(np.mean(values)) if values else None
        spread = 100.0 * (max(values) - min(values)) / decay if len(values) >= 2 else None
        reason = "; ".join(reasons) if verdict != "ok" else None
        if verdict == "not measurable" and not reason:
            reason = "no decay range in this band"
        bands.append(FitBand(band, decay, len(values), spread, verdict, reason))
    ranges = [ch.broadband.decay_range_db for ch in result.channels]
    snr = float(np.mean(ranges)) if ranges else None
    drr, gap, notes = _direct_and_gap(x, rate)
    notes = ["impulse response: ISO 3382-1 analysis (T30, or T20 where T30 is not measurable)"] + notes
    if x.shape[1] > 1:
        notes.append(f"{x.shape[1]} channels: decay times are the mean over channels")
    return FitResult(
        kind="impulse",
        rate_hz=rate,
        duration_s=x.shape[0] / rate,
        snr_db=snr,
        bands=tuple(bands),
        predelay_ms=gap,
        drr_db=drr,
        notes=tuple(notes),
    )


# ================================================================= speech: estimator


def _ml_decay_rate(energies):
    """Maximum-likelihood decay rate of block energies, in nepers of power per block (> 0 decays).

    Solves ``Σ_j (j - (J-1)/2) exp(b j) E_j = 0`` for ``b``, i.e. the weighted
    mean of the block index with weights ``exp(b j) E_j`` equals the middle
    index (Ratnam et al. 2003; see the module docstring).  The weighted mean
    increases with ``b`` (its derivative is the weighted variance), so a
    bracketed Newton iteration converges.  None when there is no solution
    (fewer than two blocks with energy, or all energy in the first or last).
    """
    n = energies.shape[0]
    index = np.flatnonzero(energies > 0)
    if index.size < 2 or n < 3:
        return None
    j = index.astype(np.float64)
    log_e = np.log(energies[index])
    middle = 0.5 * (n - 1)
    if not (j[0] < middle < j[-1]):
        return None

    def weighted(b):
        lw = b * j + log_e
        w = np.exp(lw - lw.max())
        s = w.sum()
        mean = float(w @ j) / s
        var = float(w @ np.square(j - mean)) / s
        return mean - middle, var

    jm = j - j.mean()
    b = -float(jm @ (log_e - log_e.mean())) / float(jm @ jm)  # log-linear regression as the start
    lo, hi = -math.inf, math.inf
    for _ in range(100):
        f, var = weighted(b)
        if f > 0:
            hi = b
        else:
            lo = b
        if abs(f) < 1e-9 * n:
            return b
        step = f / var if var > 0 else math.copysign(1.0, f)
        new = b - step
        if not lo < new < hi:
            if math.isfinite(lo) and math.isfinite(hi):
                new = 0.5 * (lo + hi)
            else:
                new = b - math.copysign(max(abs(step), 1.0 / n), f) * 2.0
        if abs(new - b) < 1e-12 * max(1.0, abs(b)):
            return new
        b = new
    return b


def _runs(levels_db, floor_db):
    """(first, last) sub-frame of each maximal strictly falling run above ``floor_db``.

    A run starts at a sub-frame followed by a lower one, continues while each
    sub-frame is lower than the one before and not below ``floor_db``.
    """
    n = levels_db.shape[0]
    if n < 2:
        return []
    falling = (levels_db[1:] < levels_db[:-1]) & (levels_db[1:] >= floor_db) & (levels_db[:-1] >= floor_db)
    edges = np.diff(np.concatenate([[0], falling.astype(np.int8), [0]]))
    starts = np.flatnonzero(edges == 1)
    stops = np.flatnonzero(edges == -1)  # step k falling means sub-frames k and k+1 belong to the run
    return list(zip(starts.tolist(), stops.tolist()))


@dataclass(frozen=True)
class _Decay:
    rate: float  # nepers of power per block
    fit_db: float
    start: int  # first block of the fit
    end: int  # one past the last block
    drr_db: Optional[float]


def _decays(energy, sub, noise, floor_db, dt):
    """Decays of one band for sub-frames of ``sub`` blocks, and the count of candidates too short in time.

    ``energy``: block energies; ``noise``: the noise floor per block (subtracted);
    ``floor_db``: lowest sub-frame level (mean block energy, dB) a decay may use.
    Returns (list of _Decay, number of runs that fell enough but lasted less than MIN_RUN_S).
    """
    count = energy.shape[0] // sub
    means = energy[: count * sub].reshape(count, sub).mean(axis=1)
    levels = power_to_db(np.maximum(means, 1e-300))
    clean = np.maximum(energy - noise, 0.0)
    skip_nepers = SKIP_DB / _DB_PER_NEPER
    min_blocks = max(4, MIN_SUBFRAMES)
    out, too_short = [], 0
    for first, last in _runs(levels, floor_db):
        if last - first + 1 < MIN_SUBFRAMES or levels[first] - levels[last] < MIN_FALL_DB:
            continue
        begin, end = (first + 1) * sub, (last + 1) * sub  # blocks after the loudest sub-frame
        if (end - first * sub) * dt < MIN_RUN_S:
            too_short += 1
            continue
        start = begin + (end - begin) // 2
        rate = _ml_decay_rate(clean[start:end])
        for _ in range(4):
            if rate is None or not rate > 0:
                rate = None
                break
            # The fitted line, c exp(-rate (j - start)) per block, with c by maximum likelihood.
            part = clean[start:end]
            lw = rate * np.arange(part.shape[0]) + np.log(np.maximum(part, 1e-300))
            top = lw.max()
            log_c = top + math.log(float(np.exp(lw - top).mean()))
            knee = begin
            for i in range(first, last + 1):
                a = i * sub
                if a > (start + end) // 2:
                    break
                level = float(clean[a : a + sub].mean())
                # log of the line's mean over the sub-frame
                shifted = -rate * (np.arange(a, a + sub) - start)
                log_line = log_c + float(shifted.max()) + math.log(float(np.exp(shifted - shifted.max()).mean()))
                excess = power_to_db(level) - _DB_PER_NEPER * log_line if level > 0 else -math.inf
                if i > first and abs(excess) > KNEE_DB:
                    knee = a + sub
            new_start = knee + int(math.ceil(skip_nepers / rate))
            if end - new_start < max(min_blocks, MIN_SUBFRAMES * sub):
                rate = None
                break
            if new_start == start:
                break
            start = new_start
            rate = _ml_decay_rate(clean[start:end])
        if rate is None or not rate > 0:
            continue
        fit_db = _DB_PER_NEPER * rate * (end - start)
        if fit_db < MIN_FIT_DB:
            continue
        drr = None
        # Direct-to-reverberant ratio: mean power over DRR_WINDOW_S before the offset (direct plus
        # reverberant) against the fitted line continued back to the offset (reverberant alone).
        part = clean[start:end]
        lw = rate * np.arange(part.shape[0]) + np.log(np.maximum(part, 1e-300))
        top = float(lw.max())
        log_line = top + math.log(float(np.exp(lw - top).mean())) + rate * (start - begin)
        window = max(1, int(round(DRR_WINDOW_S / dt)))
        before = float(clean[max(0, begin - window) : begin].mean())
        if before > 0 and log_line < 700:
            excess = before / math.exp(log_line) - 1.0
            if excess > 1e-3:
                drr = power_to_db(excess)
        out.append(_Decay(rate=rate, fit_db=fit_db, start=start, end=end, drr_db=drr))
    return out, too_short


def _subframe_blocks(rate_per_block, bandwidth, dt, shortest):
    """Sub-frame length in blocks for a decay of ``rate_per_block`` nepers of power per block."""
    step_blocks = STEP_DB / (_DB_PER_NEPER * rate_per_block)
    # The step 60 s / T must be >= z sqrt(2) sigma with sigma = 4.34 / sqrt(B s) dB,
    # so s^(3/2) >= z sqrt(2) 4.34 T / (60 sqrt(B)).
    t60 = 6.0 * _LN10 / rate_per_block * dt
    fluct_s = (FLUCTUATION_Z * math.sqrt(2.0) * _DB_PER_NEPER * t60 / (60.0 * math.sqrt(bandwidth))) ** (2.0 / 3.0)
    blocks = max(shortest, int(round(step_blocks)), int(math.ceil(fluct_s / dt)))
    return int(min(blocks, max(shortest, int(MAX_SUBFRAME_S / dt))))


@dataclass(frozen=True)
class _BandDecays:
    decays: Tuple[_Decay, ...]
    snr_db: float
    too_short: int
    subframe_s: Optional[float]


def _band_decays(energy, band_hz, dt):
    """Two-pass decay search in one band's block energies (see the module docstring, step 3)."""
    bandwidth = _bandwidth_hz(band_hz)
    shortest = max(2, int(math.ceil(MIN_BANDWIDTH_TIME / bandwidth / dt)))
    count = energy.shape[0] // shortest
    means = energy[: count * shortest].reshape(count, shortest).mean(axis=1)
    _, noise, snr = _percentile_ratio_db(means)
    noise = max(noise, 1e-300)
    floor_db = power_to_db(noise) + NOISE_MARGIN_DB
    rates, too_short, best = [], 0, ()
    sub = shortest
    while sub * dt <= MAX_SUBFRAME_S:
        found, short = _decays(energy, sub, noise, floor_db, dt)
        rates += [d.rate for d in found]
        too_short += short
        if len(found) > len(best):  # kept if the adapted length below finds nothing
            best = tuple(found)
        sub *= 2
    if not rates:
        return _BandDecays((), snr, too_short, None)
    rough = float(np.median(rates))
    decays = best
    for _ in range(2):
        sub = _subframe_blocks(rough, bandwidth, dt, shortest)
        found, _ = _decays(energy, sub, noise, floor_db, dt)
        if not found:
            break
        decays = tuple(found)
        rough = float(np.median([d.rate for d in found]))
    return _BandDecays(decays, snr, too_short, sub * dt)


def _band_energy(x, band_hz, rate, block, chunk_blocks=2000):
    """Block energies of one octave band, summed over channels (time-reversed filtering).

    The time-reversed filter runs from the end of the recording to its
    start in chunks of ``chunk_blocks`` blocks (its state carried from one
    chunk to the next), so the extra memory does not grow with the length.
    Block k covers frames ``[k·block, (k+1)·block)``; a last partial block is
    filtered but not counted.
    """
    sos = analysis.octave_band_sos(band_hz, rate_hz=rate)
    frames = x.shape[0]
    count = frames // block
    out = np.zeros(count)
    state = np.zeros((sos.shape[0], 2, x.shape[1]))
    stop = frames
    step = chunk_blocks * block
    begin = (count // chunk_blocks) * step  # chunk edges on block edges, counted from the start
    while stop > 0:
        if begin == stop:  # the length is a whole number of chunks
            begin = max(0, begin - step)
            continue
        piece = np.ascontiguousarray(x[begin:stop][::-1])
        y, state = scipy.signal.sosfilt(sos, piece, axis=0, zi=state)
        power = np.einsum("ij,ij->i", y, y)[::-1]
        first = begin // block
        last = min(count, stop // block)
        if last > first:
            out[first:last] = _frame_energies(power, block)[: last - first]
        stop, begin = begin, max(0, begin - step)
    return out


def _speech_verdict(band_hz, found, dt):
    """FitBand for one band from its decays."""
    if found.snr_db < MIN_SNR_DB:
        return FitBand(band_hz, None, len(found.decays), None, "not measurable",
                       f"too noisy: estimated SNR {found.snr_db:.0f} dB in this band (needs ≥ {MIN_SNR_DB:g} dB)")
    t60 = np.array([6.0 * _LN10 / d.rate * dt for d in found.decays])
    if t60.size == 0:
        if found.too_short:
            reason = f"too dry: no decay longer than {MIN_RUN_S:g} s"
        else:
            reason = f"no free decays: no fall of {MIN_FALL_DB:g} dB over {MIN_SUBFRAMES} sub-frames"
        return FitBand(band_hz, None, 0, None, "not measurable", reason)
    deep = np.array([d.fit_db >= DEEP_FIT_DB for d in found.decays])
    if np.count_nonzero(deep) >= MIN_DECAYS:
        t60 = t60[deep]
    value = float(np.median(t60))
    spread = 100.0 * float(np.subtract(*np.percentile(t60, [75, 25]))) / value if t60.size >= 2 else None
    if value < MIN_SPEECH_DECAY_S:
        return FitBand(band_hz, None, int(t60.size), spread, "not measurable",
                       f"too dry: decays of {value:.2f} s cannot be told from the talker's own offsets "
                       f"(needs ≥ {MIN_SPEECH_DECAY_S:g} s)")
    if t60.size < MIN_DECAYS:
        return FitBand(band_hz, None, int(t60.size), spread, "not measurable",
                       f"no free decays: only {t60.size} (needs ≥ {MIN_DECAYS})")
    reasons = []
    if t60.size < OK_DECAYS:
        reasons.append(f"few decays ({t60.size})")
    if spread is not None and spread > OK_SPREAD_PCT:
        reasons.append(f"wide spread ({spread:.0f} %)")
    if found.snr_db < OK_SNR_DB:
        reasons.append(f"low SNR ({found.snr_db:.0f} dB)")
    verdict = "uncertain" if reasons else "ok"
    return FitBand(band_hz, value, int(t60.size), spread, verdict, "; ".join(reasons) or None)


def _fit_speech(x, rate):
    frames, channels = x.shape
    duration = frames / rate
    bands_hz = _usable_bands(rate)
    notes = ["running sound: blind estimate from free decays (maximum likelihood, Ratnam et al. 2003; "
             "pre-selection after Löllmann et al. 2010)"]
    if channels > 1:
        notes.append(f"{channels} channels: analysed as the sum of their powers")
    frame20 = max(1, int(round(0.020 * rate)))
    broadband = _frame_energies(np.einsum("ij,ij->i", x, x), frame20)
    _, _, span = _percentile_ratio_db(broadband) if broadband.size else (0.0, 0.0, 0.0)
    snr = None if not math.isfinite(span) else float(span)

    def refuse(reason):
        return FitResult("speech", rate, duration, snr,
                         tuple(FitBand(b, None, 0, None, "not measurable", reason) for b in bands_hz),
                         None, None, tuple(notes + ["direct-to-reverberant ratio not estimated"]))

    if duration < MIN_SPEECH_S:
        return refuse(f"too short: {duration:.1f} s (needs ≥ {MIN_SPEECH_S:g} s of running sound)")
    if span < CONTINUOUS_SPAN_DB:
        return refuse(f"no free decays: continuous signal (its 20 ms frame levels span only {span:.0f} dB)")

    block = max(1, int(round(BLOCK_S * rate)))
    dt = block / rate
    bands, drrs = [], []
    for band in bands_hz:
        found = _band_decays(_band_energy(x, band, rate, block), band, dt)
        bands.append(_speech_verdict(band, found, dt))
        if band in _DRR_BANDS_HZ and bands[-1].verdict != "not measurable":
            drrs += [d.drr_db for d in found.decays if d.drr_db is not None]
    drr = None
    if len(drrs) >= MIN_DRR_DECAYS:
        iqr = float(np.subtract(*np.percentile(drrs, [75, 25])))
        if iqr <= MAX_DRR_IQR_DB:
            drr = float(np.median(drrs))
            notes.append(f"direct-to-reverberant ratio from {len(drrs)} offsets (IQR {iqr:.1f} dB); "
                         "it reads high where the reverberation had not built up before an offset")
        else:
            notes.append(f"direct-to-reverberant ratio not estimated: {len(drrs)} offsets disagree "
                         f"(IQR {iqr:.1f} dB > {MAX_DRR_IQR_DB:g} dB)")
    else:
        notes.append(f"direct-to-reverberant ratio not estimated: {len(drrs)} usable offsets "
                     f"(needs ≥ {MIN_DRR_DECAYS})")
    return FitResult("speech", rate, duration, snr, tuple(bands), None, drr, tuple(notes))


# ================================================================= public entry


def fit_recording(signal, *, rate_hz):
    """Fit a room description to a recording: impulse response or running speech.

    Parameters
    ----------
    signal : array_like, shape (frames, channels)
        The recording, float64 (other real dtypes are converted), any level.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.

    Returns
    -------
    FitResult
        ``kind`` says which method was used (see the module docstring).  A
        recording without usable decays (continuous sound, too noisy, too
        short) comes back with every band "not measurable" and the reason;
        it is not an error here.

    Raises
    ------
    ParameterError
        ``signal`` not 2-D, empty or not finite; bad ``rate_hz``.
    AnalysisError
        ``signal`` is all zeros.
    """
    x = _check_signal(signal)
    rate = _check_rate(rate_hz)
    if _looks_impulsive(x, rate):
        return _fit_impulse(x, rate)
    return _fit_speech(x, rate)


# ================================================================= room


def guess_size_m(decay_s):
    """A shoebox size typical of a room with reverberation time ``decay_s`` (a guess).

    Sabine, ``T = 0.161 V / (S ᾱ)``, with a mean absorption coefficient
    ᾱ = 0.2 and proportions 1.6 : 1.25 : 1 (length : width : height), the
    height at least 2.4 m (all three common practice), each side within the
    limits of :class:`render.room.Room`.

    Parameters
    ----------
    decay_s : float
        Reverberation time at mid frequencies in seconds, > 0.

    Returns
    -------
    (float, float, float)
        Length, width and height in metres, rounded to 0.1 m.

    Examples
    --------
    >>> guess_size_m(0.5)
    (4.8, 3.8, 3.0)
    """
    if not (_is_real(decay_s) and math.isfinite(decay_s) and decay_s > 0):
        raise ParameterError(f"decay_s = {decay_s!r}: must be a finite number > 0 s")
    pl, pw, ph = GUESS_PROPORTIONS

    def dims(a):
        height = max(ph * a, GUESS_MIN_HEIGHT_M)
        return pl * a, pw * a, height

    def sabine(a):
        l, w, h = dims(a)
        return SABINE_CONSTANT_S_PER_M * l * w * h / (2.0 * (l * w + l * h + w * h) * GUESS_ABSORPTION)

    lo, hi = MIN_SIZE_M / pw, MAX_SIZE_M / pl
    if sabine(lo) >= decay_s:
        a = lo
    elif sabine(hi) <= decay_s:
        a = hi
    else:
        for _ in range(100):
            mid = 0.5 * (lo + hi)
            lo, hi = (mid, hi) if sabine(mid) < decay_s else (lo, mid)
        a = 0.5 * (lo + hi)
    return tuple(float(min(MAX_SIZE_M, max(MIN_SIZE_M, round(v, 1)))) for v in dims(a))


def _filled_bands(result):
    """Seven decay times (one per OCTAVE_BANDS_HZ) and, per band, how it was obtained."""
    measured = {b.band_hz: b.decay_s for b in result.bands if b.verdict != "not measurable" and b.decay_s}
    if not measured:
        raise AnalysisError("no band is measurable: there is nothing to describe a room with")
    log_known = np.log10(np.array(sorted(measured)))
    known = np.array([measured[f] for f in sorted(measured)])
    values, sources = [], []
    for f in OCTAVE_BANDS_HZ:
        if f in measured:
            values.append(measured[f])
            sources.append("measured")
        else:
            # straight line on a log-frequency axis between the measured neighbours, held beyond the ends
            values.append(float(np.interp(math.log10(f), log_known, known)))
            sources.append("filled")
    clipped = [round(float(min(MAX_DECAY_S, max(MIN_DECAY_S, v))), 3) for v in values]
    return clipped, sources


def _measurable_central(result):
    return [b for b in result.bands if b.band_hz in _CENTRAL_BANDS_HZ and b.verdict != "not measurable"]


def _first_reflection_gap_ms(room):
    images = early.image_sources(
        size_m=room.size_m, source_m=room.source_m, listener_m=room.listener_m, max_order=1
    )
    return 1e3 * (float(images.distances_m.min()) - room.distance_m) / room.speed_of_sound


def _check_name(name):
    if not isinstance(name, str) or not name or "/" in name or "\\" in name:
        raise ParameterError(f"name = {name!r}: must be a non-empty string without / or \\")
    return name


def _room_plan(result, name, size_m):
    """(Room, notes per key) for :func:`fit_room` and :func:`room_table`."""
    if not isinstance(result, FitResult):
        raise ParameterError(f"result = {result!r}: expected a FitResult")
    _check_name(name)
    central = _measurable_central(result)
    if len(central) < 3:
        reasons = "; ".join(
            f"{_band_label(b.band_hz)}: {b.reason}" for b in result.bands
            if b.band_hz in _CENTRAL_BANDS_HZ and b.verdict == "not measurable"
        )
        raise AnalysisError(
            f"only {len(central)} of the bands 500 Hz - 4 kHz are measurable (needs 3): {reasons or 'none analysed'}"
        )
    decays, sources = _filled_bands(result)
    mid_s = decays[OCTAVE_BANDS_HZ.index(1000.0)]
    notes = {}
    if size_m is None:
        size = guess_size_m(mid_s)
        notes["size_m"] = (f"guess: Sabine with mean absorption {GUESS_ABSORPTION:g} and proportions "
                           f"{':'.join(f'{p:g}' for p in GUESS_PROPORTIONS)} for T = {mid_s:.2f} s at 1 kHz")
    else:
        size = size_m
    room = Room(name=name, decay_bands_s=tuple(decays), size_m=tuple(size))
    if result.drr_db is not None:
        r_c = room.critical_distance_m
        distance = r_c * 10.0 ** (-result.drr_db / 20.0)
        longest = math.sqrt(sum((v - 2.0 * WALL_MARGIN_M) ** 2 for v in room.size_m))
        note = (f"from DRR {result.drr_db:+.1f} dB: r = r_c 10^(-DRR/20), r_c = 0.057 sqrt(V/T) = {r_c:.2f} m "
                f"(wet_db = {-result.drr_db:+.1f} gives the same balance)")
        limit = 0.9 * longest
        if distance > limit:
            note += f"; {distance:.2f} m does not fit this room, cut to {limit:.2f} m"
            distance = limit
        distance = max(0.05, distance)
        room = room.replace(distance_m=round(distance, 2))
        notes["distance_m"] = note
    if result.predelay_ms is not None:
        own = _first_reflection_gap_ms(room)
        extra = max(0.0, result.predelay_ms - own)
        room = room.replace(predelay_ms=round(min(extra, 500.0), 1))
        notes["predelay_ms"] = (f"measured initial gap {result.predelay_ms:.1f} ms minus the {own:.1f} ms of "
                                "this room's own first reflection")
    return room, decays, sources, notes


def fit_room(result, *, name, size_m=None):
    """A :class:`render.room.Room` from a fit.

    Bands that are "not measurable" (or above Nyquist) are filled from their
    measured neighbours on a straight line over log frequency, held constant
    beyond the lowest and highest measured band.  ``size_m`` is guessed with
    :func:`guess_size_m` from the 1 kHz value when not given.  With a
    direct-to-reverberant ratio, ``distance_m = r_c·10^(-DRR/20)`` (see the
    module docstring; cut to 90 % of the room's diagonal if longer).  With
    an initial time gap, ``predelay_ms`` is the gap minus the gap the room's
    own first reflection gives (at least 0).

    Parameters
    ----------
    result : FitResult
    name : str
        Room name (non-empty, no ``/`` or ``\\``).
    size_m : (float, float, float), optional
        Length, width and height in metres.

    Returns
    -------
    Room

    Raises
    ------
    AnalysisError
        Fewer than 3 of the bands 500 Hz - 4 kHz are measurable.
    ParameterError
        Bad ``name`` or ``size_m``.
    """
    return _room_plan(result, name, size_m)[0]


def _toml_key(name):
    return name if re.fullmatch(r"[A-Za-z0-9_-]+", name) else json.dumps(name, ensure_ascii=False)


def _toml_number(value):
    return f"{value:.3f}".rstrip("0").rstrip(".") if value != int(value) else f"{value:.1f}"


def room_table(result, *, name, size_m=None):
    """A TOML ``[rooms.NAME]`` table of the fitted room, for a job file as it is.

    The keys are those of the job file's room tables: ``decay_bands_s``
    (7 octave bands, filled where not measurable, see :func:`fit_room`),
    ``size_m`` (given, or a guess marked as such), ``distance_m`` when a
    direct-to-reverberant ratio was estimated, ``predelay_ms`` when an
    initial gap was measured, and ``description``.  Comments give the
    verdict of every band and where each value came from.

    Parameters
    ----------
    result : FitResult
    name : str
        Room name (non-empty, no ``/`` or ``\\``); quoted in the header if it
        is not a bare TOML key.
    size_m : (float, float, float), optional
        Length, width and height in metres.

    Returns
    -------
    str
        TOML text ending in a newline.

    Raises
    ------
    AnalysisError
        Fewer than 3 of the bands 500 Hz - 4 kHz are measurable.
    """
    room, decays, sources, notes = _room_plan(result, name, size_m)
    by_band = {b.band_hz: b for b in result.bands}
    snr = "unknown" if result.snr_db is None else f"{result.snr_db:.0f} dB"
    what = "an impulse response" if result.kind == "impulse" else "running sound"
    lines = [
        f"# fitted from {what}: {result.duration_s:.1f} s at {result.rate_hz:g} Hz, "
        f"{'decay range' if result.kind == 'impulse' else 'estimated SNR'} {snr}",
    ]
    for f, source in zip(OCTAVE_BANDS_HZ, sources):
        band = by_band.get(f)
        if band is None:
            verdict = "not analysed (above Nyquist)"
        else:
            facts = [f"{band.decays} decay{'s' if band.decays != 1 else ''}"] if band.decays else []
            if band.spread_pct is not None:
                facts.append(f"spread {band.spread_pct:.0f} %")
            verdict = band.verdict + (f" ({', '.join(facts)})" if facts else "")
            if band.reason:
                verdict += f": {band.reason}"
        fill = "; value filled from neighbours on a log-frequency line" if source == "filled" else ""
        lines.append(f"# {_band_label(f):>8}: {verdict}{fill}")
    lines.append(f"[rooms.{_toml_key(name)}]")
    filled = [_band_label(f) for f, s in zip(OCTAVE_BANDS_HZ, sources) if s == "filled"]
    decay_comment = "125 Hz - 8 kHz" + (f"; filled from neighbours: {', '.join(filled)}" if filled else "")
    lines.append("decay_bands_s = [" + ", ".join(_toml_number(round(v, 3)) for v in decays) + f"]  # {decay_comment}")
    size_text = "[" + ", ".join(_toml_number(v) for v in room.size_m) + "]"
    lines.append(f"size_m = {size_text}" + (f"  # {notes['size_m']}" if "size_m" in notes else ""))
    if "distance_m" in notes:
        lines.append(f"distance_m = {_toml_number(room.distance_m)}  # {notes['distance_m']}")
    if "predelay_ms" in notes:
        lines.append(f"predelay_ms = {_toml_number(room.predelay_ms)}  # {notes['predelay_ms']}")
    description = f"fitted from {what} ({result.duration_s:.1f} s)"
    lines.append(f"description = {json.dumps(description, ensure_ascii=False)}")
    return "\n".join(lines) + "\n"


# ================================================================= compare


class CompareRow(NamedTuple):
    """One band of :func:`compare`: ``diff_pct = 100 (b_s / a_s - 1)``."""

    band_hz: float
    a_s: Optional[float]
    b_s: Optional[float]
    diff_pct: Optional[float]
    within_jnd: bool


def compare(a, b):
    """Band-by-band comparison of two fits against the just-noticeable difference.

    ``diff_pct = 100·(b_s / a_s - 1)`` (``a`` is the reference), and
    ``within_jnd`` is ``|diff_pct| <= 5`` (the JND of the reverberation time,
    ISO 3382-1:2009 Annex A).  A band "not measurable" in either fit has
    ``diff_pct = None`` and ``within_jnd = False``.

    Parameters
    ----------
    a, b : FitResult

    Returns
    -------
    list of CompareRow
        The bands analysed in either fit, low to high.
    """
    for label, value in (("a", a), ("b", b)):
        if not isinstance(value, FitResult):
            raise ParameterError(f"{label} = {value!r}: expected a FitResult")
    rows = []
    for f in OCTAVE_BANDS_HZ:
        ba, bb = a.band(f), b.band(f)
        if ba is None and bb is None:
            continue
        ta = ba.decay_s if ba is not None and ba.verdict != "not measurable" else None
        tb = bb.decay_s if bb is not None and bb.verdict != "not measurable" else None
        diff = 100.0 * (tb / ta - 1.0) if ta and tb else None
        rows.append(CompareRow(f, ta, tb, diff, diff is not None and abs(diff) <= JND_PCT + 1e-9))
    return rows


def _cell(value, fmt):
    return "\u2014" if value is None else format(value, fmt)


def _table(rows, left_last=False):
    """Rows of cells as aligned lines: first column left, the others right (the last left if asked)."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for r in rows:
        cells = [r[0].ljust(widths[0])] + [c.rjust(w) for c, w in zip(r[1:], widths[1:])]
        if left_last:
            cells[-1] = r[-1]
        lines.append("  ".join(cells).rstrip())
    return lines


def format_compare(rows):
    """Terminal table of :func:`compare` rows; a last line counts the bands beyond the JND.

    Parameters
    ----------
    rows : list of CompareRow

    Returns
    -------
    str
    """
    table = [["band", "a (s)", "b (s)", "diff (%)", f"within {JND_PCT:g} %"]]
    for r in rows:
        mark = "yes" if r.within_jnd else ("no" if r.diff_pct is not None else "\u2014")
        table.append(
            [_band_label(r.band_hz), _cell(r.a_s, ".2f"), _cell(r.b_s, ".2f"), _cell(r.diff_pct, "+.1f"), mark]
        )
    lines = _table(table)
    beyond = [r for r in rows if r.diff_pct is not None and not r.within_jnd]
    unknown = [r for r in rows if r.diff_pct is None]
    summary = f"{len(beyond)} of {len(rows)} bands differ by more than the JND of {JND_PCT:g} % (ISO 3382-1)"
    if unknown:
        summary += f"; {len(unknown)} not comparable"
    return "\n".join(lines + [summary])


def format_fit(result):
    """A readable table of a :class:`FitResult`: one row per band, then the single values and notes.

    Parameters
    ----------
    result : FitResult

    Returns
    -------
    str
    """
    if not isinstance(result, FitResult):
        raise ParameterError(f"result = {result!r}: expected a FitResult")
    what = "impulse response (ISO 3382-1)" if result.kind == "impulse" else "running sound (blind estimate)"
    snr_label = "decay range" if result.kind == "impulse" else "estimated SNR"
    head = [
        f"{what}: {result.duration_s:.1f} s at {result.rate_hz:g} Hz, "
        f"{snr_label} {_cell(result.snr_db, '.0f')} dB",
        "",
    ]
    table = [["band", "T60 (s)", "decays", "spread (%)", "verdict"]]
    for b in result.bands:
        table.append([_band_label(b.band_hz), _cell(b.decay_s, ".2f"), str(b.decays), _cell(b.spread_pct, ".0f"),
                      b.verdict + (f": {b.reason}" if b.reason else "")])
    lines = head + _table(table, left_last=True) + [""]
    lines.append("direct-to-reverberant ratio: " + (
        "not estimated" if result.drr_db is None else f"{result.drr_db:+.1f} dB (wet_db {-result.drr_db:+.1f})"))
    lines.append("initial gap (direct to first reflection): " + (
        "not estimated" if result.predelay_ms is None else f"{result.predelay_ms:.1f} ms"))
    if result.notes:
        lines.append("notes:")
        lines.extend(f"  {n}" for n in result.notes)
    return "\n".join(lines)
