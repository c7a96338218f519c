"""Streamed overlap-save convolution: block-by-block output equals one full linear convolution."""

from __future__ import annotations

import pickle

import numpy as np
import pytest
import scipy.fft
import scipy.signal

from render.convolve import (
    MAX_RATIO,
    WHOLE_SIZES,
    ConvolverState,
    choose_fft_size,
    convolve_block,
    convolve_whole,
    fft_cost_per_frame,
    flush,
    flush_blocks,
    initial_state,
    output_channels,
    prepare_kernel,
    whole_fft_size,
)
from render.convolve import _transform
from render.errors import ParameterError

#: Absolute tolerance against the reference, re full scale 1.0 (as the brief asks).
TOL = 1e-9


def _signal(rng, frames, channels):
    return rng.uniform(-1.0, 1.0, (frames, channels))


def _ir(rng, frames, channels):
    """A decaying random response with unit energy per channel."""
    h = rng.standard_normal((frames, channels)) * np.exp(-np.arange(frames) / max(frames / 4, 1.0))[:, None]
    return h / np.sqrt(np.sum(h**2, axis=0, keepdims=True))


def _reference(x, h):
    """Full linear convolution with the documented channel mapping, one output channel at a time."""
    s, c = x.shape[1], h.shape[1]
    out_ch = max(s, c)
    cols = []
    for o in range(out_ch):
        # scipy as the reference library
        cols.append(scipy.signal.fftconvolve(x[:, o if s > 1 else 0], h[:, o if c > 1 else 0], mode="full"))
    return np.stack(cols, axis=1)


def _stream(x, kernel, block_frames, tail_frames=None):
    """Feed x in blocks of block_frames; return the concatenated output and the list of per-call lengths."""
    state = initial_state(kernel, channels=x.shape[1])
    outs = []
    for start in range(0, max(len(x), 1), block_frames):
        out, state = convolve_block(x[start : start + block_frames], state, kernel=kernel)
        assert out.ndim == 2 and out.dtype == np.float64 and out.flags.c_contiguous
        outs.append(out)
    outs.append(flush(state, kernel=kernel, tail_frames=tail_frames))
    return np.concatenate(outs, axis=0)


# (signal frames, source channels, ir frames, ir channels, fft_size or None for the cost model)
CASES = [
    (3000, 1, 200, 1, None),  # mono, chosen size
    (3000, 2, 200, 2, None),  # stereo, channel i with IR channel i
    (3000, 1, 150, 2, 512),  # mono source feeds both IR channels
    (2500, 6, 90, 1, 256),  # every source channel with the one IR
    (2000, 2, 300, 2, 301),  # K = N + 1: two new frames per transform, odd size
]


@pytest.mark.parametrize("frames, s, n, c, fft_size", CASES)
@pytest.mark.parametrize("block_frames", [7, 1000, 10_000])  # odd, typical, larger than the input
def test_blocks_equal_full_convolution(frames, s, n, c, fft_size, block_frames):
    rng = np.random.default_rng(1000 * frames + 10 * s + c)
    x, h = _signal(rng, frames, s), _ir(rng, n, c)
    kernel = prepare_kernel(h, fft_size=fft_size)
    got = _stream(x, kernel, block_frames)
    ref = _reference(x, h)
    assert got.shape == (frames + n - 1, max(s, c))
    np.testing.assert_allclose(got, ref, rtol=0, atol=TOL)


@pytest.mark.parametrize("s, c", [(1, 1), (2, 2), (1, 2), (3, 1)])
def test_block_size_one_on_a_tiny_signal(s, c):
    rng = np.random.default_rng(7 + s + 10 * c)
    x, h = _signal(rng, 40, s), _ir(rng, 9, c)
    kernel = prepare_kernel(h, fft_size=16)
    got = _stream(x, kernel, 1)
    np.testing.assert_allclose(got, _reference(x, h), rtol=0, atol=TOL)


def test_irregular_block_sizes_including_empty_blocks():
    rng = np.random.default_rng(11)
    x, h = _signal(rng, 5000, 2), _ir(rng, 400, 2)
    kernel = prepare_kernel(h, fft_size=1024)
    state = initial_state(kernel, channels=2)
    sizes = rng.integers(0, 900, 40)
    outs, start = [], 0
    for size in sizes:
        out, state = convolve_block(x[start : start + size], state, kernel=kernel)
        outs.append(out)
        start += size
    out, state = convolve_block(x[start:], state, kernel=kernel)
    outs += [out, flush(state, kernel=kernel)]
    np.testing.assert_allclose(np.concatenate(outs), _reference(x, h), rtol=0, atol=TOL)


