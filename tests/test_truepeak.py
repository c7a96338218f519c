"""Specification of render.truepeak: BS.1770 Annex 2 true peak, streaming, shortcut == brute force."""

from __future__ import annotations

import math

import numpy as np
import pytest

from render.errors import ParameterError
from render.truepeak import (
    INTERPOLATOR,
    TruePeakResult,
    brute_force_true_peak,
    oversampling_factor,
    true_peak_dbtp,
    truepeak_init,
    truepeak_result,
    truepeak_update,
)
from render.units import db_to_gain, gain_to_db


def faded_tone(*, cycles_per_sample, amplitude, phase_deg, rate_hz=48000, seconds=1.0, fade_s=0.01):
    """Stereo sine, both channels alike, with raised-cosine fades at both ends.

    The fades are our choice: the Tech 3341 figures describe the steady tone, while an
    abrupt start from digital silence is a step whose band-limited reconstruction
    overshoots (up to 0.7 dB for the fs/8 case).
    """
    n = np.arange(int(seconds * rate_hz))
    x = amplitude * np.sin(2 * np.pi * cycles_per_sample * n + np.deg2rad(phase_deg))
    fade = int(fade_s * rate_hz)
    ramp = np.sin(np.linspace(0.0, np.pi / 2, fade)) ** 2
    x[:fade] *= ramp
    x[-fade:] *= ramp[::-1]
    return np.ascontiguousarray(np.stack([x, x], axis=1))


def reference_by_convolution(x, rate_hz):
    """Independent reference: zero-stuff, convolve with the interleaved 48-tap prototype.

    Same table, different arithmetic (numpy.convolve), so it checks tap order, phase
    selection and the zero padding at both ends.  Input samples are included, as in
    render.truepeak.
    """
    factor = oversampling_factor(rate_hz=rate_hz)
    prototype = INTERPOLATOR.T.reshape(-1)  # prototype[4 k + p] = INTERPOLATOR[p, k]
    peaks = []
    for c in range(x.shape[1]):
        stuffed = np.zeros(4 * x.shape[0])
        stuffed[::4] = x[:, c]
        y = np.convolve(stuffed, prototype)
        if factor == 2:
            # phases 0 and 2 only: output index 4 n + p
            keep = (np.arange(y.size) % 4) % 2 == 0
            y = y[keep]
        peaks.append(max(np.max(np.abs(y)), np.max(np.abs(x[:, c]))))
    return peaks


# --------------------------------------------------------------------------- the table


def test_table_interleaves_into_a_symmetric_prototype():
    # ITU-R BS.1770-4 Annex 2: the 48-tap interpolator is a linear-phase (symmetric) FIR;
    # a typo in one printed value would break the symmetry
    prototype = INTERPOLATOR.T.reshape(-1)
    assert prototype.shape == (48,)
    np.testing.assert_array_equal(prototype, prototype[::-1])


def test_no_phase_is_the_input_sample():
    # Checked rather than assumed: every printed phase is a fractional-delay filter with a
    # DC gain near 1 (1.0016 or 0.9730), none is a unit impulse
    dc = INTERPOLATOR.sum(axis=1)
    np.testing.assert_allclose(dc, [1.0016, 0.9730, 0.9730, 1.0016], atol=1e-4)
    assert np.all(np.abs(INTERPOLATOR).max(axis=1) < 0.98)


@pytest.mark.parametrize("rate_hz, factor", [(32000, 4), (44100, 4), (48000, 4), (88200, 4), (96000, 2), (192000, 2), (384000, 2)])
def test_oversampling_factor(rate_hz, factor):
    # ITU-R BS.1770-4 Annex 2: 4x; 2x is enough from 96 kHz (our choice above 192 kHz: still 2x)
    assert oversampling_factor(rate_hz=rate_hz) == factor


# --------------------------------------------------------------------------- published check values


