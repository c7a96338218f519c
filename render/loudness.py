"""Streaming programme-loudness meter after ITU-R BS.1770-4/-5 and EBU Tech 3342.

One pass over any number of blocks gives integrated loudness (LUFS), the
maximum momentary (0.4 s) and short-term (3 s) loudness, and the loudness
range (LU).  The meter state is explicit: :func:`meter_init` makes it,
:func:`meter_update` takes a block and a state and returns the new state,
:func:`meter_result` reads it.  A meter has no audio output, so the update
returns the state alone.

Method (ITU-R BS.1770-4 Annex 1):

* K-weighting, two biquads per channel (a high shelf, then the RLB high-pass).
  At 48 kHz the published coefficients are used verbatim; at other rates both
  stages are re-derived from the same analog prototype (see
  :func:`k_weighting_sos`).
* Per-channel mean square ``z_i`` over 400 ms blocks with 75 % overlap
  (a 100 ms hop); only complete blocks count.
* Block loudness ``L = -0.691 + 10 log10(sum_i G_i z_i)``.
* Gating: blocks strictly above -70 LUFS (absolute), then strictly above the
  mean of those minus 10 LU (relative).

Memory: the state keeps one float per complete 100 ms hop (the channel-weighted
sum of K-weighted squares over that hop) -- 36 000 floats per hour of audio,
in a buffer that grows by doubling -- and nothing else that grows with length.  Momentary blocks (4 hops), short-term
windows (30 hops) and both gates are computed from that series when the result
is read, so the gating is exact rather than histogram-quantised.

The hop is ``round(rate_hz / 10)`` frames and a block is exactly four hops, so
blocks are exactly 400 ms at every rate that is a multiple of 10 Hz (all the
usual ones); at other rates they are within half a sample per hop of it.

>>> import numpy as np
>>> t = np.arange(2 * 48000) / 48000
>>> x = np.zeros((t.size, 2))
>>> x[:, 0] = np.sin(2 * np.pi * 997 * t)        # 0 dBFS in one channel
>>> round(measure(x, rate_hz=48000).integrated_lufs, 2)
-3.01
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Optional, Tuple

import numpy as np
from scipy import signal as _signal

from .errors import ParameterError
from .units import db_to_gain, power_to_db

__all__ = [
    "LoudnessResult",
    "MeterState",
    "default_weights",
    "k_weighting_sos",
    "meter_init",
    "meter_update",
    "meter_result",
    "measure",
    "ABSOLUTE_GATE_LUFS",
    "RELATIVE_GATE_LU",
    "LRA_RELATIVE_GATE_LU",
]

#: Offset in the block-loudness formula (ITU-R BS.1770-4 Annex 1).
LOUDNESS_OFFSET_DB = -0.691
#: Absolute gate, LUFS (ITU-R BS.1770-4; EBU Tech 3342 uses the same level).
ABSOLUTE_GATE_LUFS = -70.0
#: Relative gate for integrated loudness, LU (ITU-R BS.1770-4).
RELATIVE_GATE_LU = -10.0
#: Relative gate for loudness range, LU (EBU Tech 3342).
LRA_RELATIVE_GATE_LU = -20.0
#: Percentiles whose difference is the loudness range (EBU Tech 3342).
LRA_PERCENTILES = (10.0, 95.0)

#: Hops per momentary block (400 ms) and per short-term window (3 s).
HOPS_PER_BLOCK = 4
HOPS_PER_SHORT_TERM = 30

#: Lowest rate accepted: the shelf (1682 Hz) must lie well below Nyquist.
MIN_RATE_HZ = 8000.0

# ITU-R BS.1770-4 Annex 1, Tables 1 and 2: K-weighting at 48 kHz.
_SOS_48K = np.array(
    [
        [1.53512485958697, -2.69169618940638, 1.19839281085285, 1.0, -1.69065929318241, 0.73248077421585],
        [1.0, -2.0, 1.0, 1.0, -1.99004745483398, 0.99007225036621],
    ]
)

# Analog prototype of the same two stages (ITU-R BS.1770-4, via a faithful
# secondary text; see /work/shared/REFERENCES.md).
_SHELF_FC_HZ = 1681.974450955533
_SHELF_Q = 0.7071752369554196
_SHELF_GAIN_DB = 3.999843853973347
# Exponent relating the shelf's band-edge gain to its high-frequency gain,
# Vb = Vh ** 0.4996667741545416.  Read (as 0.499666774155) in pyloudnorm 0.2.0's
# "DeMan" filter, which re-derives the BS.1770 stages; with 0.5 instead the
# 48 kHz shelf misses the published b coefficients by 2.6e-5.
_SHELF_VB_EXPONENT = 0.4996667741545416
_HIGHPASS_FC_HZ = 38.13547087602444
_HIGHPASS_Q = 0.5003270373238773

_SHORT_REASON = "not measurable: shorter than 0.4 s"
_SILENT_REASON = "not measurable: silence (no block above -70 LUFS)"
_SHORT_TERM_SHORT_REASON = "short-term loudness and loudness range not measurable: shorter than 3 s"
_LRA_SILENT_REASON = "loudness range not measurable: silence (no short-term value at or above -70 LUFS)"


# --------------------------------------------------------------------------- weights and filters


def default_weights(channels):
    """Channel weights ``G_i`` for a channel count, in the usual channel order.

    Parameters
    ----------
    channels : int
        Number of channels, >= 1.

    Returns
    -------
    tuple of float
        * 1 -> ``(1.0,)``; 2 -> ``(1.0, 1.0)`` (L, R);
        * 5 -> ``(1.0, 1.0, 1.0, 1.41, 1.41)`` (L, R, C, Ls, Rs);
        * 6 -> ``(1.0, 1.0, 1.0, 0.0, 1.41, 1.41)`` (L, R, C, LFE, Ls, Rs; the
          SMPTE/ITU order, common practice), the LFE excluded;
        * any other count -> 1.0 for every channel.  The weights 1.41 for the
          surrounds and 0 for LFE are *not* applied then; pass
          ``channel_weights`` explicitly for such layouts.

    The values 1.0, 1.41 and LFE excluded are those of ITU-R BS.1770-4.

    >>> default_weights(6)
    (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)
    """
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ParameterError(f"channels = {channels!r}: must be an integer >= 1")
    if channels == 5:
        return (1.0, 1.0, 1.0, 1.41, 1.41)
    if channels == 6:
        return (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)
    return (1.0,) * int(channels)


def _check_rate(rate_hz):
    if isinstance(rate_hz, bool) or not isinstance(rate_hz, (int, float, np.integer, np.floating)):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a number > 0 Hz")
    rate = float(rate_hz)
    if not math.isfinite(rate) or rate <= 0.0:
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be > 0 Hz")
    if rate < MIN_RATE_HZ:
        raise ParameterError(f"rate_hz = {rate_hz!r}: K-weighting needs a rate >= {MIN_RATE_HZ:g} Hz")
    return rate


def k_weighting_sos(*, rate_hz):
    """K-weighting as second-order sections for :func:`scipy.signal.sosfilt`.

    Parameters
    ----------
    rate_hz : float
        Sample rate in Hz, >= 8000.

    Returns
    -------
    ndarray, shape (2, 6)
        Rows ``[b0, b1, b2, 1, a1, a2]``: the high shelf, then the RLB high-pass.
        At exactly 48 kHz these are the coefficients printed in ITU-R BS.1770-4;
        elsewhere they come from the bilinear transform (pre-warped at each
        stage's centre frequency) of the analog prototype (shelf 1681.97 Hz,
        Q 0.70718, +4.0 dB; high-pass 38.135 Hz, Q 0.50033).  As in the standard,
        the high-pass numerator is exactly ``1, -2, 1`` (pass-band gain 1.005).

    >>> k_weighting_sos(rate_hz=48000)[1, :3]
    array([ 1., -2.,  1.])
    """
    rate = _check_rate(rate_hz)
    if rate == 48000.0:
        return _SOS_48K.copy()
    return _derived_sos(rate)


def _derived_sos(rate):
    """Both stages from the analog prototype at ``rate`` (used at every rate but 48 kHz)."""
    k = math.tan(math.pi * _SHELF_FC_HZ / rate)
    vh = db_to_gain(_SHELF_GAIN_DB)
    vb = vh**_SHELF_VB_EXPONENT
    kq = k / _SHELF_Q
    a0 = 1.0 + kq + k * k
    shelf = [(vh + vb * kq + k * k) / a0, 2.0 * (k * k - vh) / a0, (vh - vb * kq + k * k) / a0,
             1.0, 2.0 * (k * k - 1.0) / a0, (1.0 - kq + k * k) / a0]
    k = math.tan(math.pi * _HIGHPASS_FC_HZ / rate)
    kq = k / _HIGHPASS_Q
    a0 = 1.0 + kq + k * k
    highpass = [1.0, -2.0, 1.0, 1.0, 2.0 * (k * k - 1.0) / a0, (1.0 - kq + k * k) / a0]
    return np.array([shelf, highpass])


# --------------------------------------------------------------------------- growable series


class _HopSeries:
    """Append-only float buffer shared between successive states.

    A state owns the first ``length`` values.  Appending writes past the end in
    place when the state is the newest one (amortised O(1)); appending from an
    older state copies first, so earlier states are never changed.
    """

    __slots__ = ("buf", "used")

    def __init__(self, capacity=64):
        self.buf = np.empty(capacity)
        self.used = 0

    def extend(self, length, values):
        """Return ``(series, new_length)`` with ``values`` after the first ``length`` values."""
        k = values.size
        if k == 0:
            return self, length
        series = self
        if self.used != length or length + k > self.buf.size:
            series = _HopSeries(max(64, 2 * (length + k)))
            series.buf[:length] = self.buf[:length]
            series.used = length
        series.buf[length:length + k] = values
        series.used = length + k
        return series, length + k


# --------------------------------------------------------------------------- state and result


@dataclass(frozen=True, eq=False)
class MeterState:
    """Everything the meter remembers between blocks (treat as opaque and immutable).

    Attributes
    ----------
    rate_hz : float
        Sample rate, Hz.
    channels : int
        Channels per block.
    channel_weights : tuple of float
        ``G_i`` per channel; channels weighted 0 are not filtered at all.
    hop_frames : int
        Frames per 100 ms hop, ``round(rate_hz / 10)``.
    frames : int
        Frames seen so far.
    """

    rate_hz: float
    channels: int
    channel_weights: Tuple[float, ...]
    hop_frames: int
    frames: int
    _sos: np.ndarray
    _active: Tuple[int, ...]
    _active_weights: np.ndarray
    _zi: np.ndarray
    _partial_energy: np.ndarray
    _partial_frames: int
    _hops: _HopSeries
    _hop_count: int

    def hop_energies(self):
        """Channel-weighted sums of K-weighted squares, one per complete 100 ms hop (a copy)."""
        return self._hops.buf[: self._hop_count].copy()


@dataclass(frozen=True)
class LoudnessResult:
    """Loudness figures of everything metered so far.

    Attributes
    ----------
    integrated_lufs : float or None
        Gated integrated loudness (ITU-R BS.1770-4), LUFS; None if not measurable.
    momentary_max_lufs : float or None
        Highest 400 ms block loudness (ungated), LUFS; None if shorter than
        0.4 s or digitally silent.
    short_term_max_lufs : float or None
        Highest 3 s loudness (ungated, 100 ms hop), LUFS; None if shorter than
        3 s or digitally silent.
    loudness_range_lu : float or None
        Loudness range (EBU Tech 3342), LU; None if shorter than 3 s or no
        short-term value reaches -70 LUFS.
    reason : str or None
        Why any of the above is None (messages joined by "; "), else None.

    No field is ever NaN or infinite.
    """

    integrated_lufs: Optional[float]
    momentary_max_lufs: Optional[float]
    short_term_max_lufs: Optional[float]
    loudness_range_lu: Optional[float]
    reason: Optional[str]


def _check_weights(channel_weights, channels):
    if not isinstance(channel_weights, (tuple, list)):
        raise ParameterError(f"channel_weights = {channel_weights!r}: must be a tuple of {channels} numbers")
    if len(channel_weights) != channels:
        raise ParameterError(
            f"channel_weights has {len(channel_weights)} values: expected {channels}, one per channel"
        )
    out = []
    for i, w in enumerate(channel_weights):
        if isinstance(w, bool) or not isinstance(w, (int, float, np.integer, np.floating)) or not (
            math.isfinite(float(w)) and float(w) >= 0.0
        ):
            raise ParameterError(f"channel_weights[{i}] = {w!r}: must be a finite number >= 0")
        out.append(float(w))
    if not any(w > 0.0 for w in out):
        raise ParameterError(f"channel_weights = {tuple(out)!r}: at least one weight must be > 0")
    return tuple(out)


def meter_init(*, rate_hz, channels, channel_weights=None):
    """Make the state of a meter that has seen nothing yet.

    Parameters
    ----------
    rate_hz : float
        Sample rate in Hz, >= 8000.
    channels : int
        Channels per block, >= 1.
    channel_weights : tuple of float, optional
        ``G_i`` per channel, each >= 0 (0 excludes a channel, e.g. LFE).
        Default :func:`default_weights` of ``channels``.

    Returns
    -------
    MeterState
    """
    rate = _check_rate(rate_hz)
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ParameterError(f"channels = {channels!r}: must be an integer >= 1")
    channels = int(channels)
    weights = default_weights(channels) if channel_weights is None else _check_weights(channel_weights, channels)
    active = tuple(i for i, w in enumerate(weights) if w > 0.0)
    sos = k_weighting_sos(rate_hz=rate)
    return MeterState(
        rate_hz=rate,
        channels=channels,
        channel_weights=weights,
        hop_frames=int(round(rate / 10.0)),
        frames=0,
        _sos=sos,
        _active=active,
        _active_weights=np.array([weights[i] for i in active]),
        _zi=np.zeros((sos.shape[0], 2, len(active))),
        _partial_energy=np.zeros(len(active)),
        _partial_frames=0,
        _hops=_HopSeries(),
        _hop_count=0,
    )


def _check_block(block, channels, name="block", finite=True):
    """Validate a (frames, channels) float block; ``channels=None`` accepts any count."""
    if not isinstance(block, np.ndarray):
        raise ParameterError(f"{name} is a {type(block).__name__}: expected a numpy array of shape (frames, channels)")
    if block.ndim != 2:
        raise ParameterError(
            f"{name}.ndim = {block.ndim}: expected a 2-D (frames, channels) array; mono is (n, 1)"
        )
    if channels is not None and block.shape[1] != channels:
        raise ParameterError(f"{name} has {block.shape[1]} channels: expected {channels}")
    if not np.issubdtype(block.dtype, np.floating):
        raise ParameterError(f"{name}.dtype = {block.dtype}: expected floating-point samples (full scale 1.0)")
    if finite and block.size and not np.isfinite(block).all():
        raise _non_finite(name)
    return np.asarray(block, dtype=np.float64)


def _non_finite(name):
    return ParameterError(f"{name} contains NaN or infinite samples: expected finite values")


#: Frames K-weighted per call of :func:`scipy.signal.sosfilt` (rounded down to
#: whole hops): its working copy then stays in cache for the sums of squares,
#: which costs less than the extra calls.
_CHUNK_FRAMES = 1 << 16


def meter_update(block, state):
    """Meter one block and return the new state (the old state stays valid).

    Parameters
    ----------
    block : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0, any number of frames >= 0.
    state : MeterState
        From :func:`meter_init` or a previous :func:`meter_update`.

    Returns
    -------
    MeterState
        Metering block after block gives the same result as metering the
        concatenation at once (to rounding, ~1e-15 LU).

    Notes
    -----
    A block is K-weighted in pieces of about 65 536 frames (whole hops, after
    the rest of a hop left open by the previous block), the filter state
    carried from piece to piece, so that :func:`scipy.signal.sosfilt`'s
    working copy and the sums of squares stay in cache.  There is no separate
    pass for finiteness: a NaN or infinite sample makes its hop's sum of
    squares non-finite (both stages pass the current sample with a non-zero
    coefficient), and only then are the samples themselves checked.  Channels
    weighted 0 are not filtered and are checked directly.
    """
    return _update(block, state, "block")


def _hop_squares(y):
    """Per-channel sums of squares of a (channels, hops, hop) view: shape (channels, hops)."""
    return np.einsum("chn,chn->ch", y, y)


def _update(block, state, name):
    if not isinstance(state, MeterState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a MeterState from meter_init")
    # Finiteness is checked on the sums of squares (see meter_update's notes).
    x = _check_block(block, state.channels, name=name, finite=False)
    n = x.shape[0]
    if n == 0:
        return state
    active = state._active
    subset = len(active) != state.channels
    if subset:
        inactive = [c for c in range(state.channels) if c not in active]
        if not np.isfinite(x[:, inactive]).all():
            raise _non_finite(name)
    hop = state.hop_frames
    weights = state._active_weights
    unit = bool(np.all(weights == 1.0))
    zi = state._zi
    hops = []
    partial = state._partial_energy  # per active channel, sum over the open hop
    partial_frames = state._partial_frames
    # Pieces: first the rest of the open hop, then whole hops, a partial hop last.
    step = max(1, _CHUNK_FRAMES // hop) * hop
    edges = [0]
    if partial_frames:
        edges.append(min(hop - partial_frames, n))
    edges.extend(range(edges[-1] + step, n, step))
    if edges[-1] != n:
        edges.append(n)
    for start, stop in zip(edges[:-1], edges[1:]):
        piece = x[start:stop]
        if subset:
            piece = piece[:, active]
        y, zi = _signal.sosfilt(state._sos, piece, axis=0, zi=zi)
        y = y.T  # sosfilt's output is (channels, frames) in memory: C-contiguous rows
        m = stop - start
        whole = 0 if partial_frames else m // hop
        if whole:
            sums = _hop_squares(y[:, :whole * hop].reshape(y.shape[0], whole, hop))
            hops.append(sums.sum(axis=0) if unit else (weights[:, None] * sums).sum(axis=0))
        rest = y[:, whole * hop:]
        if rest.shape[1]:
            partial = partial + np.einsum("cn,cn->c", rest, rest)
            partial_frames += rest.shape[1]
            if partial_frames == hop:
                hops.append(np.array([np.sum(partial * weights)]))
                partial, partial_frames = np.zeros_like(partial), 0
    new = np.concatenate(hops) if hops else np.empty(0)
    if not (np.isfinite(new).all() and np.isfinite(partial).all()) and not np.isfinite(x).all():
        # (Finite samples so large that their squares overflow pass, as before.)
        raise _non_finite(name)
    series, count = state._hops.extend(state._hop_count, new)
    return MeterState(
        rate_hz=state.rate_hz,
        channels=state.channels,
        channel_weights=state.channel_weights,
        hop_frames=hop,
        frames=state.frames + n,
        _sos=state._sos,
        _active=state._active,
        _active_weights=state._active_weights,
        _zi=zi,
        _partial_energy=partial,
        _partial_frames=partial_frames,
        _hops=series,
        _hop_count=count,
    )


def _window_means(hops, width, hop_frames):
    """Mean square over every run of ``width`` consecutive hops (same summation order each time)."""
    windows = np.lib.stride_tricks.sliding_window_view(hops, width)
    return windows.sum(axis=1) / (width * hop_frames)


def _lufs(mean_square):
    return LOUDNESS_OFFSET_DB + power_to_db(mean_square)


def _tech3342_percentile(sorted_values, percent):
    # EBU Tech 3342 (MATLAB listing): sorted(round((n-1)*p/100 + 1)), 1-based,
    # MATLAB's round (halves away from zero).
    n = sorted_values.size
    index = int(math.floor((n - 1) * percent / 100.0 + 1.0 + 0.5)) - 1
    return float(sorted_values[index])


def _loudness_range(short_term_ms):
    # EBU Tech 3342, section 5: both gates keep values at or above the threshold.
    levels = _lufs(short_term_ms)
    keep = levels >= ABSOLUTE_GATE_LUFS
    if not keep.any():
        return None
    gated_ms = short_term_ms[keep]
    relative = _lufs(float(np.mean(gated_ms))) + LRA_RELATIVE_GATE_LU
    final = np.sort(levels[keep][levels[keep] >= relative])
    low, high = (_tech3342_percentile(final, p) for p in LRA_PERCENTILES)
    return high - low


def meter_result(state):
    """Loudness figures of everything metered into ``state``.

    Parameters
    ----------
    state : MeterState

    Returns
    -------
    LoudnessResult
        Integrated loudness gated as in ITU-R BS.1770-4 (both gates strictly
        greater than); loudness range per EBU Tech 3342 (short-term values at
        10 Hz, gates at or above -70 LUFS and -20 LU as in its listing, 10th
        and 95th percentiles by its rounding rule).  No trailing silence is
        appended: Tech 3342 suggests 1.5 s of it for file-based measurement, so
        append it yourself if you want that reading.  Only complete hops count;
        a partial final hop (< 100 ms) is ignored.
    """
    if not isinstance(state, MeterState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a MeterState from meter_init")
    hops = state._hops.buf[: state._hop_count]
    reasons = []
    integrated = momentary = short_max = lra = None

    if hops.size < HOPS_PER_BLOCK:
        reasons.append(_SHORT_REASON)
    else:
        blocks = _window_means(hops, HOPS_PER_BLOCK, state.hop_frames)
        levels = _lufs(blocks)
        if blocks.max() > 0.0:
            momentary = float(levels.max())
        above = levels > ABSOLUTE_GATE_LUFS
        if not above.any():
            reasons.append(_SILENT_REASON)
        else:
            relative = _lufs(float(np.mean(blocks[above]))) + RELATIVE_GATE_LU
            gated = above & (levels > relative)
            integrated = float(_lufs(float(np.mean(blocks[gated]))))

    if hops.size < HOPS_PER_SHORT_TERM:
        if hops.size >= HOPS_PER_BLOCK:
            reasons.append(_SHORT_TERM_SHORT_REASON)
    else:
        short = _window_means(hops, HOPS_PER_SHORT_TERM, state.hop_frames)
        if short.max() > 0.0:
            short_max = float(_lufs(float(short.max())))
        lra = _loudness_range(short)
        if lra is None:
            reasons.append(_LRA_SILENT_REASON)
    return LoudnessResult(
        integrated_lufs=integrated,
        momentary_max_lufs=momentary,
        short_term_max_lufs=short_max,
        loudness_range_lu=lra,
        reason="; ".join(reasons) if reasons else None,
    )


def measure(signal, *, rate_hz, channel_weights=None):
    """Loudness of a whole signal in one pass.

    Parameters
    ----------
    signal : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0.
    rate_hz : float
        Sample rate in Hz, >= 8000.
    channel_weights : tuple of float, optional
        As in :func:`meter_init`.

    Returns
    -------
    LoudnessResult

    >>> import numpy as np
    >>> measure(np.zeros((48000, 1)), rate_hz=48000).reason
    'not measurable: silence (no block above -70 LUFS); short-term loudness and loudness range not measurable: shorter than 3 s'
    """
    _check_block(signal, None, name="signal", finite=False)
    state = meter_init(rate_hz=rate_hz, channels=signal.shape[1], channel_weights=channel_weights)
    return meter_result(_update(signal, state, "signal"))


def integrated_over(hop_series, *, hop_frames):
    """Integrated loudness of several signals taken as one programme (e.g. a season's episodes).

    Each signal's gating blocks are formed within that signal (no block spans
    two files); the gates then run over all blocks together, as BS.1770 gates
    one programme.

    Parameters
    ----------
    hop_series : sequence of 1-D arrays
        Per-100 ms weighted energies of each signal (what a meter state holds).
    hop_frames : int
        Frames per hop (the same for every signal).

    Returns
    -------
    float or None
        LUFS, or None when no block is above the absolute gate.
    """
    blocks = [
        _window_means(np.asarray(h, dtype=float), HOPS_PER_BLOCK, hop_frames)
        for h in hop_series
        if len(h) >= HOPS_PER_BLOCK
    ]
    if not blocks:
        return None
    blocks = np.concatenate(blocks)
    levels = _lufs(blocks)
    above = levels > ABSOLUTE_GATE_LUFS
    if not above.any():
        return None
    relative = _lufs(float(np.mean(blocks[above]))) + RELATIVE_GATE_LU
    gated = above & (levels > relative)
    return float(_lufs(float(np.mean(blocks[gated]))))
