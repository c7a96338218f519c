"""True-peak level after ITU-R BS.1770-4/-5 Annex 2, streaming and fast.

The signal is oversampled with the Annex's 48-tap polyphase interpolator
(4 phases x 12 taps, the printed table in :data:`INTERPOLATOR`), the absolute
value is taken and the largest value is reported in dBTP.

Oversampling: 4x below 96 kHz (all four phases); 2x from 96 kHz up, using
phases 0 and 2 of the same table (they lie about half an input sample apart,
0.52 samples at low frequency).  The Annex allows 2x at 96 kHz and gives no
figure above that; this module keeps 2x at 192 kHz and beyond, where audio
content sits at an even smaller fraction of the sample rate, so the same
read-point spacing costs less.

None of the four printed phases is the input sample itself: at low frequency
they sit 5.83, 5.69, 5.31 and 5.17 samples behind the newest input (DC gains
1.0016, 0.9730, 0.9730, 1.0016), so every phase is computed.  The input
samples themselves are counted as well, so the reading is never below the
sample peak (the interpolator alone reads an isolated full-scale sample at
-0.25 dBTP).

End of stream: the interpolator runs as if the signal were preceded and
followed by 11 zeros, so the inter-sample values around the first and last
samples are counted.  :func:`truepeak_result` adds that tail without changing
the state, so a stream can be read and then continued.

Speed.  An interpolated value is a 12-tap dot product, so
``|y| <= sum(|taps of its phase|) * max(|x|)`` over its 12 input samples
(the L1 norm is 2.02 for phases 1 and 2 and 1.43 for phases 0 and 3).  The
running maximum is at least the sample peak, which is known before any
interpolation, so a window can only beat it if it holds a "hot" sample above
``running maximum / L1 norm``.  Per piece of 65 536 samples: one comparison
finds the hot samples, the windows that contain one are marked, and the 12-tap
dot products run at those positions only.  They are the same arithmetic, in
the same order, as in :func:`brute_force_true_peak`, so both give
bit-identical results; the bound carries a 1e-12 relative slack so that
rounding cannot hide a skipped value.

Levels use :func:`render.units.gain_to_db`; silence reads its floor, -600 dB,
never -inf.

>>> import numpy as np
>>> n = np.arange(48000)
>>> x = (0.5 * np.sin(2 * np.pi * n / 4 + np.pi / 4))[:, None]  # fs/4, 45 degrees
>>> r = true_peak_dbtp(x, rate_hz=48000)
>>> round(r.sample_peak_dbfs, 1), round(r.true_peak_dbtp, 1)
(-9.0, -6.0)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Tuple

import numpy as np

from .errors import ParameterError
from .units import gain_to_db

__all__ = [
    "INTERPOLATOR",
    "TruePeakState",
    "TruePeakResult",
    "oversampling_factor",
    "truepeak_init",
    "truepeak_update",
    "truepeak_result",
    "true_peak_dbtp",
    "brute_force_true_peak",
]

#: ITU-R BS.1770-4 Annex 2 interpolator, one row per phase, tap k multiplies
#: the input k samples back.  Read in several stored copies of the printed
#: table (BS.1770-4 and -5 agree); the rows interleave into a symmetric 48-tap
#: low-pass, ``prototype[4 k + p] = INTERPOLATOR[p, k]``.
INTERPOLATOR = np.array(
    [
        [0.0017089843750, 0.0109863281250, -0.0196533203125, 0.0332031250000,
         -0.0594482421875, 0.1373291015625, 0.9721679687500, -0.1022949218750,
         0.0476074218750, -0.0266113281250, 0.0148925781250, -0.0083007812500],
        [-0.0291748046875, 0.0292968750000, -0.0517578125000, 0.0891113281250,
         -0.1665039062500, 0.4650878906250, 0.7797851562500, -0.2003173828125,
         0.1015625000000, -0.0582275390625, 0.0330810546875, -0.0189208984375],
        [-0.0189208984375, 0.0330810546875, -0.0582275390625, 0.1015625000000,
         -0.2003173828125, 0.7797851562500, 0.4650878906250, -0.1665039062500,
         0.0891113281250, -0.0517578125000, 0.0292968750000, -0.0291748046875],
        [-0.0083007812500, 0.0148925781250, -0.0266113281250, 0.0476074218750,
         -0.1022949218750, 0.9721679687500, 0.1373291015625, -0.0594482421875,
         0.0332031250000, -0.0196533203125, 0.0109863281250, 0.0017089843750],
    ]
)
INTERPOLATOR.setflags(write=False)

TAPS = INTERPOLATOR.shape[1]
HISTORY = TAPS - 1

#: Phases used at 4x and at 2x.
_PHASES_4X = (0, 1, 2, 3)
_PHASES_2X = (0, 2)

#: From this rate up, 2x oversampling (ITU-R BS.1770-4 Annex 2).
TWO_TIMES_FROM_HZ = 96000.0

# Slack on the candidate bound so that rounding in a 12-term dot product can
# never lift a skipped value above the running maximum (12 terms -> ~1e-15).
_BOUND_SLACK = 1.0 + 1e-12


def _check_rate(rate_hz):
    if isinstance(rate_hz, bool) or not isinstance(rate_hz, (int, float, np.integer, np.floating)):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a number > 0 Hz")
    rate = float(rate_hz)
    if not math.isfinite(rate) or rate <= 0.0:
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be > 0 Hz")
    return rate


def oversampling_factor(*, rate_hz):
    """Oversampling used at ``rate_hz``: 4 below 96 kHz, 2 from 96 kHz up.

    >>> oversampling_factor(rate_hz=48000), oversampling_factor(rate_hz=192000)
    (4, 2)
    """
    return 2 if _check_rate(rate_hz) >= TWO_TIMES_FROM_HZ else 4


def _phases(rate):
    return _PHASES_2X if rate >= TWO_TIMES_FROM_HZ else _PHASES_4X


def _check_channels(channels):
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ParameterError(f"channels = {channels!r}: must be an integer >= 1")
    return int(channels)


def _check_block(block, channels, name="block", finite=True):
    """Validate a (frames, channels) float block; ``channels=None`` accepts any count."""
    if not isinstance(block, np.ndarray):
        raise ParameterError(f"{name} is a {type(block).__name__}: expected a numpy array of shape (frames, channels)")
    if block.ndim != 2:
        raise ParameterError(f"{name}.ndim = {block.ndim}: expected a 2-D (frames, channels) array; mono is (n, 1)")
    if channels is not None and block.shape[1] != channels:
        raise ParameterError(f"{name} has {block.shape[1]} channels: expected {channels}")
    if not np.issubdtype(block.dtype, np.floating):
        raise ParameterError(f"{name}.dtype = {block.dtype}: expected floating-point samples (full scale 1.0)")
    if finite and block.size and not np.isfinite(block).all():
        raise ParameterError(f"{name} contains NaN or infinite samples: expected finite values")
    return np.asarray(block, dtype=np.float64)


# --------------------------------------------------------------------------- the interpolator


def _phase_peak(columns, phases):
    """Largest |interpolated value| given the 12 input columns (``columns[k]`` = x[n - k]).

    The accumulation order is fixed, so the value at a position does not depend
    on which other positions are computed with it.
    """
    peak = 0.0
    for p in phases:
        taps = INTERPOLATOR[p]
        acc = taps[0] * columns[0]
        for k in range(1, TAPS):
            acc += taps[k] * columns[k]
        if acc.size:
            peak = max(peak, float(np.max(np.abs(acc))))
    return peak


def _brute_peak(extended, phases, chunk=1 << 16):
    """Interpolate every window of ``extended`` (1-D, windows end at index >= 11)."""
    peak = 0.0
    count = extended.size - HISTORY
    for start in range(0, count, chunk):
        stop = min(start + chunk, count)
        columns = [extended[start + HISTORY - k: stop + HISTORY - k] for k in range(TAPS)]
        peak = max(peak, _phase_peak(columns, phases))
    return peak


def _tiers(phases):
    """Group phases by the L1 norm of their taps: [(norm, phases), ...], smallest norm first."""
    norms = {p: float(np.abs(INTERPOLATOR[p]).sum()) for p in phases}
    tiers = []
    for p in sorted(phases, key=lambda q: norms[q]):
        if tiers and norms[p] <= tiers[-1][0] * (1.0 + 1e-9):
            tiers[-1] = (max(tiers[-1][0], norms[p]), tiers[-1][1] + (p,))
        else:
            tiers.append((norms[p], (p,)))
    return tuple(tiers)


_TIERS = {phases: _tiers(phases) for phases in (_PHASES_4X, _PHASES_2X)}


def _shortcut_peak(extended, magnitude, phases, floor):
    """Like :func:`_brute_peak`, but only where a window could beat ``floor``.

    ``magnitude`` is ``abs(extended)``.  For a phase whose taps have L1 norm
    ``s``, a window whose 12 samples all satisfy ``|x| <= floor / s`` cannot
    exceed ``floor``; so only windows containing a "hot" sample above that
    level are interpolated, phase group by phase group (the inner phases have
    s = 2.02 and are done first; the outer ones, s = 1.43, need hotter samples).
    """
    size = extended.size
    peak = 0.0
    hot = None
    for norm, group in reversed(_TIERS[phases]):
        level = max(floor, peak) / (norm * _BOUND_SLACK)
        hot = np.flatnonzero(magnitude > level) if hot is None else hot[magnitude[hot] > level]
        if hot.size == 0:
            break
        # Windows end at j = 11 .. size - 1 and cover [j - 11, j]: a hot sample
        # at i makes the windows ending at i .. i + 11 candidates.
        mark = np.zeros(size + HISTORY, dtype=bool)
        for k in range(TAPS):
            mark[hot + k] = True
        ends = np.flatnonzero(mark[HISTORY:size]) + HISTORY
        columns = [extended[ends - k] for k in range(TAPS)]
        peak = max(peak, _phase_peak(columns, group))
    return peak


#: Frames per piece in the streaming scan: small enough for the temporaries to
#: stay in cache, large enough that Python overhead does not matter.
_CHUNK = 1 << 16


def _scan_channel(column, history, peak, sample_peak, phases):
    """Scan one channel's new samples; return (peak, sample_peak, last 11 samples)."""
    extended = np.empty(HISTORY + min(_CHUNK, column.size))
    for start in range(0, column.size, _CHUNK):
        piece = column[start:start + _CHUNK]
        n = piece.size
        if n != extended.size - HISTORY:
            extended = np.empty(HISTORY + n)
        extended[:HISTORY] = history
        extended[HISTORY:] = piece
        magnitude = np.abs(extended)
        piece_peak = float(np.max(magnitude[HISTORY:]))
        if not math.isfinite(piece_peak):
            raise ParameterError("block contains NaN or infinite samples: expected finite values")
        sample_peak = max(sample_peak, piece_peak)
        peak = max(peak, sample_peak)
        peak = max(peak, _shortcut_peak(extended, magnitude, phases, peak))
        history = extended[-HISTORY:].copy()
    return peak, sample_peak, history