@pytest.mark.parametrize(
    "cycles_per_sample, amplitude, phase_deg, expected_dbtp",
    [
        # EBU Tech 3341 cases 15-19 (48 kHz), tolerance +0.2 / -0.4 dB
        pytest.param(1 / 4, 0.5, 0.0, -6.0, id="case15"),
        pytest.param(1 / 4, 0.5, 45.0, -6.0, id="case16"),
        pytest.param(1 / 6, 0.5, 60.0, -6.0, id="case17"),
        pytest.param(1 / 8, 0.5, 67.5, -6.0, id="case18"),
        pytest.param(1 / 4, 1.41, 45.0, 3.0, id="case19"),
    ],
)
def test_tech_3341_true_peak(cycles_per_sample, amplitude, phase_deg, expected_dbtp):
    x = faded_tone(cycles_per_sample=cycles_per_sample, amplitude=amplitude, phase_deg=phase_deg)
    reading = true_peak_dbtp(x, rate_hz=48000).true_peak_dbtp
    assert expected_dbtp - 0.4 <= reading <= expected_dbtp + 0.2


def test_inter_sample_peak_above_sample_peak():
    # EBU Tech 3341 case 16: samples at 0.354 (-9 dBFS) hide a -6 dBTP peak
    x = faded_tone(cycles_per_sample=1 / 4, amplitude=0.5, phase_deg=45.0)
    result = true_peak_dbtp(x, rate_hz=48000)
    assert result.sample_peak_dbfs == pytest.approx(gain_to_db(0.5 * math.sin(math.pi / 4)), abs=1e-9)
    assert result.true_peak_dbtp > result.sample_peak_dbfs + 2.5


@pytest.mark.parametrize("rate_hz", [48000, 96000])
def test_matches_independent_convolution(rate_hz):
    # numpy.convolve of the zero-stuffed signal with the interleaved table as the reference
    rng = np.random.default_rng(21)
    x = rng.standard_normal((3000, 2)) * np.array([0.3, 0.05])
    ours = brute_force_true_peak(x, rate_hz=rate_hz).per_channel_dbtp
    np.testing.assert_allclose(ours, [gain_to_db(p) for p in reference_by_convolution(x, rate_hz)], atol=1e-9)


def test_last_samples_are_interpolated_via_zero_padding():
    # The interpolator lags ~6 samples, so the inter-sample values around the last samples
    # come out only after the end: with the 11-zero tail they are counted (+1.0 dBTP here,
    # equal to the full convolution); outputs up to the last input alone peak at -19 dB.
    x = np.zeros((200, 1))
    x[-3:, 0] = [-1.0, 1.0, -1.0]
    stuffed = np.zeros(4 * x.shape[0])
    stuffed[::4] = x[:, 0]
    within = np.max(np.abs(np.convolve(stuffed, INTERPOLATOR.T.reshape(-1))[: stuffed.size]))
    result = true_peak_dbtp(x, rate_hz=48000)
    assert result.true_peak_dbtp == pytest.approx(gain_to_db(reference_by_convolution(x, 48000)[0]), abs=1e-9)
    assert result.true_peak_dbtp > gain_to_db(within) + 15.0


@pytest.mark.parametrize("pad", [(0, 50), (50, 0), (7, 300)])
def test_surrounding_silence_changes_nothing(pad):
    rng = np.random.default_rng(22)
    x = rng.uniform(-1, 1, (500, 2))
    padded = np.pad(x, [pad, (0, 0)])
    assert true_peak_dbtp(padded, rate_hz=44100) == true_peak_dbtp(x, rate_hz=44100)


def test_isolated_full_scale_sample_reads_0_dbtp():
    # The input samples are counted with the interpolated ones (our choice); the table
    # alone would read 20 log10(0.97217) = -0.245 dBTP
    x = np.zeros((100, 1))
    x[50, 0] = 1.0
    assert true_peak_dbtp(x, rate_hz=48000).true_peak_dbtp == 0.0


@pytest.mark.parametrize("frames", [0, 1000])
def test_silence_reads_the_floor_not_minus_infinity(frames):
    result = true_peak_dbtp(np.zeros((frames, 2)), rate_hz=48000)
    assert result == TruePeakResult(true_peak_dbtp=-600.0, per_channel_dbtp=(-600.0, -600.0), sample_peak_dbfs=-600.0)


# --------------------------------------------------------------------------- shortcut == brute force


