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
``|y| <= sum_k |taps[k]| |x[n - k]|``.  Every phase has its two largest taps
in the middle (k = 5, 6: 0.780 and 0.465 for phases 1 and 2, 0.972 and 0.137
for phases 0 and 3; the other ten sum to 0.778 and 0.325), so a cheap and
tight bound on a set of phases is

    ``big * max(a5, a6) + small * min(a5, a6) + rest * max(the other ten |x|)``

with ``a5, a6 = |x[n - 5]|, |x[n - 6]|`` and ``big``, ``small``, ``rest`` the
largest over the set (the rearrangement inequality covers both orders of the
middle pair).  The running maximum is at least the sample peak, which is
known before any interpolation, so only windows whose bound beats it can
raise it.  A block is scanned in pieces of about 65 536 samples, all channels
at once on the interleaved data (a shift by one frame is a shift by
``channels`` elements).  About a dozen whole-array passes in float32 (half
the memory traffic of float64: absolute value, sliding maxima built from
pairwise maxima, the bound, one comparison) find the candidate windows, and
the float64 dot products run there only.  For Gaussian noise these are ~4 %
of the windows of the first piece and ~0.3 % once the running maximum has
settled, against ~40 % and ~10 % for the simpler test "the window holds a
sample above running maximum / L1 norm".  When candidates are many (a tone,
a limited or clipped signal), all windows of the piece are computed on
contiguous slices instead of gathered, phases 1 and 2 first, which raise the
maximum so that phases 0 and 3 then need few.  The sample peak is exact: the
float32 maximum only tells which samples to look at in float64.