@pytest.mark.parametrize("frames", [1, 5, 99])
@pytest.mark.parametrize("block_frames", [1, 3, 1000])
def test_input_shorter_than_the_ir(frames, block_frames):
    rng = np.random.default_rng(frames)
    x, h = _signal(rng, frames, 1), _ir(rng, 100, 2)
    kernel = prepare_kernel(h, fft_size=256)
    got = _stream(x, kernel, block_frames)
    assert got.shape == (frames + 99, 2)
    np.testing.assert_allclose(got, _reference(x, h), rtol=0, atol=TOL)


@pytest.mark.parametrize("channels", [1, 2])
@pytest.mark.parametrize("block_frames", [1, 7, 5000])
def test_ir_of_one_frame_is_the_identity(channels, block_frames):
    rng = np.random.default_rng(3)
    x = _signal(rng, 600 if block_frames == 1 else 3000, channels)
    kernel = prepare_kernel(np.ones((1, channels)), fft_size=64)
    got = _stream(x, kernel, block_frames)
    assert got.shape == x.shape
    np.testing.assert_allclose(got, x, rtol=0, atol=TOL)


@pytest.mark.parametrize("impulse_at", [0, 1, 499, 2047, 2999])
@pytest.mark.parametrize("block_frames", [7, 1000])
def test_impulse_lands_at_its_sample_plus_the_ir_offset(impulse_at, block_frames):
    n, offset = 300, 37
    h = np.zeros((n, 1))
    h[offset, 0] = 1.0
    h[offset + 1 :, 0] = 0.1 * np.exp(-np.arange(n - offset - 1) / 30.0)  # a decaying tail after the peak
    x = np.zeros((3000, 1))
    x[impulse_at, 0] = 1.0
    got = _stream(x, prepare_kernel(h, fft_size=1000), block_frames)
    assert int(np.argmax(np.abs(got[:, 0]))) == impulse_at + offset
    expected = np.zeros_like(got)
    expected[impulse_at : impulse_at + n] = h  # the IR, shifted by exactly impulse_at frames
    np.testing.assert_allclose(got, expected, rtol=0, atol=TOL)