def _signals():
    rng = np.random.default_rng(23)
    n = np.arange(20000)
    cases = {}
    for level_db in (-40.0, -20.0, 0.0):
        cases[f"noise{level_db:+.0f}dB"] = rng.standard_normal((20000, 2)) * db_to_gain(level_db)
    for f in (0.45, 0.49, 0.499):
        cases[f"sine{f}"] = (0.9 * np.sin(2 * np.pi * f * n + 0.3))[:, None]
    square = np.clip(8.0 * np.sin(2 * np.pi * 997.0 * n / 48000), -1.0, 1.0)
    cases["clipped_square"] = np.stack([square, -0.5 * square], axis=1)
    cases["alternating"] = np.tile([1.0, -1.0], 5000)[:, None]
    # signs matching a phase's taps over one window: the bound sum|taps| * max|x| is reached
    worst = np.zeros((200, 1))
    worst[100:112, 0] = np.sign(INTERPOLATOR[1][::-1])
    cases["bound_attained"] = worst
    spikes = rng.standard_normal((20000, 1)) * 0.01
    spikes[rng.integers(0, 20000, 5), 0] = [0.9, -0.95, 0.7, 1.0, -0.99]
    cases["sparse_spikes"] = spikes
    return cases


SIGNALS = _signals()


@pytest.mark.parametrize("rate_hz", [48000, 96000])
@pytest.mark.parametrize("name", sorted(SIGNALS))
def test_shortcut_equals_brute_force_exactly(name, rate_hz):
    x = np.ascontiguousarray(SIGNALS[name])
    assert true_peak_dbtp(x, rate_hz=rate_hz) == brute_force_true_peak(x, rate_hz=rate_hz)


def test_shortcut_equals_brute_force_on_long_noise():
    # longer than one piece (65 536 samples, all channels), so the running maximum carries across pieces
    x = np.random.default_rng(24).standard_normal((200_000, 2)) * 0.1
    assert true_peak_dbtp(x, rate_hz=48000) == brute_force_true_peak(x, rate_hz=48000)


def _hard_cases():
    """Signals for the shortcut's paths and edges (our choice), each longer than one piece.

    Few candidate windows (gathered) and many (whole pieces on slices, inner phases
    first); a silent channel among loud ones; levels at which float32 screening
    underflows or overflows; more channels than two.
    """
    rng = np.random.default_rng(27)
    n = 70_000
    t = np.arange(n)[:, None]
    silent_left = rng.standard_normal((n, 2)) * 0.2
    silent_left[:, 0] = 0.0
    lowpass = np.cumsum(rng.standard_normal((n, 1)), axis=0)
    return {
        "clipped_noise": np.clip(rng.standard_normal((n, 2)) * 0.4, -0.5, 0.5),
        "tone_1khz": 0.7 * np.sin(2 * np.pi * 1000.0 * t / 48000.0 + np.array([0.0, 1.0])),
        "silent_left": silent_left,
        "random_walk": lowpass / np.abs(lowpass).max(),
        "float64_subnormal": rng.standard_normal((n, 1)) * 1e-310,
        "float32_underflow": rng.standard_normal((n, 2)) * 1e-41,
        "beyond_float32": rng.standard_normal((n, 1)) * 1e39,
        "six_channels": rng.standard_normal((n, 6)) * np.array([0.3, 0.01, 0.1, 0.0, 0.5, 0.05]),
    }


HARD_CASES = _hard_cases()


@pytest.mark.parametrize("rate_hz", [48000, 96000])
@pytest.mark.parametrize("name", sorted(HARD_CASES))
def test_shortcut_equals_brute_force_on_hard_cases(name, rate_hz):
    x = HARD_CASES[name]
    assert true_peak_dbtp(x, rate_hz=rate_hz) == brute_force_true_peak(x, rate_hz=rate_hz)


def test_sample_peak_is_exact_when_float32_cannot_tell_samples_apart():
    # The screening is in float32: 0.5 + 2**-40 rounds to 0.5 there, yet it is the sample peak
    # (and, alone, the true peak of an isolated sample), in a later piece than the 0.5.
    x = np.zeros((200_000, 1))
    x[10, 0] = 0.5
    x[150_000, 0] = 0.5 + 2.0**-40
    state = truepeak_init(rate_hz=48000, channels=1)
    for start in range(0, x.shape[0], 40_000):
        state = truepeak_update(x[start:start + 40_000], state)
    assert state.sample_peak[0] == 0.5 + 2.0**-40
    assert truepeak_result(state) == brute_force_true_peak(x, rate_hz=48000)


