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
#: Frames per internal piece: results do not depend on it (every stage is elementwise in the
#: absolute frame number), it only bounds the size of temporaries.
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
    if block.size and not np.isfinite(block).all():
        raise ParameterError(f"{name} contains NaN or infinite samples: expected finite values")
    return np.asarray(block, dtype=np.float64)


def _interpolate(column, phases, starts, out):
    """``out = max(out, |interpolated values|)`` of the windows ``column[i : i + 12]``, i in ``starts``.

    ``starts`` is a slice (every window) or an index array (some windows).
    """
    if isinstance(starts, slice):
        count = starts.stop
        windows = [column[_TAPS - 1 - k: _TAPS - 1 - k + count] for k in range(_TAPS)]
    else:
        windows = [column[starts + (_TAPS - 1 - k)] for k in range(_TAPS)]
    peak = None
    for p in phases:
        taps = INTERPOLATOR[p]
        acc = taps[0] * windows[0]
        for k in range(1, _TAPS):
            acc += taps[k] * windows[k]
        np.abs(acc, out=acc)
        peak = acc if peak is None else np.maximum(peak, acc, out=peak)
    out[starts] = np.maximum(out[starts], peak)


def _envelope(extended, phases, floor=None):
    """Peak envelope of the frames ``extended[6:-6]``; ``extended`` has 6 frames either side.

    Interval i (between frames i - 1 and i of the result) is interpolated from the
    window ``extended[i : i + 12]``, the newest sample last: tap k multiplies
    ``extended[i + 11 - k]`` and the taps are summed in the order of
    :func:`render.truepeak.brute_force_true_peak`, so the values are the same.

    With ``floor``, windows that cannot exceed it are not interpolated (their
    value reads 0): a window's value is at most the L1 norm of the taps times
    its largest ``|sample|`` (the bound of :mod:`render.truepeak`, with the same
    1e-12 slack), so a window with no sample above ``floor / norm`` is skipped.
    Values above ``floor`` are exactly those of the full computation.
    """
    count = extended.shape[0] - 2 * _RIGHT  # frames enveloped
    intervals = count + 1
    inter = np.zeros(intervals)
    norm = max(float(np.abs(INTERPOLATOR[p]).sum()) for p in phases) * _BOUND_SLACK
    for c in range(extended.shape[1]):
        column = np.ascontiguousarray(extended[:, c])
        if floor is None:
            _interpolate(column, phases, slice(0, intervals), inter)
            continue
        hot = np.flatnonzero(np.abs(column) > floor / norm)
        if hot.size == 0:
            continue
        mark = np.zeros(extended.shape[0] + _TAPS, dtype=bool)
        for k in range(_TAPS):  # a hot sample at h lies in the windows starting at h - 11 .. h
            mark[hot + (_TAPS - 1 - k)] = True
        starts = np.flatnonzero(mark[_TAPS - 1:_TAPS - 1 + intervals])
        if starts.size > intervals // 2:
            _interpolate(column, phases, slice(0, intervals), inter)
        else:
            _interpolate(column, phases, starts, inter)
    samples = np.max(np.abs(extended[_LEFT:_LEFT + count]), axis=1) if count else np.zeros(0)
    return np.maximum(samples, np.maximum(inter[:-1], inter[1:]))


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
    pad = np.zeros((_RIGHT, x.shape[1]))
    return _envelope(np.concatenate([pad, x, pad]), phases)


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
        release_per_frame=1.0 / (release * 1e-3 * rate),
        phases=phases,
        tail=np.zeros((_LEFT, channels)),
        required=np.ones(HOLD_FRAMES),
        smoothed_tail=np.ones(attack),
        release_peak=-math.inf,
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
    _, state = _advance(state, np.zeros((state.lead_frames, channels)), final=False)
    return state


def _replace(state, **changes):
    fields = {name: getattr(state, name) for name in state.__dataclass_fields__}
    fields.update(changes)
    return LimiterState(**fields)