# --------------------------------------------------------------------------- state and result


@dataclass(frozen=True, eq=False)
class TruePeakState:
    """What the true-peak meter remembers between blocks (treat as immutable).

    Attributes
    ----------
    rate_hz : float
        Sample rate, Hz.
    channels : int
        Channels per block.
    history : ndarray, shape (11, channels)
        The last 11 input samples (zeros before the stream starts).
    peak : ndarray, shape (channels,)
        Largest |interpolated or input sample| so far, linear, not yet
        counting the zero-padded tail.
    sample_peak : ndarray, shape (channels,)
        Largest |input sample| so far, linear.
    frames : int
        Frames seen so far.
    """

    rate_hz: float
    channels: int
    history: np.ndarray
    peak: np.ndarray
    sample_peak: np.ndarray
    frames: int


@dataclass(frozen=True)
class TruePeakResult:
    """True-peak and sample-peak levels.

    Attributes
    ----------
    true_peak_dbtp : float
        Highest true peak over all channels, dBTP.
    per_channel_dbtp : tuple of float
        True peak per channel, dBTP.
    sample_peak_dbfs : float
        Highest |sample| over all channels, dBFS.

    Silence reads -600 dB (the floor of :func:`render.units.gain_to_db`).
    """

    true_peak_dbtp: float
    per_channel_dbtp: Tuple[float, ...]
    sample_peak_dbfs: float