# --------------------------------------------------------------------------- streaming


def _stream(x, rate_hz, block_frames):
    state = truepeak_init(rate_hz=rate_hz, channels=x.shape[1])
    for start in range(0, x.shape[0], block_frames):
        state = truepeak_update(x[start:start + block_frames], state)
    return truepeak_result(state)


@pytest.mark.parametrize(
    "frames, block_frames",
    [(700, 1), (30000, 4801), (30000, 7), (30000, 10**6)],
)
def test_block_by_block_equals_one_pass_exactly(frames, block_frames):
    x = np.random.default_rng(25).standard_normal((frames, 2)) * np.array([0.25, 0.5])
    assert _stream(x, 48000, block_frames) == true_peak_dbtp(x, rate_hz=48000)


@pytest.mark.parametrize("layout", ["fortran", "strided"])
def test_non_contiguous_blocks_give_the_same_result(layout):
    # Blocks that are not C-contiguous are copied piece by piece instead of read in place.
    x = np.random.default_rng(28).standard_normal((100_000, 2)) * np.array([0.25, 0.5])
    y = np.asfortranarray(x) if layout == "fortran" else np.repeat(x, 2, axis=1)[:, ::2]
    assert not y.flags.c_contiguous
    assert _stream(y, 48000, 33_333) == _stream(x, 48000, 33_333) == brute_force_true_peak(x, rate_hz=48000)


def test_reading_does_not_disturb_the_stream():
    rng = np.random.default_rng(26)
    a, b = rng.standard_normal((1000, 1)) * 0.2, rng.standard_normal((1000, 1)) * 0.2
    state = truepeak_update(a, truepeak_init(rate_hz=48000, channels=1))
    assert truepeak_result(state) == true_peak_dbtp(a, rate_hz=48000)
    assert truepeak_result(truepeak_update(b, state)) == true_peak_dbtp(np.vstack([a, b]), rate_hz=48000)


def test_per_channel_and_overall():
    x = np.zeros((1000, 3))
    x[100, 0], x[200, 1], x[300, 2] = 0.5, -0.25, 0.125
    result = true_peak_dbtp(x, rate_hz=48000)
    np.testing.assert_allclose(result.per_channel_dbtp, [gain_to_db(v) for v in (0.5, 0.25, 0.125)])
    assert result.true_peak_dbtp == max(result.per_channel_dbtp)
    assert result.sample_peak_dbfs == gain_to_db(0.5)


# --------------------------------------------------------------------------- errors


def test_update_rejects_wrong_channel_count():
    with pytest.raises(ParameterError, match="block has 1 channels: expected 2"):
        truepeak_update(np.zeros((10, 1)), truepeak_init(rate_hz=48000, channels=2))


@pytest.mark.parametrize("func", [true_peak_dbtp, brute_force_true_peak])
def test_rejects_1d_signal(func):
    with pytest.raises(ParameterError, match=r"signal.ndim = 1: expected a 2-D \(frames, channels\) array"):
        func(np.zeros(100), rate_hz=48000)


@pytest.mark.parametrize("rate", [0, -1.0, float("inf")])
def test_rejects_bad_rate(rate):
    with pytest.raises(ParameterError, match=r"rate_hz = .*: must be > 0 Hz"):
        truepeak_init(rate_hz=rate, channels=1)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("frame, channel", [(0, 0), (99_999, 2), (65_000, 1)])
def test_rejects_non_finite_samples_anywhere(bad, frame, channel):
    # in the first piece, in the last frame, in a later piece; in any channel of three
    x = np.random.default_rng(29).standard_normal((100_000, 3)) * 0.1
    x[frame, channel] = bad
    with pytest.raises(ParameterError, match="NaN or infinite"):
        truepeak_update(x, truepeak_init(rate_hz=48000, channels=3))


def test_rejects_non_finite_samples_and_keeps_old_state():
    state = truepeak_update(np.full((10, 1), 0.5), truepeak_init(rate_hz=48000, channels=1))
    bad = np.zeros((10, 1))
    bad[3, 0] = np.inf
    with pytest.raises(ParameterError, match="NaN or infinite"):
        truepeak_update(bad, state)
    assert truepeak_result(state).sample_peak_dbfs == gain_to_db(0.5)
