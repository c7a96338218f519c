"""True-peak-aware look-ahead limiter: a gain curve that keeps a mix under a ceiling in dBTP.

Offline use: after a normalisation gain, the limiter turns the *mix* into a
gain curve, shape ``(frames,)``, one value per frame shared by all channels;
the renderer multiplies the mix and every stem by the same curve, so the
stems still sum to the mix.

Design, per frame n (all channels linked):

1. **Peak envelope** ``p[n]``: the largest of ``|x[n]|`` and of the
   BS.1770 Annex 2 interpolated values (4x, 2x from 96 kHz up; the table and
   phase choice of :mod:`render.truepeak`) in the two sample intervals next to
   n, ``(n-1, n)`` and ``(n, n+1)``, over all channels (:func:`peak_envelope`).
   Before the first and after the last frame the signal is taken as zero, as
   in :mod:`render.truepeak`.  The pipeline runs over ``K + 6`` zero frames
   before frame 0 and 6 after the last one (their gains are dropped): so the
   gain can come down *before* a loud first frame, and the intervals where
   the meter reads the interpolator's ringing outside the signal (down to 6
   frames before the first and after the last sample) are held too.
2. **Required gain** ``g_req[n] = min(1, t / p[n])`` with the internal target
   ``t`` = ceiling - :data:`SAFETY_MARGIN_DB`.  Every interval is next to two
   frames, so both ends of it are held to its own peak.
3. **Look-ahead minimum** ``m[n] = min g_req[n - H .. n + K + H]``: K
   frames of look-ahead (``lookahead_ms``) plus a hold of H =
   :data:`HOLD_FRAMES` frames on each side.
4. **Release** ``r[n] = min(m[n], 1 - (1 - r[n-1]) a)`` with
   ``a = exp(-1 / (release_s rate_hz))``: the gain returns toward 1 with
   time constant ``release_ms``.  It is computed without a per-sample loop:
   ``1 - r[n] = max_j (1 - m[j]) a^(n-j)``, a running maximum of
   ``log(1 - m[j]) + j / (release_s rate_hz)`` indexed by the absolute frame
   number, so any block split gives the same arithmetic.
5. **Attack** ``s[n] = sum_k w[k] r[n - k]`` for k = 0 .. K, raised-cosine
   weights ``w[k]`` proportional to ``sin^2(pi (k + 1) / (K + 2))``, all > 0,
   summing to 1.  The output gain is ``g[n] = min(s[n], g_req[n])``.

**No overshoot, by construction.**  For every k in 0 .. K, the window of
``m[n - k]`` (frames ``n - k - H .. n - k + K + H``) contains n, so
``r[n - k] <= m[n - k] <= g_req[n]``; ``s[n]`` is an average of those with
non-negative weights, so ``s[n] <= g_req[n]``.  The final ``min`` only
removes rounding.  The same argument with the hold shows that every frame
within H of n has a gain ``<= g_req[n]``: around each limited peak the gain
is flat across the interpolator's 12 taps (H = 6), so the interpolated value
of the gained signal there is the gain times the interpolated input.  Where
the gain still varies inside a 12-tap window the interpolated value can
differ slightly from that product; :data:`SAFETY_MARGIN_DB` covers it (the
tests measure it).

**Continuity.**  ``r`` moves by at most ``1 - min(r)`` per frame while
attacking and much less while releasing; the raised-cosine average turns a
jump of ``d`` in ``r`` into steps of at most ``d * max(w) = 2 d / (K + 2)``
per frame.

**Latency.**  The gain of frame n needs the input up to frame
``n + K + H + 6`` (the interpolator's 6 frames to the right):
:attr:`LimiterState.latency_frames`.  :func:`limiter_update` returns the
gains that are final, :func:`limiter_flush` the rest, so the gains add up to
exactly one per input frame, and any block split gives bit-identical gains.

**Speed.**  Limited frames are usually few, so each stage works only where
it can change something, and gives there the values of the full computation:

* envelope: a window can only read above ``t`` if one of its samples is above
  ``t`` / (L1 norm of the taps) (the bound of :mod:`render.truepeak`); the
  windows that hold such a sample come in runs, which are copied into one
  short block and interpolated there, with the taps summed in the order of
  :func:`render.truepeak.brute_force_true_peak`;
* look-ahead minimum: taken only near frames with ``g_req < 1`` (a minimum
  is exact);
* release: the running maximum only changes at frames with ``m < 1``;
* attack: in a *pure release* (for all j in ``n - K .. n``, ``r[j]`` on the
  release curve ``1 - d[j]``, ``d[j] = d[n] a^(j - n)``, under one running
  maximum) the sum is ``1 - s[n] = d[n] sum_k w[k] a^-k``; it is summed term
  by term, k = 0 .. K, only within K frames after a frame where ``m`` falls
  below the release curve or the running maximum rises.  The two agree to
  rounding: ``d`` comes from ``exp`` of an argument indexed by the absolute
  frame number, which carries a relative rounding of about
  ``2e-16 n / (release_s rate_hz)`` in either form (the gains of a term-by-term
  sum and of this one were seen to differ by up to 6e-14 after a minute at
  50 ms).

Each choice depends on the signal alone, never on the block split, so the
gains stay bit-identical for any split.

The limiter reads with the same 4x (2x) interpolator as the BS.1770 meter, so
the output's BS.1770 true peak stays at or under the ceiling; the reading can
miss up to 0.688 dB of a band-limited peak for content near Nyquist at 4x
(ITU-R BS.1770 Annex 2), and the limiter shares that blind spot.

>>> import numpy as np
>>> n = np.arange(4800)
>>> x = np.sin(2 * np.pi * 997 * n / 48000)[:, None]  # full scale
>>> y, gain, reduction_db = limit(x, rate_hz=48000, ceiling_dbtp=-6.0)
>>> round(reduction_db, 2), bool(gain.max() <= 1.0)  # 6 dB + margin + 0.01 dB interpolator gain
(6.06, True)
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import minimum_filter1d

from .errors import ParameterError
from .truepeak import INTERPOLATOR, oversampling_factor
from .units import db_to_gain, gain_to_db

__all__ = [
    "LimiterState",
    "LimiterResult",
    "HOLD_FRAMES",
    "SAFETY_MARGIN_DB",
    "MIN_LOOKAHEAD_MS",
    "peak_envelope",
    "limiter_init",
    "limiter_update",
    "limiter_flush",
    "limiter_result",
    "limit",
]

_TAPS = INTERPOLATOR.shape[1]
#: Frames of input to the right of frame n that the interval (n, n+1) reads: taps 12, windows
#: ending 6 frames after the interval's left end.
_RIGHT = _TAPS // 2
#: Frames of input to the left of frame n that the interval (n-1, n) reads.
_LEFT = _TAPS // 2
#: Hold on both sides of each limited frame, frames: half the interpolator's length, so the
#: gain is flat over the taps that read a limited peak.
HOLD_FRAMES = _TAPS // 2
#: Internal target below the ceiling, dB: covers the interpolated value of a gain that still
#: varies within 12 taps (our choice; the tests measure the margin actually used).
SAFETY_MARGIN_DB = 0.05
#: Shortest look-ahead, ms, and in frames.  The gain's slope grows as the attack shortens, and
#: with it the interpolated overshoot the margin must cover: in randomised trials (noise, sparse
#: spikes, clipped sines; 44.1 to 96 kHz) the BS.1770 reading of the output passed the internal
#: target by at most 0.0011 dB for look-aheads of 0.5 to 1 ms, 0.011 dB for 0.25 to 0.5 ms, but
#: 0.088 dB for 0.03 to 0.3 ms (1 to 13 frames), more than the margin.
MIN_LOOKAHEAD_MS = 0.5
MIN_ATTACK_FRAMES = 16
#: Relative slack on the skip bound, as in render.truepeak: rounding in a 12-term sum cannot
#: lift a skipped window above the floor.
_BOUND_SLACK = 1.0 + 1e-12
#: Frames per internal piece: results do not depend on it (each frame's arithmetic depends on
#: the signal and its absolute frame number only), it only bounds the size of temporaries.
_PIECE = 1 << 16


def _phases_for(rate_hz):
    factor = oversampling_factor(rate_hz=rate_hz)  # validates rate_hz (ParameterError)
    return tuple(range(0, 4, 4 // factor))


def _check_block(block, channels, name):
    if not isinstance(block, np.ndarray):
        raise ParameterError(f"{name} is a {type(block).__name__}: expected a numpy array of shape (frames, channels)")
    if block.ndim != 2:
        raise ParameterError(f"{name}.ndim = {block.ndim}: expected a 2-D (frames, channels) array; mono is (n, 1)")
    if channels is not None and block.shape[1] != channels:
        raise ParameterError(f"{name} has {block.shape[1]} channels: expected {channels}")
    if block.shape[1] < 1:
        raise ParameterError(f"{name} has 0 channels: expected at least 1")
    if not np.issubdtype(block.dtype, np.floating):
        raise ParameterError(f"{name}.dtype = {block.dtype}: expected floating-point samples (full scale 1.0)")
    # A finite sum proves every sample finite (a NaN or an infinity would make it NaN or infinite);
    # only a sum that overflows needs the sample-by-sample check.
    if block.size and not math.isfinite(float(np.sum(block))) and not np.isfinite(block).all():
        raise ParameterError(f"{name} contains NaN or infinite samples: expected finite values")
    return np.asarray(block, dtype=np.float64)


def _runs(positions, before, after, length):
    """Merged ranges ``[start, end)`` covering ``p - before .. p + after`` for each p, within ``[0, length)``.

    ``positions`` is sorted and inside ``[0, length + before)``, so no range is empty.
    """
    starts = np.maximum(positions - before, 0)
    ends = np.minimum(positions + (after + 1), length)  # sorted as well
    return _runs_merge(starts, ends) if positions.size > 1 else (starts, ends)


def _runs_merge(starts, ends):
    """Merge ranges ``[start, end)`` (starts and ends both non-decreasing) that overlap or touch."""
    new = np.flatnonzero(starts[1:] > ends[:-1]) + 1
    return starts[np.concatenate(([0], new))], ends[np.concatenate((new - 1, [starts.size - 1]))]


def _ranges(starts, ends, offsets=None):
    """The indices ``offsets[r] + (0 .. ends[r] - starts[r] - 1)`` of every range r, concatenated.

    Without ``offsets``, the ranges' own indices ``starts[r] .. ends[r] - 1``.  No range is empty.
    """
    origin = starts if offsets is None else offsets
    lengths = ends - starts
    first = np.cumsum(lengths) - lengths  # where each range begins in the result
    steps = np.ones(int(first[-1] + lengths[-1]) if lengths.size else 0, dtype=np.intp)
    if lengths.size:  # the running sum of steps of 1, jumping to each range's origin
        steps[0] = origin[0]
        steps[first[1:]] = origin[1:] - (origin[:-1] + lengths[:-1] - 1)
    return np.cumsum(steps, out=steps)


def _sliding(source, starts, ends, reach, op):
    """``op`` at the outputs in the ranges only, where output i reads ``source[..., i : i + reach + 1]``.

    The ranges, each with the ``reach`` frames after it, are copied into one short
    array (along the last axis); ``op`` maps an array of length L to its L - reach
    outputs, each from its own frames only, so every output equals that of
    ``op(source)``.  Returns (output indices, values).
    """
    spans = ends - starts + reach
    begins = np.cumsum(spans) - spans  # where each range's copy begins
    taken = _ranges(starts, ends + reach)  # source index of each copied frame
    values = op(np.take(source, taken, axis=-1))  # (np.take: fast along the last axis too)
    picks = _ranges(starts, ends, begins)  # the outputs that read their own range only
    return taken[picks], values[picks]


#: Outputs of a sliding stage are computed range by range while the ranges, with their reach,
#: cover less than this fraction of the piece; above it, over the whole piece (our choice: the
#: copies then cost more than they save).  Either way the values are the same.
_SPARSE_FRACTION = 0.5
#: The same for the interpolation, whose copies are cheap next to its 48 (24) products per window.
_DENSE_INTERPOLATION = 0.8
#: Samples (frames times channels) interpolated at a time: the temporaries stay in the cache
#: (our choice, measured; the values do not depend on it).
_INTERPOLATION_CHUNK = 1 << 15
#: Frames of the attack sum at a time, for the same reason.
_ATTACK_CHUNK = 1 << 14


def _interpolate(block, phases):
    """Largest ``|interpolated value|`` over channels and ``phases`` of every window ``block[:, i : i + 12]``.

    ``block`` is (channels, frames).  Tap k multiplies ``block[:, i + 11 - k]`` and the
    taps are summed in the order of :func:`render.truepeak.brute_force_true_peak`, so
    the values are the same.
    """
    count = block.shape[-1] - (_TAPS - 1)
    chunk = max(1024, _INTERPOLATION_CHUNK // block.shape[0])
    if count > chunk:  # in chunks that stay in cache
        return np.concatenate([_interpolate(block[:, start:start + chunk + _TAPS - 1], phases)
                               for start in range(0, count, chunk)])
    windows = [block[:, _TAPS - 1 - k: _TAPS - 1 - k + count] for k in range(_TAPS)]
    peak = None
    for p in phases:
        taps = INTERPOLATOR[p]
        acc = taps[0] * windows[0]
        for k in range(1, _TAPS):
            acc += taps[k] * windows[k]
        np.abs(acc, out=acc)
        peak = acc if peak is None else np.maximum(peak, acc, out=peak)
    return peak[0] if peak.shape[0] == 1 else np.max(peak, axis=0)


@functools.lru_cache(maxsize=None)
def _skip_norm(phases):
    """Largest L1 norm of the taps of ``phases``, with the 1e-12 slack of the skip bound."""
    return max(float(np.abs(INTERPOLATOR[p]).sum()) for p in phases) * _BOUND_SLACK


def _envelope(block, phases, floor=None):
    """Peak envelope of the frames ``block[:, 6:-6]``; ``block`` is (channels, frames), 6 extra either side.

    Interval i (between frames i - 1 and i of the result) is interpolated from the
    window ``block[:, i : i + 12]``, the newest sample last (:func:`_interpolate`).

    With ``floor``, windows that cannot exceed it are not interpolated (their
    value reads 0): a window's value is at most the L1 norm of the taps times
    its largest ``|sample|`` (the bound of :mod:`render.truepeak`, with the same
    1e-12 slack), so a window with no sample above ``floor / norm`` in any channel
    is skipped.  The other windows come in runs; the runs (each with the 11 frames
    after it) are copied into one short block and interpolated there, so every
    value is the same arithmetic as in the full computation.  Values above
    ``floor`` are exactly those of the full computation.
    """
    count = block.shape[1] - 2 * _RIGHT  # frames enveloped
    intervals = count + 1
    magnitude = np.abs(block)
    magnitude = magnitude[0] if block.shape[0] == 1 else np.max(magnitude, axis=0)
    samples = magnitude[_LEFT:_LEFT + count]  # the sample peak over the channels
    if floor is None:
        inter = _interpolate(block, phases)
        return np.maximum(samples, np.maximum(inter[:-1], inter[1:]))
    hot = np.flatnonzero(magnitude > floor / _skip_norm(phases))
    if hot.size > _DENSE_INTERPOLATION * intervals:  # (the runs would cover at least as many)
        inter = _interpolate(block, phases)
        return np.maximum(samples, np.maximum(inter[:-1], inter[1:]))
    envelope = samples.copy()
    if hot.size:
        starts, ends = _runs(hot, _TAPS - 1, 0, intervals)  # window i holds the frames i .. i + 11
        if int((ends - starts).sum()) + starts.size * (_TAPS - 1) > _DENSE_INTERPOLATION * intervals:
            inter = _interpolate(block, phases)
            return np.maximum(samples, np.maximum(inter[:-1], inter[1:]))
        where, values = _sliding(block, starts, ends, _TAPS - 1, lambda v: _interpolate(v, phases))
        # interval i is next to frames i - 1 and i; the other intervals read 0 (<= |x|)
        for side, first, last in ((where, 0, count), (where - 1, 1, count + 1)):
            keep = slice(np.searchsorted(where, first), np.searchsorted(where, last))
            frames, value = side[keep], values[keep]
            envelope[frames] = np.maximum(envelope[frames], value)
    return envelope


def peak_envelope(signal, *, rate_hz):
    """Per-frame true-peak envelope: ``|x[n]|`` and the interpolated values next to n.

    Parameters
    ----------
    signal : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0, finite.
    rate_hz : float
        Sample rate, Hz, > 0 (4x interpolation below 96 kHz, 2x from there up).

    Returns
    -------
    ndarray, shape (frames,), float64
        Linear; the largest over channels of ``|x[n]|`` and the BS.1770 Annex 2
        interpolated values in the intervals ``(n-1, n)`` and ``(n, n+1)``
        (the signal is zero outside ``0 .. frames-1``).  Its maximum is the
        BS.1770 true peak whenever the signal starts and ends with 6 zero
        frames (otherwise the meter also reads ringing outside the signal).

    >>> env = peak_envelope(np.array([[0.0], [1.0], [0.0]]), rate_hz=48000)
    >>> env.round(4).tolist()
    [0.9722, 1.0, 0.9722]
    """
    x = _check_block(signal, None, "signal")
    phases = _phases_for(rate_hz)
    block = np.zeros((x.shape[1], x.shape[0] + 2 * _RIGHT))
    block[:, _RIGHT:_RIGHT + x.shape[0]] = x.T
    return _envelope(block, phases)


# --------------------------------------------------------------------------- state


@dataclass(frozen=True, eq=False)
class LimiterState:
    """What the limiter remembers between blocks (treat as immutable; picklable).

    Attributes
    ----------
    rate_hz, channels, ceiling_dbtp, lookahead_ms, release_ms
        As given to :func:`limiter_init`.
    target : float
        Internal linear target, ceiling minus :data:`SAFETY_MARGIN_DB`.
    attack_frames : int
        K, the look-ahead and attack length in frames (>= 1).
    weights : ndarray, shape (K + 1,)
        Raised-cosine attack weights, summing to 1.
    release_per_frame : float
        ``1 / (release_s * rate_hz)``: the release's exponent per frame.
    phases : tuple of int
        Interpolator phases in use.
    tail : ndarray, shape (frames, channels)
        Input of pipeline frames ``pipe_enveloped - 6`` to ``pipe_in``.
    required : ndarray
        ``g_req`` from frame ``pipe_out - HOLD_FRAMES`` to ``pipe_enveloped``
        (ones before the pipeline's first frame).
    smoothed_tail : ndarray, shape (K,)
        ``r`` of the K frames before ``pipe_out`` (ones before the first frame).
    release_peak : float
        ``max_j log(1 - m[j]) + j * release_per_frame`` over pipeline frames so
        far (``-inf`` while nothing was limited).
    release_factor : float
        ``sum_k w[k] exp(k * release_per_frame)``: in a pure release (the same
        running maximum for frames ``n - K .. n``, and ``r`` on the release
        curve there) ``1 - s[n]`` is this times ``1 - r[n]``.
    attack_until : int
        Pipeline frame up to which (exclusive) the attack is summed term by
        term because a frame before ``pipe_out`` ended a pure release (0: none).
    lead_frames : int
        K + 6: zero frames the pipeline runs before frame 0, so the gain can
        come down before the first frame and the ringing before it is counted.
    pipe_in, pipe_enveloped, pipe_out : int
        Pipeline frames (``lead_frames`` ahead of the input's numbering) in,
        with a peak envelope, with a final gain.
    frames_in, frames_out : int
        Input frames seen; frames whose gain has been returned.
    min_gain : float
        Smallest final gain so far (1.0 before any).
    reduced_frames : int
        Final gains below 1 so far.
    flushed : bool
        True after :func:`limiter_flush`.
    """

    rate_hz: float
    channels: int
    ceiling_dbtp: float
    lookahead_ms: float
    release_ms: float
    target: float
    attack_frames: int
    weights: np.ndarray
    release_per_frame: float
    phases: tuple
    tail: np.ndarray
    required: np.ndarray
    smoothed_tail: np.ndarray
    release_peak: float
    release_factor: float
    attack_until: int
    lead_frames: int
    pipe_in: int
    pipe_enveloped: int
    pipe_out: int
    frames_in: int
    frames_out: int
    min_gain: float
    reduced_frames: int
    flushed: bool

    @property
    def latency_frames(self):
        """Frames of input beyond frame n that its gain depends on: K + HOLD_FRAMES + 6."""
        return self.attack_frames + HOLD_FRAMES + _RIGHT


@dataclass(frozen=True)
class LimiterResult:
    """Summary of the gains produced so far.

    Attributes
    ----------
    max_reduction_db : float
        Largest gain reduction, dB, >= 0 (0.0 when nothing was limited).
    frames : int
        Frames with a final gain.
    reduced_frames : int
        Of those, frames with a gain below 1.
    """

    max_reduction_db: float
    frames: int
    reduced_frames: int


def _number(name, value, low, high, unit, low_open=False):
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ParameterError(f"{name} = {value!r}: must be a number in {unit}")
    v = float(value)
    ok = math.isfinite(v) and (v > low if low_open else v >= low) and v <= high
    if not ok:
        left = "(" if low_open else "["
        raise ParameterError(f"{name} = {value!r}: must be in {left}{low:g}, {high:g}] {unit}")
    return v


def limiter_init(*, rate_hz, channels, ceiling_dbtp, lookahead_ms=1.5, release_ms=50.0):
    """State of a limiter that has seen nothing yet.

    Parameters
    ----------
    rate_hz : float
        Sample rate, Hz, > 0.
    channels : int
        Channels per block, >= 1; the gain is shared by all of them.
    ceiling_dbtp : float
        Highest allowed true peak, dBTP, in [-60, 0].
    lookahead_ms : float
        Look-ahead and attack length, ms, in [0.5, 20], and at least 16 frames
        (:data:`MIN_LOOKAHEAD_MS`).
    release_ms : float
        Release time constant, ms, in (0, 10000].

    Returns
    -------
    LimiterState
    """
    phases = _phases_for(rate_hz)
    rate = float(rate_hz)
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ParameterError(f"channels = {channels!r}: must be an integer >= 1")
    ceiling = _number("ceiling_dbtp", ceiling_dbtp, -60.0, 0.0, "dBTP")
    lookahead = _number("lookahead_ms", lookahead_ms, MIN_LOOKAHEAD_MS, 20.0, "ms")
    release = _number("release_ms", release_ms, 0.0, 10000.0, "ms", low_open=True)
    attack = int(round(lookahead * 1e-3 * rate))
    if attack < MIN_ATTACK_FRAMES:
        raise ParameterError(
            f"lookahead_ms = {lookahead_ms!r} at {rate:g} Hz is {attack} frames: must be at least "
            f"{MIN_ATTACK_FRAMES} frames ({MIN_ATTACK_FRAMES / rate * 1e3:.3g} ms at this rate)"
        )
    k = np.arange(attack + 1)
    weights = np.sin(np.pi * (k + 1) / (attack + 2)) ** 2
    weights /= weights.sum()
    weights.setflags(write=False)
    release_per_frame = 1.0 / (release * 1e-3 * rate)
    channels = int(channels)
    state = LimiterState(
        rate_hz=rate,
        channels=channels,
        ceiling_dbtp=ceiling,
        lookahead_ms=lookahead,
        release_ms=release,
        target=db_to_gain(ceiling - SAFETY_MARGIN_DB),
        attack_frames=attack,
        weights=weights,
        release_per_frame=release_per_frame,
        phases=phases,
        tail=np.zeros((_LEFT, channels)),
        required=np.ones(HOLD_FRAMES),
        smoothed_tail=np.ones(attack),
        release_peak=-math.inf,
        release_factor=float(np.sum(weights * np.exp(k * release_per_frame))),
        attack_until=0,
        lead_frames=attack + _RIGHT,
        pipe_in=0,
        pipe_enveloped=0,
        pipe_out=0,
        frames_in=0,
        frames_out=0,
        min_gain=1.0,
        reduced_frames=0,
        flushed=False,
    )
    # The lead-in.  It yields no gains: it is shorter than the latency (K + 6 < K + 12).
    _, state = _advance(state, np.zeros((state.lead_frames, channels)), final=False, counted=0)
    return state


def _replace(state, **changes):
    fields = {name: getattr(state, name) for name in state.__dataclass_fields__}
    fields.update(changes)
    return LimiterState(**fields)


def _held(padded, width, count, low):
    """Look-ahead minimum ``m[i] = min(padded[i : i + width])`` for i < count, and where it is below 1.

    ``padded`` is ``g_req`` (<= 1) from ``width - 1`` frames ahead of output 0 on, below 1
    at the sorted indices ``low``; the minimum is only taken near those (a minimum is exact,
    so the values are those of one filter over everything).  Returns (m, or None when all
    are 1; the sorted indices with ``m < 1``).
    """
    if low.size == 0:
        return None, low

    def window_min(values):
        filtered = minimum_filter1d(values, size=width, mode="nearest")
        return filtered[width // 2: width // 2 + values.size - width + 1]

    if low.size <= _SPARSE_FRACTION * padded.size + width:  # else the ranges would cover as many
        starts, ends = _runs(low, width - 1, 0, count)
        if int((ends - starts).sum()) + starts.size * (width - 1) <= _SPARSE_FRACTION * padded.size:
            held = np.ones(count)
            where, values = _sliding(padded, starts, ends, width - 1, window_min)
            held[where] = values
            return held, where[np.flatnonzero(values < 1.0)]
    held = window_min(padded)
    return held, np.flatnonzero(held < 1.0)


def _attack_sum(reduction, weights):
    """``sum_k w[k] reduction[i + K - k]`` for i = 0 .. len - K - 1, summed in the order k = 0 .. K."""
    K = weights.size - 1
    count = reduction.size - K
    if count > _ATTACK_CHUNK:  # in chunks that stay in cache
        return np.concatenate([_attack_sum(reduction[start:start + _ATTACK_CHUNK + K], weights)
                               for start in range(0, count, _ATTACK_CHUNK)])
    acc = weights[0] * reduction[K:K + count]
    for k in range(1, K + 1):
        acc += weights[k] * reduction[K - k: K - k + count]
    return acc


def _release(state, held, low, count):
    """Step 4 for the frames ``[pipe_out, pipe_out + count)`` with look-ahead minimum ``held`` (< 1 at ``low``).

    ``1 - r[n] = max_j (1 - m[j]) a^(n - j)``, via a running maximum in the log domain:
    ``level[j] = log(1 - m[j]) + j / (release_s rate_hz)`` is -inf where ``m[j] = 1``, so
    the running maximum only changes at frames with ``m < 1`` and is a step function in
    between.  Returns ``depth = exp(running max - n / (release_s rate_hz))`` (the release
    curve's ``1 - r``), ``r``, the new running maximum and the frames (indices from 0)
    that end a pure release: ``m`` below the release curve, or the running maximum rising.
    """
    slope = np.arange(state.pipe_out, state.pipe_out + count, dtype=np.float64)
    slope *= state.release_per_frame  # j / (release_s rate_hz)
    before = state.release_peak
    dense = low.size > _SPARSE_FRACTION * count
    if dense:  # over every frame
        with np.errstate(divide="ignore"):
            running = np.log(1.0 - held)
        running += slope
        np.maximum.accumulate(running, out=running)
        np.maximum(running, before, out=running)
        after = float(running[-1])
        peaks = running
    elif low.size:  # at the frames below 1 only, then filled in
        peaks = np.log(1.0 - held[low])
        peaks += slope[low]
        np.maximum.accumulate(peaks, out=peaks)
        np.maximum(peaks, before, out=peaks)
        running = np.empty(count)
        running[:low[0]] = before
        running[low[0]:] = np.repeat(peaks, np.diff(low, append=count))
        after = float(peaks[-1])
    else:
        running = peaks = None
        after = before
    if after == -math.inf:  # nothing limited yet: 1 - r is exactly 0
        depth = np.zeros(count)
    else:
        depth = np.exp((running if running is not None else before) - slope)
    released = 1.0 - depth
    if held is not None:
        np.minimum(held, released, out=released)
    if peaks is None:
        breaks = low
    elif dense:  # the running maximum one frame earlier, at every frame
        previous = np.concatenate(([before], running[:-1]))
        breaks = np.flatnonzero((running > previous) | (held < released))
    else:  # ... at the frames below 1 (it is constant in between)
        previous = np.concatenate(([before], peaks[:-1]))
        breaks = low[np.flatnonzero((peaks > previous) | (held[low] < released[low]))]
    return depth, released, after, breaks


def _attack(state, depth, released, breaks, count):
    """Step 5 before the final minimum: ``s[n] = 1 - sum_k w[k] (1 - r[n - k])``.

    Where ``r[j] = 1 - depth[j]`` under one running maximum for all j in ``n - K .. n``
    (a pure release: no frame of ``breaks`` among them), ``depth[j] = depth[n] a^(j - n)``
    and the sum is ``depth[n]`` times ``release_factor = sum_k w[k] a^-k``; elsewhere it is
    summed term by term.  Returns (s, ``r`` from K frames before ``pipe_out`` on, the new
    ``attack_until``).
    """
    K = state.attack_frames
    gain = 1.0 - state.release_factor * depth
    attack_until = state.attack_until
    starts, ends = [], []
    carried = attack_until - state.pipe_out
    if carried > 0:
        starts.append(np.zeros(1, dtype=np.intp))
        ends.append(np.array([min(carried, count)]))
    if breaks.size:
        s, e = _runs(breaks, 0, K, count)
        starts.append(s)
        ends.append(e)
        attack_until = max(attack_until, state.pipe_out + int(breaks[-1]) + K + 1)
    history = np.concatenate([state.smoothed_tail, released])
    if starts:
        starts, ends = np.concatenate(starts), np.concatenate(ends)
        if starts.size > 1:  # the carried range [0, <= K) may touch the first new one
            starts, ends = _runs_merge(starts, ends)
        w = state.weights
        if int((ends - starts).sum()) + starts.size * K > _SPARSE_FRACTION * history.size:
            where = _ranges(starts, ends)
            gain[where] = 1.0 - _attack_sum(1.0 - history, w)[where]
        else:
            where, acc = _sliding(history, starts, ends, K, lambda h: _attack_sum(1.0 - h, w))
            gain[where] = 1.0 - acc
    return gain, history, attack_until


def _advance(state, piece, final, counted):
    """Run the pipeline over ``piece`` (may be empty); with ``final`` the input ends after it.

    ``counted`` of its frames are input frames (0 for the lead-in and the end's zeros).
    Returns (the gains of input frames that became final, state).
    """
    K, H = state.attack_frames, HOLD_FRAMES
    frames_in = state.frames_in + counted
    pipe_in = state.pipe_in + piece.shape[0]
    enveloped = pipe_in if final else max(state.pipe_enveloped, pipe_in - _RIGHT)

    # 1-2. envelope and required gain of frames [pipe_enveloped, enveloped), from the input of
    # frames pipe_enveloped - 6 .. enveloped + 6: the tail, the piece and, at the end, 6 zeros
    required = state.required
    if enveloped > state.pipe_enveloped:
        held_over, fresh = state.tail.shape[0], piece.shape[0]
        block = np.empty((state.channels, held_over + fresh + (_RIGHT if final else 0)))  # channels first
        block[:, :held_over] = state.tail.T
        block[:, held_over:held_over + fresh] = piece.T
        block[:, held_over + fresh:] = 0.0
        env = _envelope(block, state.phases, floor=state.target)
        new_required = np.ones(env.shape[0])
        hot = np.flatnonzero(env > state.target)  # (an index array: faster than a boolean mask)
        new_required[hot] = state.target / env[hot]
        low = np.concatenate([np.flatnonzero(required < 1.0), required.shape[0] + hot])
        required = np.concatenate([required, new_required])
        keep = enveloped - state.pipe_enveloped  # frames of the tail and piece no longer needed
        if final:
            tail = state.tail[:0]
        elif keep >= held_over:
            tail = piece[keep - held_over:].copy()
        else:
            tail = np.concatenate([state.tail[keep:], piece])
    else:  # (never at the end: the final piece's 6 frames are always enveloped)
        tail = np.concatenate([state.tail, piece]) if piece.shape[0] else state.tail
        low = np.flatnonzero(required < 1.0)
    if final:  # no frames after the end: nothing to hold
        padded = np.concatenate([required, np.ones(K + H)])
    else:
        padded = required

    # 3. look-ahead minimum of frames [pipe_out, done): window [n - H, n + K + H]
    width = K + 2 * H + 1
    done = state.pipe_out + max(0, padded.shape[0] - width + 1)
    count = done - state.pipe_out
    if count <= 0:
        return np.zeros(0), _replace(state, tail=tail, required=required, pipe_in=pipe_in,
                                     pipe_enveloped=enveloped, frames_in=frames_in, flushed=final)
    held, low = _held(padded, width, count, low)  # held None: all 1
    depth, released, release, breaks = _release(state, held, low, count)
    gain, history, attack_until = _attack(state, depth, released, breaks, count)
    np.minimum(gain, required[H:H + count], out=gain)

    # the gains of input frames (the pipeline runs lead_frames ahead of the input's numbering)
    first = state.pipe_out - state.lead_frames  # input frame of gain[0]
    out = gain[max(0, -first):]
    out = out[:max(0, frames_in - state.frames_out)]
    return out, _replace(
        state,
        tail=tail,
        required=required[count:],
        smoothed_tail=history[-K:],
        release_peak=release,
        attack_until=attack_until,
        pipe_in=pipe_in,
        pipe_enveloped=enveloped,
        pipe_out=done,
        frames_in=frames_in,
        frames_out=state.frames_out + out.size,
        min_gain=min(state.min_gain, float(out.min())) if out.size else state.min_gain,
        reduced_frames=state.reduced_frames + int(np.count_nonzero(out < 1.0)),
        flushed=final,
    )


def _check_state(state):
    if not isinstance(state, LimiterState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a LimiterState from limiter_init")
    if state.flushed:
        raise ParameterError("state was flushed: the stream has ended; start a new one with limiter_init")


def limiter_update(block, state):
    """Feed one block; return the gains that are now final and the new state.

    Parameters
    ----------
    block : ndarray, shape (frames, channels)
        The mix: floating-point samples, full scale 1.0, finite; any number of frames.
    state : LimiterState

    Returns
    -------
    gain : ndarray, shape (m,), float64
        Gains in (0, 1] of the next m frames of the stream, which trails the
        input by up to :attr:`LimiterState.latency_frames` (m may be 0).
    new_state : LimiterState
        The old state stays valid.
    """
    _check_state(state)
    x = _check_block(block, state.channels, "block")
    gains = []
    for start in range(0, x.shape[0], _PIECE):
        piece = x[start:start + _PIECE]
        gain, state = _advance(state, piece, final=False, counted=piece.shape[0])
        gains.append(gain)
    if len(gains) == 1:
        return gains[0], state
    return (np.concatenate(gains) if gains else np.zeros(0)), state


def limiter_flush(state):
    """End the stream: the gains of the frames still pending, and the final state.

    Returns
    -------
    gain : ndarray, shape (m,), float64
        With the gains from :func:`limiter_update`, exactly one per input frame.
    new_state : LimiterState
        Flushed: read it with :func:`limiter_result`; it takes no more input.
    """
    _check_state(state)
    # Six zero frames after the end carry the intervals the meter reads there (the
    # interpolator's ringing); their gains are dropped.
    return _advance(state, np.zeros((_RIGHT, state.channels)), final=True, counted=0)


def limiter_result(state):
    """Largest gain reduction and frame counts of the gains produced so far.

    >>> limiter_result(limiter_init(rate_hz=48000, channels=2, ceiling_dbtp=-1.0))
    LimiterResult(max_reduction_db=0.0, frames=0, reduced_frames=0)
    """
    if not isinstance(state, LimiterState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a LimiterState from limiter_init")
    reduction = -gain_to_db(state.min_gain) if state.min_gain < 1.0 else 0.0
    return LimiterResult(max_reduction_db=reduction, frames=state.frames_out, reduced_frames=state.reduced_frames)


def limit(signal, *, rate_hz, ceiling_dbtp, lookahead_ms=1.5, release_ms=50.0):
    """Limit a whole signal in one pass.

    Parameters
    ----------
    signal : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0, finite.
    rate_hz, ceiling_dbtp, lookahead_ms, release_ms
        As :func:`limiter_init`.

    Returns
    -------
    gained : ndarray, shape (frames, channels)
        ``signal * gain[:, None]``.
    gain : ndarray, shape (frames,)
        In (0, 1].
    max_reduction_db : float
        Largest gain reduction, dB, >= 0.
    """
    x = _check_block(signal, None, "signal")
    state = limiter_init(rate_hz=rate_hz, channels=x.shape[1], ceiling_dbtp=ceiling_dbtp,
                         lookahead_ms=lookahead_ms, release_ms=release_ms)
    head, state = limiter_update(x, state)
    rest, state = limiter_flush(state)
    gain = np.concatenate([head, rest])
    return np.ascontiguousarray(x * gain[:, None]), gain, limiter_result(state).max_reduction_db