def truepeak_init(*, rate_hz, channels):
    """State of a true-peak meter that has seen nothing yet.

    Parameters
    ----------
    rate_hz : float
        Sample rate in Hz, > 0.
    channels : int
        Channels per block, >= 1.

    Returns
    -------
    TruePeakState
    """
    rate = _check_rate(rate_hz)
    channels = _check_channels(channels)
    history = np.zeros((HISTORY, channels))
    zeros = np.zeros(channels)
    for a in (history, zeros):
        a.setflags(write=False)
    return TruePeakState(rate_hz=rate, channels=channels, history=history, peak=zeros, sample_peak=zeros, frames=0)


def truepeak_update(block, state):
    """Meter one block; return the new state (the old one stays valid).

    Parameters
    ----------
    block : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0, any number of frames >= 0.
    state : TruePeakState

    Returns
    -------
    TruePeakState
        Block-by-block metering gives exactly the one-pass result.
    """
    if not isinstance(state, TruePeakState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a TruePeakState from truepeak_init")
    # Finiteness is checked piece by piece during the scan (one pass fewer).
    x = _check_block(block, state.channels, finite=False)
    if x.shape[0] == 0:
        return state
    phases = _phases(state.rate_hz)
    peak = state.peak.copy()
    sample_peak = state.sample_peak.copy()
    history = np.empty_like(state.history)
    for c in range(state.channels):
        peak[c], sample_peak[c], history[:, c] = _scan_channel(
            x[:, c], state.history[:, c], float(peak[c]), float(sample_peak[c]), phases
        )
    for a in (history, peak, sample_peak):
        a.setflags(write=False)
    return TruePeakState(
        rate_hz=state.rate_hz,
        channels=state.channels,
        history=history,
        peak=peak,
        sample_peak=sample_peak,
        frames=state.frames + x.shape[0],
    )


def _tail_peaks(state):
    """Per-channel peak including the 11 zero-padded windows after the last sample."""
    phases = _phases(state.rate_hz)
    tail = np.concatenate([state.history, np.zeros((HISTORY, state.channels))], axis=0)
    return np.array(
        [max(state.peak[c], _brute_peak(np.ascontiguousarray(tail[:, c]), phases)) for c in range(state.channels)]
    )


def _result(peaks, sample_peaks):
    per_channel = tuple(gain_to_db(float(p)) for p in peaks)
    return TruePeakResult(
        true_peak_dbtp=max(per_channel),
        per_channel_dbtp=per_channel,
        sample_peak_dbfs=gain_to_db(float(np.max(sample_peaks))),
    )


def truepeak_result(state):
    """True peak of everything metered into ``state``, end of stream zero-padded.

    Parameters
    ----------
    state : TruePeakState

    Returns
    -------
    TruePeakResult
    """
    if not isinstance(state, TruePeakState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a TruePeakState from truepeak_init")
    return _result(_tail_peaks(state), state.sample_peak)


def true_peak_dbtp(signal, *, rate_hz):
    """True peak of a whole signal in one pass.

    Parameters
    ----------
    signal : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0.
    rate_hz : float
        Sample rate in Hz, > 0.

    Returns
    -------
    TruePeakResult
    """
    x = _check_block(signal, None, name="signal", finite=False)
    return truepeak_result(truepeak_update(x, truepeak_init(rate_hz=rate_hz, channels=x.shape[1])))


def brute_force_true_peak(signal, *, rate_hz):
    """The same measurement, interpolating every position (for tests and benchmarks).

    Parameters
    ----------
    signal : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0.
    rate_hz : float
        Sample rate in Hz, > 0.

    Returns
    -------
    TruePeakResult
        Bit-identical to :func:`true_peak_dbtp`.
    """
    x = _check_block(signal, None, name="signal")
    _check_channels(x.shape[1])
    phases = _phases(_check_rate(rate_hz))
    pad = np.zeros((HISTORY, x.shape[1]))
    extended = np.concatenate([pad, x, pad], axis=0)
    sample_peaks = np.max(np.abs(x), axis=0) if x.shape[0] else np.zeros(x.shape[1])
    peaks = np.array(
        [max(float(sample_peaks[c]), _brute_peak(np.ascontiguousarray(extended[:, c]), phases)) for c in range(x.shape[1])]
    )
    return _result(peaks, sample_peaks)