def _advance(state, piece, final):
    """Run the pipeline over ``piece`` (may be empty); with ``final`` the input ends after it.

    Frames are pipeline frames; returns (gains of frames [pipe_out, new pipe_out), state).
    """
    K, H = state.attack_frames, HOLD_FRAMES
    extended = np.concatenate([state.tail, piece]) if piece.shape[0] else state.tail
    pipe_in = state.pipe_in + piece.shape[0]
    if final:
        extended = np.concatenate([extended, np.zeros((_RIGHT, state.channels))])
        enveloped = pipe_in
    else:
        enveloped = max(state.pipe_enveloped, pipe_in - _RIGHT)

    # 1-2. envelope and required gain of frames [pipe_enveloped, enveloped)
    required = state.required
    if enveloped > state.pipe_enveloped:
        use = enveloped - state.pipe_enveloped + 2 * _RIGHT
        env = _envelope(extended[:use], state.phases, floor=state.target)
        new_required = np.ones(env.shape[0])
        hot = env > state.target
        new_required[hot] = state.target / env[hot]
        required = np.concatenate([required, new_required])
        tail = extended[enveloped - state.pipe_enveloped:]
    else:
        tail = extended
    if final:
        tail = tail[:0]
        padded = np.concatenate([required, np.ones(K + H)])  # no frames after the end: nothing to hold
    else:
        padded = required

    # 3. look-ahead minimum of frames [pipe_out, done): window [n - H, n + K + H]
    width = K + 2 * H + 1
    done = state.pipe_out + max(0, padded.shape[0] - width + 1)
    count = done - state.pipe_out
    if count <= 0:
        return np.zeros(0), _replace(state, tail=tail, required=required, pipe_in=pipe_in,
                                     pipe_enveloped=enveloped, flushed=final)
    held = minimum_filter1d(padded, size=width, mode="nearest")[width // 2: width // 2 + count]

    # 4. release: 1 - r[n] = max_j (1 - m[j]) a^(n - j), via a running max in the log domain
    frame = np.arange(state.pipe_out, done, dtype=np.float64)
    depth = 1.0 - held
    with np.errstate(divide="ignore"):
        level = np.log(depth)
    level += frame * state.release_per_frame
    running = np.maximum.accumulate(level)
    np.maximum(running, state.release_peak, out=running)
    release_peak = float(running[-1])
    released = np.minimum(held, 1.0 - np.exp(running - frame * state.release_per_frame))

    # 5. attack: s[n] = 1 - sum_k w[k] (1 - r[n - k]), so that s is exactly 1 where r is
    history = np.concatenate([state.smoothed_tail, released])
    reduction = 1.0 - history
    w = state.weights
    if reduction.any():
        acc = w[0] * reduction[K:K + count]
        for k in range(1, K + 1):
            acc += w[k] * reduction[K - k: K - k + count]
        gain = np.minimum(1.0 - acc, required[H:H + count])
    else:  # nothing to reduce: the sum above is exactly 0
        gain = np.ones(count)

    return gain, _replace(
        state,
        tail=tail,
        required=required[count:],
        smoothed_tail=history[-K:],
        release_peak=release_peak,
        pipe_in=pipe_in,
        pipe_enveloped=enveloped,
        pipe_out=done,
        flushed=final,
    )


def _emit(gain, before, state):
    """Keep the gains of input frames from pipeline output ``gain`` (which started at ``before``)."""
    first = before - state.lead_frames  # input frame of gain[0]
    gain = gain[max(0, -first):]
    gain = gain[:max(0, state.frames_in - state.frames_out)]
    if gain.size == 0:
        return gain, state
    return gain, _replace(
        state,
        frames_out=state.frames_out + gain.size,
        min_gain=min(state.min_gain, float(gain.min())),
        reduced_frames=state.reduced_frames + int(np.count_nonzero(gain < 1.0)),
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
        before = state.pipe_out
        gain, state = _advance(state, piece, final=False)
        state = _replace(state, frames_in=state.frames_in + piece.shape[0])
        gain, state = _emit(gain, before, state)
        gains.append(gain)
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
    before = state.pipe_out
    # Six zero frames after the end carry the intervals the meter reads there (the
    # interpolator's ringing); their gains are dropped.
    gain, state = _advance(state, np.zeros((_RIGHT, state.channels)), final=True)
    return _emit(gain, before, state)


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
