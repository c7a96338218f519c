"""Streamed overlap-save FFT convolution with explicit state (pure DSP).

Applies a finite impulse response (an ``(ir_frames, ir_channels)`` array, up to
tens of seconds long) to a signal of any length read in blocks of any size.
The state carried between blocks holds only the last ``ir_frames - 1`` input
frames plus fewer than one transform's worth of pending input, so memory does
not grow with the length of the signal.

Method: overlap-save with one large transform per block (uniform, not
partitioned: offline, one big block per transform is the cheapest scheme).
Each transform of size ``K`` takes the previous ``N - 1`` input frames and
``B = K - N + 1`` new ones and yields ``B`` finished output frames; the first
``N - 1`` frames of each inverse transform are circularly wrapped and dropped.

Output frame 0 belongs to input frame 0: concatenating every output of
:func:`convolve_block` and then :func:`flush` gives exactly the full linear
convolution, ``L + N - 1`` frames long, with no added latency.
:func:`flush_blocks` gives the same last frames one transform at a time, so a
stream's end needs no more memory than any block before it.

A short input is cheaper in one transform: :func:`convolve_whole` puts the
whole input at the start of a transform of at least ``L + N - 1`` frames, so
no frames are spent on overlap, where overlap-save's first transform would
spend ``N - 1`` on the zeros before the signal.  :func:`whole_fft_size` says
when that wins and at which size.

>>> import numpy as np
>>> ir = np.array([[1.0], [0.5], [0.25]])
>>> kernel = prepare_kernel(ir, fft_size=8)
>>> state = initial_state(kernel, channels=1)
>>> out1, state = convolve_block(np.array([[1.0], [0.0], [0.0]]), state, kernel=kernel)
>>> out2, state = convolve_block(np.array([[2.0]]), state, kernel=kernel)
>>> tail = flush(state, kernel=kernel)
>>> np.concatenate([out1, out2, tail])[:, 0].round(6).tolist()
[1.0, 0.5, 0.25, 2.0, 1.0, 0.5]
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass
from typing import Tuple

import numpy as np
import scipy.fft

from .errors import ParameterError

__all__ = [
    "FFT_COST",
    "MIN_FFT",
    "Kernel",
    "ConvolverState",
    "choose_fft_size",
    "fft_cost_per_frame",
    "prepare_kernel",
    "output_channels",
    "initial_state",
    "convolve_block",
    "flush",
    "flush_blocks",
    "WHOLE_SIZES",
    "whole_fft_size",
    "convolve_whole",
]

#: Cost of one real FFT per ``K·log2 K`` relative to one complex product per
#: frequency bin, in the cost model of :func:`choose_fft_size`.  A round value:
#: on the development machine (scipy's pocketfft, one worker) the ratio was
#: measured between 0.6 (K = 2**20) and 1.9 (K = 2**16); the choice of ``K``
#: is not sensitive to it within that range.
FFT_COST = 1.0

#: Smallest transform size :func:`choose_fft_size` considers, frames.  The
#: cost model has no term for the fixed cost of a transform call, so for short
#: responses it would pick tiny sizes: on the development machine, 10 s of
#: stereo through a 1-frame response took 4.5 s at K = 2 and 0.02 s at
#: K = 4096 (sizes 4096 to 16384 were within 10 % of each other).
MIN_FFT = 2**12


def _is_int(value):
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def fft_cost_per_frame(fft_size, *, ir_frames, fft_cost=FFT_COST):
    """Modelled work per output frame for one channel of overlap-save.

    ``(2 · fft_cost · K · log2 K + K) / (K - N + 1)``: one forward and one
    inverse real transform of size ``K``, plus about ``K`` for the ``K/2 + 1``
    complex products, shared by the ``K - N + 1`` output frames each transform
    yields.  Arbitrary units; only ratios between sizes mean anything.

    Parameters
    ----------
    fft_size : int
        Transform size ``K`` in frames, ``>= ir_frames``.
    ir_frames : int
        Impulse-response length ``N`` in frames, ``>= 1``.
    fft_cost : float
        Relative cost of a transform per ``K·log2 K``, ``> 0``.

    Returns
    -------
    float
        Cost per output frame.

    >>> fft_cost_per_frame(8, ir_frames=5)
    14.0
    """
    k, n = int(fft_size), int(ir_frames)
    if not (1 <= n <= k):
        raise ParameterError(f"fft_size = {fft_size!r}: must be >= ir_frames = {ir_frames!r}")
    return _transform_cost(k, fft_cost) / (k - n + 1)


#: Largest transform considered, as a multiple of the response length.  The K·log K model keeps
#: preferring larger transforms, but past about 4 N memory traffic wins: measured here for
#: N = 165 840 (2.5 s at 48 kHz), 43-52 ns per output frame and channel at K = 3.6-4.7 N
#: against 83-96 ns at K = 6-16 N.
MAX_RATIO = 4.5


def _kept_tail(tail_frames, ir_frames):
    """``tail_frames`` validated against ``ir_frames`` (None: ``ir_frames - 1``), as an int."""
    n1 = int(ir_frames) - 1
    if tail_frames is None:
        return n1
    if _is_int(tail_frames) and 0 <= tail_frames <= n1:
        return int(tail_frames)
    raise ParameterError(f"tail_frames = {tail_frames!r}: must be an integer from 0 to ir_frames - 1 = {n1}")


def _times_kernel(spec, kernel, out_channels):
    """The input spectra times the kernel's (in place when the channel counts agree)."""
    if spec.shape[0] == out_channels:
        return np.multiply(spec, kernel.spectrum, out=spec)
    return spec * kernel.spectrum