The dot products are the same arithmetic, in the same order, as in
:func:`brute_force_true_peak`, so both give bit-identical results.  The bound
carries a slack of 1e-5 relative (float32 rounding of |x| and of the bound's
few operations stays below 1e-6, the dot product's below 1e-14) and 2**-120
absolute (for magnitudes that underflow in float32), so that rounding cannot
hide a skipped value.

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

# Slack on the candidate bound, which is computed in float32 (module notes):
# relative, for rounding |x| and the bound's few operations to float32 (< 1e-6)
# and the 12-term float64 dot product (~1e-15); absolute, for magnitudes that
# underflow in float32 (each loses < 2**-149).  A skipped window's value can
# therefore never exceed the running maximum.
_BOUND_SLACK = 1.0 + 1e-5
_ABSOLUTE_SLACK = 2.0**-120
_FLOAT32_MAX = float(np.finfo(np.float32).max)


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


_GROUP_TAPS = {}


def _group_taps(phases):
    """``INTERPOLATOR`` rows of ``phases`` as one read-only (len(phases), 12) array (cached)."""
    taps = _GROUP_TAPS.get(phases)
    if taps is None:
        taps = INTERPOLATOR[list(phases)]
        taps.setflags(write=False)
        _GROUP_TAPS[phases] = taps
    return taps


def _phase_values(columns, phases, scratch=None):
    """Interpolated values, shape (len(phases), len(columns[0])), given ``columns[k]`` = x[n - k].

    Every phase's value at a position is ``taps[0] * x[n]``, then ``+ taps[k] *
    x[n - k]`` for k = 1 .. 11, each product and each sum rounded in turn.  The
    phases are computed side by side as the rows of one array, which changes no
    operation, so the value at a position does not depend on which other
    positions or phases are computed with it.  ``scratch`` is an optional pair
    of flat float arrays, used when they hold ``len(phases) * len(columns[0])``
    values (the result is then a view of the first).
    """
    width = columns[0].shape[-1]
    taps = _group_taps(tuple(phases))[:, :, None]  # taps[:, k] is a (phases, 1) column
    shape = (len(phases), width)
    need = shape[0] * width
    if scratch is None or scratch[0].size < need:
        acc, term = np.empty(shape), np.empty(shape)
    else:
        acc, term = scratch[0][:need].reshape(shape), scratch[1][:need].reshape(shape)
    np.multiply(taps[:, 0], columns[0], out=acc)
    for k in range(1, TAPS):
        acc += np.multiply(taps[:, k], columns[k], out=term)
    return acc


def _gathered_values(columns, phases):
    """:func:`_phase_values` for a (12, m) array of gathered windows, in two array operations.

    All 12 products at once, then ``numpy.add.accumulate`` along the tap axis,
    which adds them one after another, ``((p0 + p1) + p2) + ...``: the same
    rounded operations, in the same order, as the loop in :func:`_phase_values`.
    """
    products = _group_taps(tuple(phases))[:, :, None] * columns[None, :, :]  # (phases, 12, m)
    np.add.accumulate(products, axis=1, out=products)
    return products[:, -1, :]


def _phase_peak(columns, phases, scratch=None):
    """Largest |interpolated value| given ``columns[k]`` = x[n - k] (see :func:`_phase_values`)."""
    if columns[0].shape[-1] == 0:
        return 0.0
    values = _phase_values(columns, phases, scratch)
    return max(float(values.max()), -float(values.min()))


def _brute_peak(extended, phases, chunk=1 << 14):
    """Interpolate every window of ``extended`` (1-D, windows end at index >= 11)."""
    peak = 0.0
    count = extended.size - HISTORY
    for start in range(0, count, chunk):
        stop = min(start + chunk, count)
        columns = [extended[start + HISTORY - k: stop + HISTORY - k] for k in range(TAPS)]
        peak = max(peak, _phase_peak(columns, phases))
    return peak


# --------------------------------------------------------------------------- the shortcut


def _bound_coefficients(phases):
    """Coefficients of the candidate bound on every phase of ``phases`` (module notes).

    ``|y_p[n]| <= big * max(a5, a6) + small * min(a5, a6) + rest * m10`` for
    every phase ``p``, where ``a5, a6`` are ``|x[n - 5]|, |x[n - 6]|`` and
    ``m10`` is the largest of the other ten ``|x[n - k]|``; ``big``, ``small``
    and ``rest`` are the largest over the phases of the larger middle tap, the
    smaller one and the L1 norm of the other ten (the rearrangement inequality
    covers both orders of the pair).  Returned for the bound divided by
    ``rest``, ``m10 + c_max * max(a5, a6) + c_sum * (a5 + a6)``:
    ``(rest, c_max, c_sum)`` with ``c_max = (big - small) / rest`` and
    ``c_sum = small / rest``.
    """
    big = small = rest = 0.0
    for p in phases:
        taps = np.abs(INTERPOLATOR[p])
        big = max(big, float(max(taps[5], taps[6])))
        small = max(small, float(min(taps[5], taps[6])))
        rest = max(rest, float(taps.sum() - taps[5] - taps[6]))
    return rest, (big - small) / rest, small / rest


def _groups(phases):
    """The phases grouped by the L1 norm of their taps, largest first, each with its bound."""
    groups = {}
    for p in phases:
        groups.setdefault(round(float(np.abs(INTERPOLATOR[p]).sum()), 9), []).append(p)
    return tuple((tuple(g), _bound_coefficients(g)) for _, g in sorted(groups.items(), reverse=True))


#: Per phase set: the bound on all its phases, and its groups (phases 1, 2, then 0, 3 at 4x).
_BOUNDS = {phases: _bound_coefficients(phases) for phases in (_PHASES_4X, _PHASES_2X)}
_GROUPS = {phases: _groups(phases) for phases in (_PHASES_4X, _PHASES_2X)}

#: ``HISTORY - k`` for the 12 taps, as a column: window end + this = frame of x[n - k].
_TAP_OFFSETS = HISTORY - np.arange(TAPS)[:, None]

#: Above this fraction of candidate windows, a piece is computed on contiguous
#: slices of all its windows rather than on gathered ones (gathering 12 values
#: per window then costs more than the windows it skips), one group of phases
#: at a time, so that the inner phases can raise the maximum first.
_DENSE = 0.25

#: Samples (frames x channels) per piece of a block: small enough for the
#: scratch arrays to stay in cache, large enough that Python overhead does not matter.
_CHUNK_SAMPLES = 1 << 16

#: Frames per row when a (frames, channels) array is viewed as wide rows, so
#: that per-channel operations run along long contiguous rows.
_WIDE = 256


class _Workspace:
    """Scratch arrays for pieces of up to ``capacity`` frames of ``channels`` channels.

    They are reused piece after piece: fresh large temporaries for every piece
    cost more than the arithmetic on them, while these stay allocated and in
    cache.  The screening arrays are float32 (half the memory traffic, twice
    the values per vector instruction), the samples and interpolated values
    float64.  Each is flat; :meth:`rows` views its start as a C-contiguous
    (rows, channels) array.
    """

    __slots__ = ("channels", "extended", "magnitude", "pair_max", "max4", "max5", "others", "pair_sum", "bound",
                 "term", "mask", "scratch")

    def __init__(self, capacity, channels):
        self.channels = channels
        size = channels * (HISTORY + capacity)
        self.extended = np.empty(size)
        for name in ("magnitude", "pair_max", "max4", "max5", "others", "pair_sum", "bound", "term"):
            setattr(self, name, np.empty(size, dtype=np.float32))
        self.mask = np.empty(size, dtype=bool)
        # Two phases over every window, or four over the most windows gathered (_DENSE).
        self.scratch = (np.empty(2 * size), np.empty(2 * size))

    def rows(self, name, rows):
        return getattr(self, name)[: rows * self.channels].reshape(rows, self.channels)


def _per_channel_max(rows):
    """Largest value of each column of a C-contiguous (frames, channels) array (frames >= 1)."""
    frames, channels = rows.shape
    whole = frames - frames % _WIDE
    parts = [rows[whole:]] if whole < frames else []
    if whole:
        # Column-wise maxima of (frames / 256, 256 * channels): long contiguous inner loops.
        parts.append(rows[:whole].reshape(-1, _WIDE * channels).max(axis=0).reshape(_WIDE, channels))
    return (np.concatenate(parts) if len(parts) > 1 else parts[0]).max(axis=0)


def _above(values, levels, out):
    """``values > levels`` for a C-contiguous (frames, channels) array and per-channel levels."""
    frames, channels = values.shape
    whole = frames - frames % _WIDE
    if whole:
        wide = np.tile(levels, _WIDE)
        np.greater(values[:whole].reshape(-1, _WIDE * channels), wide, out=out[:whole].reshape(-1, _WIDE * channels))
    if whole < frames:
        np.greater(values[whole:], levels, out=out[whole:])
    return out


def _candidates(terms, coefficients, floors, ws):
    """Flat indices ``(n - 11) * channels + c`` of the windows whose bound exceeds their channel's floor."""
    others, pair_max, pair_sum = terms
    rest, c_max, c_sum = coefficients
    size = others.size
    bound = np.multiply(pair_sum, c_sum, out=ws.bound[:size])
    bound += others
    bound += np.multiply(pair_max, c_max, out=ws.term[:size])
    # (Capped at the largest float32: a floor beyond it must not turn into an infinite level.)
    levels = np.minimum((floors / _BOUND_SLACK - _ABSOLUTE_SLACK) / rest, _FLOAT32_MAX).astype(np.float32)
    # A floor of 0 means an all-zero channel so far: every interpolated value is 0.
    levels[floors == 0.0] = np.inf
    rows = size // ws.channels
    return np.flatnonzero(_above(bound.reshape(rows, ws.channels), levels, ws.rows("mask", rows)))


#: Up to this many gathered windows, :func:`_gathered_values` (two calls, but a
#: slow accumulation) beats the 23 calls of :func:`_phase_values`.
_FEW = 256


def _sparse_peaks(x, hits, phases, ws):
    """Per channel, the largest |value| of ``phases`` over the windows ``hits`` of the flat piece ``x``."""
    ch = ws.channels
    columns = x[hits + _TAP_OFFSETS * ch]  # row k holds x[n - k]
    if hits.size <= _FEW:
        values = _gathered_values(columns, phases)
    else:
        values = _phase_values(columns, phases, ws.scratch)
    values = np.abs(values, out=values).max(axis=0)
    found = np.zeros(ch)
    if ch == 1:
        found[0] = values.max()
    else:
        np.maximum.at(found, hits % ch, values)
    return found


def _dense_peaks(x, size, phases, ws):
    """Per channel, the largest |value| of ``phases`` over every window of the flat piece ``x``."""
    ch = ws.channels
    count = size - HISTORY
    columns = [x[(HISTORY - k) * ch:(size - k) * ch] for k in range(TAPS)]
    values = np.abs(_phase_values(columns, phases, ws.scratch), out=ws.scratch[0][:len(phases) * count * ch]
                    .reshape(len(phases), count * ch))
    top = values[0] if len(phases) == 1 else np.max(values, axis=0, out=ws.scratch[1][:count * ch])
    return _per_channel_max(top.reshape(count, ch))


def _sample_peaks(extended, magnitude, rounded, sample_peak):
    """Raise ``sample_peak`` (per channel, in place) to the piece's exact largest |sample|.

    ``rounded`` is the per-channel maximum of ``magnitude``, the samples'
    |value| rounded to float32.  Rounding is monotonic, so a channel needs a
    look at the exact values only if its rounded maximum could hide a sample
    above its sample peak so far (which, after the first pieces, is rare), and
    then only at the samples whose rounded value is that maximum.  NaN and
    infinity propagate into ``rounded``.
    """
    if not np.isfinite(rounded).all() and not np.isfinite(extended[HISTORY:]).all():
        # (Finite samples beyond the float32 range round to infinity; they pass.)
        raise ParameterError("block contains NaN or infinite samples: expected finite values")
    known = sample_peak.astype(np.float32)
    for c in np.flatnonzero(rounded >= known):
        top = rounded[c]
        if top == known[c] and sample_peak[c] >= _round_up_limit(top):
            continue  # every value that rounds to ``top`` is <= the sample peak
        column = extended[:, c]
        if top == 0.0:
            exact = max(float(column.max()), -float(column.min()))
        else:
            exact = float(np.abs(column[np.flatnonzero(magnitude[:, c] == top)]).max())
        sample_peak[c] = max(sample_peak[c], exact)


def _round_up_limit(value):
    """Half-way from the float32 ``value`` to the next float32: no larger float64 rounds to ``value``."""
    above = np.nextafter(value, np.float32(np.inf))
    return (float(value) + float(above)) / 2.0  # exact: both have 24 significant bits


def _scan_piece(extended, magnitude, phases, peak, sample_peak, ws):
    """Meter one piece in place: ``extended`` holds 11 frames of history, then the new frames.

    ``extended`` and ``magnitude`` (its absolute value) are C-contiguous
    (size, channels) arrays.  Every sliding operation runs on their flat,
    interleaved data with shifts of whole frames, so it is one contiguous pass
    over all channels.  For each window end ``n`` (frames 11 .. size - 1) the
    bound of the module notes is computed, and only windows whose bound exceeds
    their channel's running maximum are interpolated: gathered, when they are
    few; else on slices of the whole piece, group of phases by group of phases.
    ``peak`` and ``sample_peak`` (per channel) are updated in place.
    """
    size, ch = extended.shape
    count = size - HISTORY  # windows per channel, ending at frames 11 .. size - 1
    x = extended.reshape(-1)
    a = magnitude.reshape(-1)
    # Pairwise maximum of frames i and i + 1, so max(a[n - 6], a[n - 5]) is pair_max[n - 6].
    pair_max = np.maximum(a[:-ch], a[ch:], out=ws.pair_max[:(size - 1) * ch])
    # Sliding maxima of four and five frames: max5[i] = max(a[i .. i + 4]).
    max4 = np.maximum(pair_max[:-2 * ch], pair_max[2 * ch:], out=ws.max4[:(size - 3) * ch])
    _sample_peaks(extended, magnitude, _per_channel_max(max4.reshape(size - 3, ch)), sample_peak)
    np.maximum(peak, sample_peak, out=peak)
    max5 = np.maximum(max4[:-ch], a[4 * ch:], out=ws.max5[:(size - 4) * ch])
    terms = (
        # The ten taps other than k = 5, 6 read frames n - 4 .. n and n - 11 .. n - 7.
        np.maximum(max5[7 * ch:(size - 4) * ch], max5[:count * ch], out=ws.others[:count * ch]),
        pair_max[5 * ch:(size - 6) * ch],  # max(a[n - 6], a[n - 5])
        np.add(a[6 * ch:(size - 5) * ch], a[5 * ch:(size - 6) * ch], out=ws.pair_sum[:count * ch]),
    )
    dense = _DENSE * count * ch
    hits = _candidates(terms, _BOUNDS[phases], peak, ws)
    if hits.size <= dense:
        if hits.size:
            np.maximum(peak, _sparse_peaks(x, hits, phases, ws), out=peak)
        return
    for group, coefficients in _GROUPS[phases]:
        hits = _candidates(terms, coefficients, peak, ws)
        if hits.size > dense:
            np.maximum(peak, _dense_peaks(x, size, group, ws), out=peak)
        elif hits.size:
            np.maximum(peak, _sparse_peaks(x, hits, group, ws), out=peak)


def _scan(x, history, peak, sample_peak, phases):
    """Scan a (frames, channels) block; ``peak`` and ``sample_peak`` are updated in place.

    Returns the last 11 frames, the next block's history.
    """
    frames, channels = x.shape
    step = max(_WIDE, _CHUNK_SAMPLES // channels)
    ws = _Workspace(min(step, frames), channels)
    direct = x.flags.c_contiguous
    # Finite samples beyond the float32 range become infinite magnitudes (and
    # so candidates everywhere): correct, and not worth a warning.
    with np.errstate(over="ignore"):
        for start in range(0, frames, step):
            stop = min(start + step, frames)
            size = HISTORY + stop - start
            if direct and start >= HISTORY:
                extended = x[start - HISTORY:stop]  # the history is the previous piece's end: no copy
            else:
                extended = ws.rows("extended", size)
                extended[:HISTORY] = history
                extended[HISTORY:] = x[start:stop]
            magnitude = np.abs(extended, out=ws.rows("magnitude", size), dtype=np.float32)
            _scan_piece(extended, magnitude, phases, peak, sample_peak, ws)
            history = extended[-HISTORY:].copy()
    return history


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
    history = _scan(x, state.history, peak, sample_peak, phases)
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