@pytest.mark.parametrize("frames, n", [(3000, 200), (50, 200), (0, 20)])
@pytest.mark.parametrize("tail_frames", [None, 0, 1, "half", "full"])
def test_output_length(frames, n, tail_frames):
    rng = np.random.default_rng(5)
    x, h = _signal(rng, frames, 2), _ir(rng, n, 2)
    tail = {"full": n - 1, "half": n // 2 + 1}.get(tail_frames, tail_frames)
    kernel = prepare_kernel(h, fft_size=512)
    got = _stream(x, kernel, 333, tail_frames=tail)
    expected_frames = frames + (n - 1 if tail is None else tail)
    assert got.shape == (expected_frames, 2)
    if frames:
        np.testing.assert_allclose(got, _reference(x, h)[:expected_frames], rtol=0, atol=TOL)
    else:
        assert not np.any(got)  # the tail of an empty input is silence


def test_inputs_are_not_modified():
    rng = np.random.default_rng(9)
    x, h = _signal(rng, 900, 2), _ir(rng, 50, 2)
    x0, h0 = x.copy(), h.copy()
    kernel = prepare_kernel(h, fft_size=128)
    state = initial_state(kernel, channels=2)
    block = x[:100]
    out_a, state_a = convolve_block(block, state, kernel=kernel)
    block_copy = block.copy()
    # Reusing the caller's buffer after the call must not change what the state holds.
    out_b, _ = convolve_block(x[100:400], state_a, kernel=kernel)
    x[:100] = 99.0
    out_c, _ = convolve_block(x[100:400], state_a, kernel=kernel)
    np.testing.assert_array_equal(out_b, out_c)
    x[:100] = block_copy
    np.testing.assert_array_equal(x, x0)
    np.testing.assert_array_equal(h, h0)
    # An old state stays usable: feeding it again gives the same result.
    out_d, _ = convolve_block(x[:100], state, kernel=kernel)
    np.testing.assert_array_equal(out_a, out_d)


def test_state_size_does_not_grow_with_frames_processed():
    rng = np.random.default_rng(13)
    kernel = prepare_kernel(_ir(rng, 300, 2), fft_size=1025)  # block_frames = 726
    block = kernel.block_frames * 3 // 2  # every call transforms, and half a transform waits in the state half the time
    bound = 2 * kernel.fft_size * 8  # channels · K float64 values
    state = initial_state(kernel, channels=2)
    nbytes = {}
    for i in range(1, 1001):
        _, state = convolve_block(rng.uniform(-1, 1, (block, 2)), state, kernel=kernel)
        assert state.nbytes < bound
        # The state owns its arrays (no views keeping a larger block alive), so nbytes is its footprint.
        assert all(a.base is None for a in (state.history,) + state.pending)
        nbytes[i] = state.nbytes
    assert state.frames_in == 1000 * block
    # Same phase within a transform: same bytes, whatever has passed.
    assert nbytes[10] == nbytes[1000] and nbytes[11] == nbytes[999] and nbytes[11] > nbytes[10]
    assert len(pickle.dumps(state)) < bound + 4096


def test_state_is_picklable_and_resumes():
    rng = np.random.default_rng(17)
    x, h = _signal(rng, 4000, 1), _ir(rng, 250, 2)
    kernel = prepare_kernel(h, fft_size=700)
    state = initial_state(kernel, channels=1)
    out1, state = convolve_block(x[:1234], state, kernel=kernel)
    state = pickle.loads(pickle.dumps(state))
    assert isinstance(state, ConvolverState)
    out2, state = convolve_block(x[1234:], state, kernel=kernel)
    got = np.concatenate([out1, out2, flush(state, kernel=kernel)])
    np.testing.assert_allclose(got, _reference(x, h), rtol=0, atol=TOL)


@pytest.mark.parametrize(
    "s, c, expected",
    [(1, 1, 1), (2, 2, 2), (1, 2, 2), (1, 8, 8), (6, 1, 6), (8, 8, 8)],
)
def test_channel_mapping_counts(s, c, expected):
    assert output_channels(s, ir_channels=c) == expected


@pytest.mark.parametrize("s, c", [(3, 2), (2, 6), (6, 2)])
def test_channel_mismatch_is_an_error(s, c):
    kernel = prepare_kernel(np.ones((4, c)), fft_size=8)
    with pytest.raises(ParameterError, match=rf"ir has {c} channels, source has {s}: expected 1, or the same count"):
        initial_state(kernel, channels=s)


def test_block_with_wrong_channel_count_is_an_error():
    kernel = prepare_kernel(np.ones((4, 2)), fft_size=8)
    state = initial_state(kernel, channels=2)
    with pytest.raises(ParameterError, match=r"block has shape \(10, 3\): expected \(frames, 2\)"):
        convolve_block(np.zeros((10, 3)), state, kernel=kernel)
    with pytest.raises(ParameterError, match=r"block has shape \(10,\): expected \(frames, 2\)"):
        convolve_block(np.zeros(10), state, kernel=kernel)


def test_state_from_another_kernel_is_an_error():
    a = prepare_kernel(np.ones((4, 1)), fft_size=8)
    b = prepare_kernel(np.ones((4, 1)), fft_size=16)
    with pytest.raises(ParameterError, match=r"state is for fft_size = 8.*kernel has fft_size = 16"):
        convolve_block(np.zeros((3, 1)), initial_state(a, channels=1), kernel=b)


@pytest.mark.parametrize(
    "ir, fft_size, match",
    [
        (np.ones(5), None, r"ir has shape \(5,\): expected \(frames, channels\)"),
        (np.ones((0, 1)), None, r"ir has shape \(0, 1\)"),
        (np.array([[1.0], [np.nan]]), None, r"ir contains NaN or infinite"),
        (np.ones((10, 1)), 9, r"fft_size = 9: must be an integer >= ir frames = 10"),
    ],
)
def test_bad_kernel_arguments(ir, fft_size, match):
    with pytest.raises(ParameterError, match=match):
        prepare_kernel(ir, fft_size=fft_size)


@pytest.mark.parametrize("tail_frames", [-1, 20, 1.5])
def test_bad_tail_frames(tail_frames):
    kernel = prepare_kernel(np.ones((20, 1)), fft_size=64)
    with pytest.raises(ParameterError, match=r"tail_frames = .*: must be an integer from 0 to ir_frames - 1 = 19"):
        flush(initial_state(kernel, channels=1), kernel=kernel, tail_frames=tail_frames)
    with pytest.raises(ParameterError, match=r"tail_frames = .*: must be an integer from 0 to ir_frames - 1 = 19"):
        flush_blocks(initial_state(kernel, channels=1), kernel=kernel, tail_frames=tail_frames)  # at the call


# (pending frames left by the stream, as a fraction of a block; tail_frames or None for the whole tail)
FLUSH_CASES = [(0.0, None), (0.02, None), (0.5, 7), (0.98, None), (0.98, 0), (0.0, 0), (1 / 3, 150)]


@pytest.mark.parametrize("channels, ir_channels", [(1, 1), (2, 2), (1, 2)])
@pytest.mark.parametrize("pending, tail_frames", FLUSH_CASES)
def test_flush_blocks_are_flush_in_pieces_of_at_most_one_block(channels, ir_channels, pending, tail_frames):
    # Our own consistency rule: the pieces concatenated equal flush() bit for bit, each holds 1 to B frames,
    # and stream + pieces is the full linear convolution (scipy.signal.fftconvolve as the reference).
    rng = np.random.default_rng(41)
    h = _ir(rng, 200, ir_channels)
    kernel = prepare_kernel(h, fft_size=512)
    b = kernel.block_frames
    x = _signal(rng, 4 * b + int(round(pending * b)), channels)
    state = initial_state(kernel, channels=channels)
    outs = []
    for start in range(0, len(x), b):
        out, state = convolve_block(x[start : start + b], state, kernel=kernel)
        outs.append(out)
    assert state.pending_frames == len(x) % b
    pieces = list(flush_blocks(state, kernel=kernel, tail_frames=tail_frames))
    whole = flush(state, kernel=kernel, tail_frames=tail_frames)
    tail = h.shape[0] - 1 if tail_frames is None else tail_frames
    assert sum(p.shape[0] for p in pieces) == whole.shape[0] == state.pending_frames + tail
    assert all(1 <= p.shape[0] <= b and p.shape[1] == output_channels(channels, ir_channels=ir_channels) for p in pieces)
    assert all(p.dtype == np.float64 for p in pieces)
    if pieces:
        assert np.concatenate(pieces).tobytes() == whole.tobytes()
        # ... and equal bit for bit to transforming the pending input and the tail in one go (the old flush).
        nseg = -(-whole.shape[0] // b)
        zeros = np.zeros((channels, nseg * b - state.pending_frames))
        x_all = np.concatenate((state.history,) + state.pending + (zeros,), axis=1)
        one_go = _transform(x_all, nseg, kernel, output_channels(channels, ir_channels=ir_channels))
        assert one_go[:, : whole.shape[0]].T.tobytes() == whole.tobytes()
    else:
        assert whole.shape == (0, output_channels(channels, ir_channels=ir_channels))
    got = np.concatenate(outs + pieces)
    ref = _reference(x, h)[: len(x) + tail]
    assert got.shape == ref.shape
    np.testing.assert_allclose(got, ref, rtol=0, atol=TOL)


def _five_smooth(lo, hi):
    """Products 2^a 3^b 5^c in [lo, hi], built independently of scipy."""
    out, p2 = [], 1
    while p2 <= hi:
        p3 = p2
        while p3 <= hi:
            p5 = p3
            while p5 <= hi:
                if p5 >= lo:
                    out.append(p5)
                p5 *= 5
            p3 *= 3
        p2 *= 2
    return sorted(out)


@pytest.mark.parametrize("ir_frames", [1, 10, 1000, 2049, 48_000, 480_000, 1_440_000])
def test_cost_model_size_is_a_fast_length_at_least_twice_the_ir(ir_frames):
    k = choose_fft_size(ir_frames)
    assert 2 * ir_frames <= k <= 2**22
    assert scipy.fft.next_fast_len(k, real=True) == k


@pytest.mark.parametrize("ir_frames", [3, 100, 5000, 70_000])
def test_cost_model_picks_the_cheapest_candidate(ir_frames):
    max_fft = 2**20
    k = choose_fft_size(ir_frames, max_fft=max_fft, min_fft=1)
    # candidates: fast lengths from 2 N up to MAX_RATIO · N (memory traffic caps the search)
    candidates = _five_smooth(2 * ir_frames, min(max_fft, max(int(MAX_RATIO * ir_frames), 2 * ir_frames)))
    costs = [fft_cost_per_frame(c, ir_frames=ir_frames) for c in candidates]
    assert k == candidates[int(np.argmin(costs))]


def test_cost_model_respects_min_fft_and_max_fft():
    assert choose_fft_size(10) >= 4096  # the default floor
    assert choose_fft_size(1000, max_fft=2000) == 2000
    too_long = r"ir_frames = 3000000: needs an FFT size of at least 6000000.*max_fft = 4194304"
    with pytest.raises(ParameterError, match=too_long):
        choose_fft_size(3_000_000)
    with pytest.raises(ParameterError, match=r"ir_frames = 0: must be an integer >= 1"):
        choose_fft_size(0)


def test_cost_model_formula_on_a_hand_computed_case():
    # (2 · 1 · 8 · log2 8 + 8) / (8 - 5 + 1) = (48 + 8) / 4, worked by hand from the documented model
    assert fft_cost_per_frame(8, ir_frames=5, fft_cost=1.0) == pytest.approx(14.0)


def test_kernel_fields():
    h = np.ones((100, 2))
    kernel = prepare_kernel(h, fft_size=300)
    assert (kernel.fft_size, kernel.block_frames, kernel.ir_frames, kernel.ir_channels) == (300, 201, 100, 2)
    assert kernel.spectrum.shape == (2, 151) and kernel.spectrum.dtype == np.complex128
    # Spectrum of the zero-padded response; numpy's FFT as an independent reference
    np.testing.assert_allclose(kernel.spectrum, np.fft.rfft(h.T, n=300, axis=-1), rtol=0, atol=1e-9)


# -- a whole input in one transform ----------------------------------------------------------


@pytest.mark.parametrize("frames, s, n, c", [(1, 1, 1, 1), (3000, 1, 200, 1), (3000, 2, 200, 2), (2999, 1, 150, 2),
                                             (2500, 6, 90, 1), (10, 2, 4000, 2)])
@pytest.mark.parametrize("tail", [None, 0, "half"])
def test_whole_input_in_one_transform_matches_scipy(frames, s, n, c, tail):
    rng = np.random.default_rng(frames + 7 * s + n + c)
    x, h = _signal(rng, frames, s), _ir(rng, n, c)
    tail_frames = (n - 1) // 2 if tail == "half" else tail
    kernel = prepare_kernel(h, fft_size=scipy.fft.next_fast_len(frames + n - 1, real=True))
    got = convolve_whole(x, kernel=kernel, tail_frames=tail_frames)
    keep = frames + (n - 1 if tail_frames is None else tail_frames)
    assert got.shape == (keep, output_channels(s, ir_channels=c)) and got.flags.c_contiguous
    # scipy.signal.fftconvolve as the reference library, and the streamed path of this module.
    assert np.max(np.abs(got - _reference(x, h)[:keep])) < TOL
    stream_kernel = prepare_kernel(h)
    assert np.max(np.abs(got - _stream(x, stream_kernel, 1000, tail_frames=tail_frames))) < TOL


def test_whole_input_needs_a_transform_of_at_least_l_plus_n_minus_1():
    kernel = prepare_kernel(np.ones((100, 1)), fft_size=1000)
    convolve_whole(np.ones((901, 1)), kernel=kernel)  # 901 + 99 = 1000: fits
    with pytest.raises(ParameterError, match="at most 901"):
        convolve_whole(np.ones((902, 1)), kernel=kernel)
    with pytest.raises(ParameterError, match="tail_frames"):
        convolve_whole(np.ones((10, 1)), kernel=kernel, tail_frames=100)
    with pytest.raises(ParameterError, match="shape"):
        convolve_whole(np.ones((0, 1)), kernel=kernel)


def _transforms_cost(k):
    return 2.0 * k * np.log2(k) + k  # the model of fft_cost_per_frame, per transform


@pytest.mark.parametrize("ir_frames", [1, 200, 14_400, 165_840])
@pytest.mark.parametrize("input_frames", [1, 500, 48_000, 288_000, 1_000_000, 2_880_000])
@pytest.mark.parametrize("tail", ["full", "none"])
def test_whole_size_is_the_smallest_grid_size_that_fits_and_only_when_cheaper(ir_frames, input_frames, tail):
    tail_frames = ir_frames - 1 if tail == "full" else 0
    need = input_frames + ir_frames - 1
    grid = sorted(m << a for m in WHOLE_SIZES for a in range(0, 24))
    fits = min(size for size in grid if size >= need)
    stream_k = choose_fft_size(ir_frames)
    transforms = -(-(input_frames + tail_frames) // (stream_k - ir_frames + 1))
    cheaper = _transforms_cost(fits) < transforms * _transforms_cost(stream_k)
    expected = fits if (fits <= stream_k and cheaper) else None
    assert whole_fft_size(ir_frames, input_frames=input_frames, tail_frames=tail_frames) == expected


def test_whole_size_decisions_on_worked_cases():
    # 2 s through a 1 s response at 48 kHz: one transform of 9 * 2**14 = 147 456 >= 143 999 frames.
    assert whole_fft_size(48_000, input_frames=96_000) == 147_456
    # 10 min through the same response: streamed.
    assert whole_fft_size(48_000, input_frames=48_000 * 600) is None
    # An empty input has nothing to transform, and the arguments are checked.
    assert whole_fft_size(100, input_frames=0) is None
    for bad in ({"input_frames": -1}, {"input_frames": 1.5}, {"input_frames": 10, "tail_frames": 100}):
        with pytest.raises(ParameterError):
            whole_fft_size(100, **bad)