#: Mantissas of the sizes :func:`whole_fft_size` picks from: ``m · 2**a`` for ``m`` in this tuple, all
#: 5-smooth (fast for pocketfft) and at most 25 % apart.  Our choice: a coarse grid, so inputs of
#: similar length share a size and a worker reuses its prepared kernel (about 10 % of the transform
#: is padding on average).
WHOLE_SIZES = (8, 9, 10, 12, 15)


def _transform_cost(k, fft_cost=FFT_COST):
    """Modelled work of one forward and one inverse transform of size ``k`` plus the products."""
    return 2.0 * fft_cost * k * math.log2(k) + k


def _whole_grid_size(frames):
    """The smallest ``m · 2**a >= frames`` (``m`` in :data:`WHOLE_SIZES`, ``a >= 0``)."""
    a = max(0, int(frames).bit_length() - 4)
    best = None
    for shift in (a - 1, a, a + 1):
        if shift < 0:
            continue
        for m in WHOLE_SIZES:
            size = m << shift
            if size >= frames and (best is None or size < best):
                best = size
    return best  # found: 8 << (a + 1) = 2**bit_length > frames


def whole_fft_size(ir_frames, *, input_frames, tail_frames=None, max_fft=2**22):
    """Transform size for convolving a whole input in one transform, or None when streaming is cheaper.

    One transform of size ``K >= L + N - 1`` (``K`` from the grid of
    :data:`WHOLE_SIZES`) against the ``ceil((L + T) / B)`` transforms of
    size ``K_s = choose_fft_size(N)`` that overlap-save needs for the same
    ``L + T`` output frames (``B = K_s - N + 1``), in the cost model of
    :func:`fft_cost_per_frame`.  The whole transform is only chosen when
    ``K <= K_s``, so it never needs more memory than streaming would.  A pure
    function of its arguments: the same file is planned the same way on every
    machine.

    Parameters
    ----------
    ir_frames : int
        Impulse-response length ``N``, ``>= 1``.
    input_frames : int
        Input length ``L``, ``>= 0`` (0 gives None).
    tail_frames : int, optional
        Output frames kept after the input, ``0`` to ``N - 1`` (default ``N - 1``).
    max_fft : int
        As for :func:`choose_fft_size`.

    Returns
    -------
    int or None

    >>> whole_fft_size(48000, input_frames=96000)   # 2 s through a 1 s response
    147456
    >>> whole_fft_size(48000, input_frames=48000 * 600) is None   # 10 min: streaming
    True
    """
    if not _is_int(ir_frames) or ir_frames < 1:
        raise ParameterError(f"ir_frames = {ir_frames!r}: must be an integer >= 1")
    if not _is_int(input_frames) or input_frames < 0:
        raise ParameterError(f"input_frames = {input_frames!r}: must be an integer >= 0")
    n, length = int(ir_frames), int(input_frames)
    tail = _kept_tail(tail_frames, n)
    if length == 0:
        return None
    stream_k = choose_fft_size(n, max_fft=max_fft)
    transforms = -(-(length + tail) // (stream_k - n + 1))
    k = _whole_grid_size(length + n - 1)
    if k > stream_k or _transform_cost(k) >= transforms * _transform_cost(stream_k):
        return None
    return int(k)


def convolve_whole(x, *, kernel, tail_frames=None):
    """Linear convolution of a whole input in one transform.

    Parameters
    ----------
    x : numpy.ndarray
        Input, shape ``(L, S)``, ``L >= 1``, real values (converted to float64).
        ``S`` as for :func:`initial_state`.
    kernel : Kernel
        Prepared with ``fft_size >= L + N - 1`` (e.g. :func:`whole_fft_size`).
    tail_frames : int, optional
        Output frames kept after the input, ``0`` to ``N - 1`` (default ``N - 1``).

    Returns
    -------
    numpy.ndarray
        float64, shape ``(L + tail_frames, out_channels)``, C-contiguous: the
        same frames as the stream of :func:`convolve_block` and :func:`flush`,
        to rounding (another transform size).
    """
    x = np.asarray(x)
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 1:
        raise ParameterError(f"x has shape {x.shape}: expected (frames, channels) with frames >= 1")
    if not (np.issubdtype(x.dtype, np.floating) or np.issubdtype(x.dtype, np.integer)):
        raise ParameterError(f"x has dtype {x.dtype}: expected real numbers")
    length, n, k = x.shape[0], kernel.ir_frames, kernel.fft_size
    tail = _kept_tail(tail_frames, n)
    if length + n - 1 > k:
        raise ParameterError(f"x has {length} frames: a kernel of fft_size {k} takes at most {k - n + 1} "
                             f"in one transform (ir_frames = {n})")
    out_channels = output_channels(x.shape[1], ir_channels=kernel.ir_channels)
    spec = scipy.fft.rfft(np.ascontiguousarray(x.T, dtype=np.float64), n=k, axis=-1, workers=1)
    spec = _times_kernel(spec, kernel, out_channels)
    y = scipy.fft.irfft(spec, n=k, axis=-1, workers=1)
    del spec
    return np.ascontiguousarray(y[:, : length + tail].T)


def choose_fft_size(ir_frames, *, max_fft=2**22, min_fft=MIN_FFT, fft_cost=FFT_COST, max_ratio=MAX_RATIO):
    """Transform size for overlap-save that minimises the work per output frame.

    Cost model (see :func:`fft_cost_per_frame`): for a transform of size
    ``K``, the work per output frame is
    ``(2 · fft_cost · K · log2 K + K) / (K - N + 1)``.  A larger ``K`` spreads
    the fixed ``N - 1`` frames of overlap over more output frames but each
    transform costs more per frame (``log2 K``).  The candidates are the fast
    real-transform lengths of :func:`scipy.fft.next_fast_len` (products of
    2, 3 and 5) from ``max(2 · N, min_fft)`` up to ``max_fft``; the cheapest
    wins, the smallest on a tie.  The model ignores that some 5-smooth lengths
    are slower than powers of two, memory traffic, and the fixed cost of each
    transform call; ``min_fft`` stands in for the last (see :data:`MIN_FFT`).

    Memory: the kernel spectrum takes ``16 · (K/2 + 1)`` bytes per impulse
    response channel, the work arrays about ``8 · K`` bytes per channel.

    Parameters
    ----------
    ir_frames : int
        Impulse-response length ``N`` in frames, ``>= 1``.
    max_fft : int
        Largest transform size allowed, frames; must be ``>= 2 · N`` rounded
        up to a fast length.
    min_fft : int
        Smallest transform size considered, frames, ``>= 1`` (default
        :data:`MIN_FFT`); ignored where it would exceed ``max_fft``.
    fft_cost : float
        Relative cost of a transform per ``K·log2 K`` (default :data:`FFT_COST`).
    max_ratio : float
        Candidates stop at ``max_ratio · N`` (or ``min_fft``), ``>= 2`` (default :data:`MAX_RATIO`).

    Returns
    -------
    int
        ``K >= 2 · ir_frames``, a fast real-transform length.

    >>> k = choose_fft_size(1000)
    >>> k >= 2000 and scipy.fft.next_fast_len(k, real=True) == k
    True
    """
    if not _is_int(ir_frames) or ir_frames < 1:
        raise ParameterError(f"ir_frames = {ir_frames!r}: must be an integer >= 1")
    if not _is_int(max_fft) or max_fft < 2:
        raise ParameterError(f"max_fft = {max_fft!r}: must be an integer >= 2")
    if not (isinstance(fft_cost, numbers.Real) and math.isfinite(fft_cost) and fft_cost > 0):
        raise ParameterError(f"fft_cost = {fft_cost!r}: must be a finite number > 0")
    if not _is_int(min_fft) or min_fft < 1:
        raise ParameterError(f"min_fft = {min_fft!r}: must be an integer >= 1")
    n = int(ir_frames)
    k = scipy.fft.next_fast_len(2 * n, real=True)
    if k > max_fft:
        raise ParameterError(
            f"ir_frames = {n}: needs an FFT size of at least {k} (2·ir_frames rounded up to a fast length), "
            f"above max_fft = {max_fft}"
        )
    if k < min_fft and scipy.fft.next_fast_len(min_fft, real=True) <= max_fft:
        k = scipy.fft.next_fast_len(min_fft, real=True)
    if not (isinstance(max_ratio, numbers.Real) and max_ratio >= 2):
        raise ParameterError(f"max_ratio = {max_ratio!r}: must be a number >= 2")
    upper = min(max_fft, max(int(max_ratio * n), k, min_fft))
    best_k, best_cost = k, fft_cost_per_frame(k, ir_frames=n, fft_cost=fft_cost)
    while True:
        k = scipy.fft.next_fast_len(k + 1, real=True)
        if k > upper:
            break
        cost = fft_cost_per_frame(k, ir_frames=n, fft_cost=fft_cost)
        if cost < best_cost:
            best_k, best_cost = k, cost
    return int(best_k)


@dataclass(frozen=True, eq=False)
class Kernel:
    """A prepared impulse response: its spectrum at one transform size.

    Attributes
    ----------
    fft_size : int
        Transform size ``K`` in frames.
    block_frames : int
        New input frames per transform, ``B = K - N + 1``.
    ir_frames : int
        Impulse-response length ``N`` in frames.
    ir_channels : int
        Impulse-response channels ``C``.
    spectrum : numpy.ndarray
        complex128, shape ``(ir_channels, K // 2 + 1)``, read-only:
        ``scipy.fft.rfft`` of the zero-padded response along frames.
    """

    fft_size: int
    block_frames: int
    ir_frames: int
    ir_channels: int
    spectrum: np.ndarray

    @property
    def nbytes(self):
        """Bytes held by the spectrum."""
        return int(self.spectrum.nbytes)


def prepare_kernel(ir, *, fft_size=None):
    """Transform an impulse response once, for use by :func:`convolve_block`.

    Parameters
    ----------
    ir : numpy.ndarray
        Impulse response, shape ``(frames, channels)``, frames ``>= 1``,
        channels ``>= 1``, finite real values (converted to float64; the
        caller's array is not modified).
    fft_size : int, optional
        Transform size ``K`` in frames, ``>= frames`` (any integer; fast
        lengths are quicker).  Default: :func:`choose_fft_size`.

    Returns
    -------
    Kernel

    >>> k = prepare_kernel(np.ones((3, 2)), fft_size=8)
    >>> k.block_frames, k.spectrum.shape
    (6, (2, 5))
    """
    ir = np.asarray(ir)
    if ir.ndim != 2 or ir.shape[0] < 1 or ir.shape[1] < 1:
        raise ParameterError(f"ir has shape {ir.shape}: expected (frames, channels) with frames >= 1 and channels >= 1")
    if not (np.issubdtype(ir.dtype, np.floating) or np.issubdtype(ir.dtype, np.integer)):
        raise ParameterError(f"ir has dtype {ir.dtype}: expected real numbers")
    ir = ir.astype(np.float64, copy=False)
    if not np.all(np.isfinite(ir)):
        raise ParameterError("ir contains NaN or infinite samples: expected finite values")
    n, c = ir.shape
    if fft_size is None:
        k = choose_fft_size(n)
    else:
        if not _is_int(fft_size) or fft_size < n:
            raise ParameterError(f"fft_size = {fft_size!r}: must be an integer >= ir frames = {n}")
        k = int(fft_size)
    spectrum = scipy.fft.rfft(np.ascontiguousarray(ir.T), n=k, axis=-1, workers=1)
    spectrum.setflags(write=False)
    return Kernel(fft_size=k, block_frames=k - n + 1, ir_frames=n, ir_channels=c, spectrum=spectrum)


def output_channels(source_channels, *, ir_channels):
    """Output channel count for a source convolved with an impulse response.

    Same count: channel ``i`` with IR channel ``i``.  Mono source, ``C > 1``
    IR channels: the source feeds every IR channel.  Mono IR: every source
    channel with the one response.

    >>> output_channels(1, ir_channels=2), output_channels(6, ir_channels=1)
    (2, 6)
    """
    s, c = source_channels, ir_channels
    if not (_is_int(s) and s >= 1):
        raise ParameterError(f"channels = {s!r}: must be an integer >= 1")
    if s == c or s == 1 or c == 1:
        return int(max(s, c))
    raise ParameterError(f"ir has {c} channels, source has {s}: expected 1, or the same count")


@dataclass(frozen=True, eq=False)
class ConvolverState:
    """What :func:`convolve_block` carries from one block to the next.

    Small and picklable; its size is bounded by ``channels · fft_size``
    float64 values whatever the number of frames already processed.  A state
    is never modified: each call returns a new one (arrays are shared between
    old and new states only where they are unchanged).

    Attributes
    ----------
    channels : int
        Source channels ``S``.
    out_channels : int
        Output channels.
    fft_size, ir_frames : int
        Of the kernel this state belongs to (checked on every call).
    history : numpy.ndarray
        The ``ir_frames - 1`` input frames before the pending ones, shape
        ``(channels, ir_frames - 1)`` (zeros before the signal starts).
    pending : tuple of numpy.ndarray
        Input received but not yet transformed, each ``(channels, n)``; fewer
        than ``block_frames`` frames in total.
    pending_frames : int
        Frames in ``pending``.
    frames_in, frames_out : int
        Input frames received and output frames returned so far.
    """

    channels: int
    out_channels: int
    fft_size: int
    ir_frames: int
    history: np.ndarray
    pending: Tuple[np.ndarray, ...]
    pending_frames: int
    frames_in: int
    frames_out: int

    @property
    def nbytes(self):
        """Bytes of sample data held (history plus pending input)."""
        return int(self.history.nbytes + sum(p.nbytes for p in self.pending))


def initial_state(kernel, *, channels):
    """State before the first block: silence before the signal.

    Parameters
    ----------
    kernel : Kernel
    channels : int
        Source channels ``S``; must be 1, ``kernel.ir_channels``, or any count
        if the kernel is mono.

    Returns
    -------
    ConvolverState
    """
    out = output_channels(channels, ir_channels=kernel.ir_channels)
    history = np.zeros((channels, kernel.ir_frames - 1))
    history.setflags(write=False)
    return ConvolverState(
        channels=int(channels),
        out_channels=out,
        fft_size=kernel.fft_size,
        ir_frames=kernel.ir_frames,
        history=history,
        pending=(),
        pending_frames=0,
        frames_in=0,
        frames_out=0,
    )


def _check_state(state, kernel):
    if not isinstance(state, ConvolverState):
        raise ParameterError(f"state is {type(state).__name__}: expected a ConvolverState from initial_state()")
    if state.fft_size != kernel.fft_size or state.ir_frames != kernel.ir_frames:
        raise ParameterError(
            f"state is for fft_size = {state.fft_size}, ir_frames = {state.ir_frames}; kernel has "
            f"fft_size = {kernel.fft_size}, ir_frames = {kernel.ir_frames}: expected the kernel the state was made for"
        )


def _transform(x, nseg, kernel, out_channels):
    """Overlap-save over ``x`` (channels, N - 1 + nseg·B): returns (out_channels, nseg·B)."""
    k, b, n = kernel.fft_size, kernel.block_frames, kernel.ir_frames
    out = np.empty((out_channels, nseg * b))
    for j in range(nseg):
        spec = _times_kernel(scipy.fft.rfft(x[:, j * b : j * b + k], axis=-1, workers=1), kernel, out_channels)
        out[:, j * b : (j + 1) * b] = scipy.fft.irfft(spec, n=k, axis=-1, workers=1)[:, n - 1 :]
    return out


def convolve_block(block, state, *, kernel):
    """Feed one block of input; return the output frames finished so far.

    Parameters
    ----------
    block : numpy.ndarray
        Input, shape ``(frames, channels)`` with ``frames >= 0`` and
        ``channels == state.channels``; real values (converted to float64).
        Not modified, and not referenced after the call returns.
    state : ConvolverState
        From :func:`initial_state` or the previous call.
    kernel : Kernel
        The kernel the state was made for.

    Returns
    -------
    out : numpy.ndarray
        float64, shape ``(frames, state.out_channels)``, C-contiguous; a
        multiple of ``kernel.block_frames`` frames (possibly 0).
    new_state : ConvolverState
    """
    _check_state(state, kernel)
    block = np.asarray(block)
    if block.ndim != 2 or block.shape[1] != state.channels:
        raise ParameterError(f"block has shape {block.shape}: expected (frames, {state.channels})")
    if not (np.issubdtype(block.dtype, np.floating) or np.issubdtype(block.dtype, np.integer)):
        raise ParameterError(f"block has dtype {block.dtype}: expected real numbers")
    frames = block.shape[0]
    total = state.pending_frames + frames
    b = kernel.block_frames
    if total < b:
        # Not enough for a transform: keep a private copy, share the rest.
        pending = state.pending
        if frames:
            pending = pending + (np.array(block.T, dtype=np.float64, order="C"),)
        new_state = ConvolverState(
            channels=state.channels,
            out_channels=state.out_channels,
            fft_size=state.fft_size,
            ir_frames=state.ir_frames,
            history=state.history,
            pending=pending,
            pending_frames=total,
            frames_in=state.frames_in + frames,
            frames_out=state.frames_out,
        )
        return np.empty((0, state.out_channels)), new_state

    x = np.concatenate((state.history,) + state.pending + (block.T,), axis=1, dtype=np.float64)
    nseg = total // b
    y = _transform(x, nseg, kernel, state.out_channels)
    used = nseg * b
    n1 = kernel.ir_frames - 1
    history = x[:, used : used + n1].copy()
    history.setflags(write=False)
    rest = x[:, used + n1 :]
    pending = (rest.copy(),) if rest.shape[1] else ()
    new_state = ConvolverState(
        channels=state.channels,
        out_channels=state.out_channels,
        fft_size=state.fft_size,
        ir_frames=state.ir_frames,
        history=history,
        pending=pending,
        pending_frames=total - used,
        frames_in=state.frames_in + frames,
        frames_out=state.frames_out + used,
    )
    return np.ascontiguousarray(y.T), new_state


def _frames_still_due(state, kernel, tail_frames):
    """Output frames after ``state.frames_out`` up to the input's end plus ``tail_frames`` (validated)."""
    _check_state(state, kernel)
    tail = _kept_tail(tail_frames, kernel.ir_frames)
    return state.frames_in + tail - state.frames_out


def flush_blocks(state, *, kernel, tail_frames=None):
    """The remaining output after the last block, one transform's worth at a time.

    Feeds zeros through :func:`convolve_block`: the pending input padded to
    one block, then whole blocks of silence, so each step allocates what a
    block of the stream did, whatever the pending length (transforming a
    nearly full pending block and a 2.5 s response's tail in one go took two
    transforms' worth at once).  The pieces concatenated are what
    :func:`flush` returns, bit for bit.

    Parameters
    ----------
    state, kernel, tail_frames
        As for :func:`flush` (``tail_frames``: ``0`` to ``ir_frames - 1``,
        default ``ir_frames - 1``).

    Returns
    -------
    iterator of numpy.ndarray
        float64 pieces of shape ``(frames, state.out_channels)``, each of
        ``1`` to ``kernel.block_frames`` frames, ``L + tail_frames -
        frames_out`` frames in all (no pieces when that is 0).

    Raises
    ------
    ParameterError
        At the call (not on iteration) for a state of another kernel or a
        ``tail_frames`` out of range.
    """
    need = _frames_still_due(state, kernel, tail_frames)
    return _flush_pieces(state, kernel, need)


def _flush_pieces(state, kernel, need):
    if need <= 0:
        return
    b = kernel.block_frames
    pad = np.zeros((b - state.pending_frames, state.channels))  # the pending input's block filled up
    while need > 0:
        out, state = convolve_block(pad, state, kernel=kernel)  # exactly one transform: b frames out
        if pad.shape[0] != b:
            pad = np.zeros((b, state.channels))  # then whole blocks of silence, one array reused
        yield out if need >= out.shape[0] else out[:need]
        need -= out.shape[0]


def flush(state, *, kernel, tail_frames=None):
    """The remaining output after the last block: pending input and the tail.

    Parameters
    ----------
    state : ConvolverState
        After the last :func:`convolve_block` call.
    kernel : Kernel
    tail_frames : int, optional
        Output frames to keep after the end of the input, ``0`` to
        ``ir_frames - 1``.  Default ``ir_frames - 1``: the full linear
        convolution, ``L + N - 1`` frames in all (for an empty input, ``N - 1``
        frames of silence).

    Returns
    -------
    numpy.ndarray
        float64, shape ``(frames, state.out_channels)``: the last
        ``L + tail_frames - frames_out`` output frames; :func:`flush_blocks`
        gives them in pieces.
    """
    pieces = list(flush_blocks(state, kernel=kernel, tail_frames=tail_frames))
    if not pieces:
        return np.empty((0, state.out_channels))
    return np.concatenate(pieces)  # a new C-contiguous array
