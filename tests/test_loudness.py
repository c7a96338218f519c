"""Specification of render.loudness: BS.1770 integrated loudness, EBU momentary/short-term, LRA."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pyloudnorm
import pytest
from scipy import signal as sps

from render import loudness
from render.errors import ParameterError
from render.loudness import (
    LoudnessResult,
    default_weights,
    k_weighting_sos,
    measure,
    meter_init,
    meter_result,
    meter_update,
)
from render.units import db_to_gain

# ITU-R BS.1770-4 Annex 1, Tables 1 and 2 (48 kHz), as [b0, b1, b2, a0, a1, a2].
PUBLISHED_48K = np.array(
    [
        [1.53512485958697, -2.69169618940638, 1.19839281085285, 1.0, -1.69065929318241, 0.73248077421585],
        [1.0, -2.0, 1.0, 1.0, -1.99004745483398, 0.99007225036621],
    ]
)


def sine_segments(levels_dbfs, durations_s, *, rate_hz, freq_hz=1000.0, channel_levels_db=(0.0, 0.0)):
    """A phase-continuous sine whose per-channel peak level steps through ``levels_dbfs``.

    ``channel_levels_db`` offsets each channel (0 dB = the segment level).
    """
    counts = [int(round(d * rate_hz)) for d in durations_s]
    envelope = np.repeat([db_to_gain(level) for level in levels_dbfs], counts)
    n = np.arange(envelope.size)
    tone = envelope * np.sin(2 * np.pi * freq_hz * n / rate_hz)
    return np.ascontiguousarray(tone[:, None] * db_to_gain(np.asarray(channel_levels_db, dtype=float))[None, :])


def finite_or_none(result):
    return all(v is None or math.isfinite(v) for v in dataclasses.astuple(result) if not isinstance(v, str))


# --------------------------------------------------------------------------- K-weighting


def test_48k_uses_published_coefficients():
    # ITU-R BS.1770-4 Annex 1, Tables 1 and 2
    np.testing.assert_array_equal(k_weighting_sos(rate_hz=48000), PUBLISHED_48K)


def test_prototype_rederived_at_48k_matches_published_coefficients():
    # ITU-R BS.1770-4: the analog prototype re-derived at 48 kHz must give the printed table
    derived = loudness._derived_sos(48000.0)
    np.testing.assert_allclose(derived, PUBLISHED_48K, rtol=0, atol=1e-6)


@pytest.mark.parametrize("rate_hz", [32000, 44100, 88200, 96000, 192000])
def test_rederived_coefficients_match_pyloudnorm_deman(rate_hz):
    # pyloudnorm 0.2.0 "DeMan" filters as the reference library (same prototype, same derivation)
    meter = pyloudnorm.Meter(rate_hz, filter_class="DeMan")
    shelf = meter._filters["high_shelf_DeMan"]
    highpass = meter._filters["high_pass_DeMan"]
    reference = np.array([np.r_[shelf.b, shelf.a], np.r_[highpass.b, highpass.a]])
    np.testing.assert_allclose(k_weighting_sos(rate_hz=rate_hz), reference, rtol=0, atol=1e-9)


@pytest.mark.parametrize("rate_hz", [44100, 96000])
def test_rederived_response_close_to_48k_response(rate_hz):
    # Same magnitude response as the published 48 kHz filter, 20 Hz - 15 kHz. The
    # high-pass numerator stays 1, -2, 1 at every rate (as in the standard's table and
    # in pyloudnorm), which shifts the pass-band gain with rate by up to 0.03 dB.
    freqs = np.array([20.0, 100.0, 500.0, 1000.0, 2000.0, 5000.0, 10000.0, 15000.0])
    _, ours = sps.sosfreqz(k_weighting_sos(rate_hz=rate_hz), worN=freqs, fs=rate_hz)
    _, ref = sps.sosfreqz(PUBLISHED_48K, worN=freqs, fs=48000)
    np.testing.assert_allclose(20 * np.log10(np.abs(ours) / np.abs(ref)), 0.0, atol=0.03)


# --------------------------------------------------------------------------- weights


@pytest.mark.parametrize(
    "channels, expected",
    [
        (1, (1.0,)),
        (2, (1.0, 1.0)),
        (3, (1.0, 1.0, 1.0)),
        (5, (1.0, 1.0, 1.0, 1.41, 1.41)),  # L R C Ls Rs, ITU-R BS.1770-4 Table 3
        (6, (1.0, 1.0, 1.0, 0.0, 1.41, 1.41)),  # L R C LFE Ls Rs (common practice order)
        (8, (1.0,) * 8),
    ],
)
def test_default_weights(channels, expected):
    assert default_weights(channels) == expected


def test_lfe_channel_does_not_count():
    # ITU-R BS.1770-4: LFE excluded
    rng = np.random.default_rng(11)
    five = rng.standard_normal((48000 * 2, 5)) * 0.05
    six = np.insert(five, 3, rng.standard_normal(five.shape[0]) * 0.9, axis=1)
    assert measure(six, rate_hz=48000).integrated_lufs == pytest.approx(
        measure(five, rate_hz=48000).integrated_lufs, abs=1e-9
    )


# --------------------------------------------------------------------------- against pyloudnorm


def _noise(rng, frames, channels, rate_hz):
    return rng.standard_normal((frames, channels)) * np.linspace(0.05, 0.2, channels)


def _tones(rng, frames, channels, rate_hz):
    n = np.arange(frames)[:, None]
    freqs = rng.uniform(60.0, 12000.0, channels)
    amps = rng.uniform(0.05, 0.5, channels)
    return amps * np.sin(2 * np.pi * freqs * n / rate_hz + rng.uniform(0, 2 * np.pi, channels))


@pytest.mark.parametrize("rate_hz", [44100, 48000, 96000])
@pytest.mark.parametrize("channels", [1, 2, 5])
@pytest.mark.parametrize("make", [_noise, _tones], ids=["noise", "tones"])
def test_integrated_matches_pyloudnorm(rate_hz, channels, make):
    # pyloudnorm 0.2.0 with filter_class="DeMan" as the reference library. Lengths are
    # whole multiples of 100 ms (here 2.3 s), so pyloudnorm's block count holds no
    # incomplete final block; its gate uses >= where BS.1770 says >, which only matters
    # for blocks exactly at a threshold.
    rng = np.random.default_rng(1000 + rate_hz + 10 * channels)
    x = make(rng, int(2.3 * rate_hz), channels, rate_hz)
    reference = pyloudnorm.Meter(rate_hz, filter_class="DeMan").integrated_loudness(x)
    assert measure(x, rate_hz=rate_hz).integrated_lufs == pytest.approx(reference, abs=0.01)


def test_loudness_range_matches_pyloudnorm_on_a_stepped_tone():
    # pyloudnorm 0.2.0 as the reference library; it appends 1.5 s of silence and uses
    # np.percentile (linear interpolation) instead of Tech 3342's rounding, so allow 0.2 LU
    x = sine_segments([-20, -26, -32, -24], [5, 5, 5, 5], rate_hz=48000)
    reference = pyloudnorm.Meter(48000, filter_class="DeMan").loudness_range(x)
    assert measure(x, rate_hz=48000).loudness_range_lu == pytest.approx(reference, abs=0.2)


# --------------------------------------------------------------------------- published check values


@pytest.mark.parametrize("channel", [0, 1])
def test_997hz_full_scale_in_one_channel_reads_minus_3_01(channel):
    # ITU-R BS.1770-4 Annex 1: 0 dBFS 997 Hz sine in one channel -> -3.01 LKFS
    rate = 48000
    x = np.zeros((rate * 4, 2))
    x[:, channel] = np.sin(2 * np.pi * 997.0 * np.arange(rate * 4) / rate)
    assert measure(x, rate_hz=rate).integrated_lufs == pytest.approx(-3.01, abs=0.01)


@pytest.mark.parametrize("rate_hz", [44100, 96000])
def test_997hz_at_other_rates(rate_hz):
    # ITU-R BS.1770-4 Annex 1 check value; the re-derived filters keep the 1, -2, 1
    # high-pass numerator, whose gain varies with rate by up to 0.03 dB (see above)
    x = np.zeros((rate_hz * 4, 2))
    x[:, 0] = np.sin(2 * np.pi * 997.0 * np.arange(rate_hz * 4) / rate_hz)
    assert measure(x, rate_hz=rate_hz).integrated_lufs == pytest.approx(-3.01, abs=0.03)


TECH_3341_INTEGRATED = [
    # EBU Tech 3341, cases 1-6: 1 kHz sines, levels are per-channel peak, expected I = -23.0 / -33.0
    pytest.param([-23.0], [20.0], (0.0, 0.0), -23.0, id="case1"),
    pytest.param([-33.0], [20.0], (0.0, 0.0), -33.0, id="case2"),
    pytest.param([-36.0, -23.0, -36.0], [10.0, 60.0, 10.0], (0.0, 0.0), -23.0, id="case3"),
    pytest.param([-72.0, -36.0, -23.0, -36.0, -72.0], [10.0, 10.0, 60.0, 10.0, 10.0], (0.0, 0.0), -23.0, id="case4"),
    pytest.param([-26.0, -20.0, -26.0], [20.0, 20.1, 20.0], (0.0, 0.0), -23.0, id="case5"),
    # case 6: L, R -28, C -24, Ls, Rs -30 dBFS; duration 20 s (from memory)
    pytest.param([0.0], [20.0], (-28.0, -28.0, -24.0, -30.0, -30.0), -23.0, id="case6"),
]


@pytest.mark.parametrize("levels, durations, channel_levels, expected", TECH_3341_INTEGRATED)
def test_tech_3341_integrated(levels, durations, channel_levels, expected):
    # EBU Tech 3341 minimum requirements, tolerance +-0.1 LU
    x = sine_segments(levels, durations, rate_hz=48000, channel_levels_db=channel_levels)
    assert measure(x, rate_hz=48000).integrated_lufs == pytest.approx(expected, abs=0.1)


def test_tech_3341_case9_short_term():
    # EBU Tech 3341 case 9: (1.34 s at -20 + 1.66 s at -30 dBFS) x 5 -> S = -23.0 +-0.1 after 3 s
    x = sine_segments([-20.0, -30.0] * 5, [1.34, 1.66] * 5, rate_hz=48000)
    assert measure(x, rate_hz=48000).short_term_max_lufs == pytest.approx(-23.0, abs=0.1)


def test_tech_3341_case12_momentary():
    # EBU Tech 3341 case 12: (0.18 s at -20 + 0.22 s at -30 dBFS) x 25 -> M = -23.0 +-0.1 after 1 s
    x = sine_segments([-20.0, -30.0] * 25, [0.18, 0.22] * 25, rate_hz=48000)
    assert measure(x, rate_hz=48000).momentary_max_lufs == pytest.approx(-23.0, abs=0.1)


@pytest.mark.parametrize(
    "levels, expected",
    [
        # EBU Tech 3342 Table 1: stereo 1 kHz sines, per-channel peak levels, 20 s each
        pytest.param([-20.0, -30.0], 10.0, id="case1"),
        pytest.param([-20.0, -15.0], 5.0, id="case2"),
        pytest.param([-40.0, -20.0], 20.0, id="case3"),
        pytest.param([-50.0, -35.0, -20.0, -35.0, -50.0], 15.0, id="case4"),
    ],
)
def test_tech_3342_loudness_range(levels, expected):
    # EBU Tech 3342, tolerance +-1 LU
    x = sine_segments(levels, [20.0] * len(levels), rate_hz=48000)
    assert measure(x, rate_hz=48000).loudness_range_lu == pytest.approx(expected, abs=1.0)


def test_relative_gate_ignores_quiet_passage():
    # ITU-R BS.1770-4 relative gate (-10 LU): a passage 20 dB down is gated out, so the
    # reading is that of the loud part alone to within the 3 blocks that straddle the
    # step (0.07 LU here), far from the ungated mean 3 LU lower
    loud = measure(sine_segments([-20.0], [10.0], rate_hz=48000), rate_hz=48000).integrated_lufs
    both = measure(sine_segments([-20.0, -40.0], [10.0, 10.0], rate_hz=48000), rate_hz=48000).integrated_lufs
    assert both == pytest.approx(loud, abs=0.1)


# --------------------------------------------------------------------------- streaming


def _stream(x, rate_hz, block_frames):
    state = meter_init(rate_hz=rate_hz, channels=x.shape[1])
    for start in range(0, x.shape[0], block_frames):
        state = meter_update(x[start:start + block_frames], state)
    return meter_result(state)


def _assert_results_close(a, b, tol=1e-12):
    for field in dataclasses.fields(LoudnessResult):
        va, vb = getattr(a, field.name), getattr(b, field.name)
        if isinstance(va, float):
            assert vb == pytest.approx(va, abs=tol), field.name
        else:
            assert va == vb, field.name


@pytest.mark.parametrize("block_frames", [4801, 997, 10**7])
def test_block_by_block_equals_one_pass(block_frames):
    rng = np.random.default_rng(5)
    x = rng.standard_normal((int(48000 * 3.45), 2)) * np.array([0.1, 0.03])
    one_pass = measure(x, rate_hz=48000)
    assert one_pass.loudness_range_lu is not None
    _assert_results_close(one_pass, _stream(x, 48000, block_frames))


def test_sample_by_sample_equals_one_pass():
    # block size 1 on a short signal (0.65 s at 8 kHz: 5200 updates)
    rng = np.random.default_rng(6)
    x = rng.standard_normal((5200, 2)) * 0.1
    one_pass = measure(x, rate_hz=8000)
    assert one_pass.integrated_lufs is not None
    _assert_results_close(one_pass, _stream(x, 8000, 1))


def test_irregular_blocks_and_empty_blocks_equal_one_pass():
    rng = np.random.default_rng(7)
    x = rng.standard_normal((44100 * 4, 1)) * 0.2
    state = meter_init(rate_hz=44100, channels=1)
    cuts = np.sort(rng.integers(0, x.shape[0], 40))
    for a, b in zip(np.r_[0, cuts], np.r_[cuts, x.shape[0]]):
        state = meter_update(x[a:b], state)  # some blocks are empty
    _assert_results_close(measure(x, rate_hz=44100), meter_result(state))


def test_old_states_stay_valid_after_branching():
    # Updating an earlier state again must not disturb the states derived from it.
    rng = np.random.default_rng(8)
    a, b, c = (rng.standard_normal((48000 * 2, 1)) * s for s in (0.1, 0.3, 0.01))
    s1 = meter_update(a, meter_init(rate_hz=48000, channels=1))
    s2 = meter_update(b, s1)
    s3 = meter_update(c, s1)  # branch from s1
    _assert_results_close(measure(np.vstack([a, b]), rate_hz=48000), meter_result(s2))
    _assert_results_close(measure(np.vstack([a, c]), rate_hz=48000), meter_result(s3))
    _assert_results_close(measure(a, rate_hz=48000), meter_result(s1))


def _reference_hop_energies(x, rate_hz, weights):
    """Independent reference (our choice): one sosfilt call over everything, then per-hop sums."""
    active = [c for c, w in enumerate(weights) if w > 0]
    y = sps.sosfilt(k_weighting_sos(rate_hz=rate_hz), x[:, active], axis=0)
    hop = int(round(rate_hz / 10))
    whole = y.shape[0] // hop
    per_channel = np.square(y[: whole * hop]).reshape(whole, hop, len(active)).sum(axis=1)
    return per_channel @ np.array([weights[c] for c in active])


@pytest.mark.parametrize(
    "rate_hz, weights, block_frames",
    [
        (48000, (1.0, 1.0), 400_000),  # blocks of several filter pieces, ending mid-hop
        (48000, (1.0, 1.0, 1.0, 0.0, 1.41, 1.41), 4801),  # LFE left out; blocks split hops
        (44100, (0.5, 2.0), 100_003),
        (8000, (1.0,), 1),
    ],
)
def test_hop_energies_match_a_direct_computation(rate_hz, weights, block_frames):
    # The meter filters in pieces and sums squares per hop; the sums must equal a direct
    # computation to rounding (1e-12 relative, our choice; observed ~1e-15).
    rng = np.random.default_rng(12)
    frames = 3_001 if block_frames == 1 else int(rate_hz * 11.37)
    x = rng.standard_normal((frames, len(weights))) * rng.uniform(0.01, 0.5, len(weights))
    state = meter_init(rate_hz=rate_hz, channels=len(weights), channel_weights=weights)
    for start in range(0, frames, block_frames):
        state = meter_update(x[start:start + block_frames], state)
    np.testing.assert_allclose(state.hop_energies(), _reference_hop_energies(x, rate_hz, weights), rtol=1e-12, atol=0)


@pytest.mark.parametrize("layout", ["fortran", "strided"])
def test_non_contiguous_input_gives_the_same_result(layout):
    x = np.random.default_rng(13).standard_normal((48000 * 4, 2)) * np.array([0.1, 0.2])
    y = np.asfortranarray(x) if layout == "fortran" else np.repeat(x, 2, axis=1)[:, ::2]
    assert not y.flags.c_contiguous
    _assert_results_close(measure(x, rate_hz=48000), measure(y, rate_hz=48000), tol=0.0)


def test_memory_is_one_float_per_hop():
    x = np.random.default_rng(9).standard_normal((48000 * 5 + 1234, 2)) * 0.1
    state = meter_update(x, meter_init(rate_hz=48000, channels=2))
    assert state.hop_energies().shape == (50,)


# --------------------------------------------------------------------------- not measurable


def test_shorter_than_one_block():
    result = measure(np.full((int(0.3 * 48000), 2), 0.5), rate_hz=48000)
    assert result.integrated_lufs is None and result.momentary_max_lufs is None
    assert "not measurable: shorter than 0.4 s" in result.reason
    assert finite_or_none(result)


def test_digital_silence():
    result = measure(np.zeros((48000 * 5, 2)), rate_hz=48000)
    assert result.integrated_lufs is None and result.loudness_range_lu is None
    assert result.momentary_max_lufs is None and result.short_term_max_lufs is None
    assert "not measurable: silence (no block above -70 LUFS)" in result.reason
    assert finite_or_none(result)


def test_signal_below_absolute_gate():
    # -90 dBFS noise: below -70 LUFS, so no integrated value, but momentary is a real reading
    x = np.random.default_rng(10).standard_normal((48000 * 4, 2)) * db_to_gain(-90.0)
    result = measure(x, rate_hz=48000)
    assert result.integrated_lufs is None
    assert result.momentary_max_lufs < -70.0
    assert "silence" in result.reason
    assert finite_or_none(result)


def test_between_one_block_and_three_seconds():
    x = sine_segments([-20.0], [1.0], rate_hz=48000)
    result = measure(x, rate_hz=48000)
    assert result.integrated_lufs is not None
    assert result.short_term_max_lufs is None and result.loudness_range_lu is None
    assert result.reason == "short-term loudness and loudness range not measurable: shorter than 3 s"


def test_empty_signal():
    result = measure(np.zeros((0, 2)), rate_hz=48000)
    assert result.integrated_lufs is None and "shorter than 0.4 s" in result.reason


# --------------------------------------------------------------------------- errors


def test_update_rejects_wrong_channel_count():
    state = meter_init(rate_hz=48000, channels=2)
    with pytest.raises(ParameterError, match="block has 3 channels: expected 2"):
        meter_update(np.zeros((10, 3)), state)


@pytest.mark.parametrize("bad", [np.zeros(100), np.zeros((2, 3, 4))])
def test_update_rejects_non_2d(bad):
    with pytest.raises(ParameterError, match=r"block.ndim = \d: expected a 2-D \(frames, channels\) array"):
        meter_update(bad, meter_init(rate_hz=48000, channels=1))


def test_measure_rejects_1d():
    with pytest.raises(ParameterError, match="signal.ndim = 1"):
        measure(np.zeros(48000), rate_hz=48000)


@pytest.mark.parametrize("rate", [0, -48000, 0.0, float("nan")])
def test_rejects_non_positive_rate(rate):
    with pytest.raises(ParameterError, match=r"rate_hz = .*: must be > 0 Hz"):
        meter_init(rate_hz=rate, channels=2)


def test_rejects_rate_too_low_for_k_weighting():
    with pytest.raises(ParameterError, match="rate_hz = 4000: K-weighting needs a rate >= 8000 Hz"):
        measure(np.zeros((4000, 1)), rate_hz=4000)


@pytest.mark.parametrize(
    "weights, match",
    [
        ((1.0,), "channel_weights has 1 values: expected 2"),
        ((1.0, -1.0), r"channel_weights\[1\] = -1.0: must be a finite number >= 0"),
        ((0.0, 0.0), "at least one weight must be > 0"),
    ],
)
def test_rejects_bad_weights(weights, match):
    with pytest.raises(ParameterError, match=match):
        meter_init(rate_hz=48000, channels=2, channel_weights=weights)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize(
    "frame, channel",
    [
        (0, 0),  # the first frame
        (70_000, 1),  # a later filter piece
        (94_400, 2),  # the rest of the hop a previous block left open
        (96_500, 4),  # the hop still open at the end
        (50_000, 3),  # the LFE channel (weight 0, not filtered)
    ],
)
def test_rejects_non_finite_samples_anywhere(bad, frame, channel):
    # Finiteness is read off the per-hop sums of squares (and checked directly for
    # channels weighted 0): every position must still be caught.
    x = np.random.default_rng(14).standard_normal((97_000, 6)) * 0.1
    x[frame, channel] = bad
    split = 94_321  # the first block ends mid-hop
    state = meter_init(rate_hz=48000, channels=6)
    block = x[:split]
    if frame >= split:
        state = meter_update(block, state)
        block = x[split:]
    with pytest.raises(ParameterError, match="block contains NaN or infinite samples"):
        meter_update(block, state)
    with pytest.raises(ParameterError, match="signal contains NaN or infinite samples"):
        measure(x, rate_hz=48000)


def test_finite_samples_whose_squares_overflow_are_not_called_non_finite():
    # The check on the sums of squares falls back to the samples themselves (our choice:
    # such input is absurd, but finite, and was accepted before).
    x = np.full((48000, 1), 1e200)
    state = meter_update(x, meter_init(rate_hz=48000, channels=1))
    assert np.isinf(state.hop_energies()).all()


def test_rejects_integer_and_non_finite_samples():
    state = meter_init(rate_hz=48000, channels=1)
    with pytest.raises(ParameterError, match="dtype = int16: expected floating-point"):
        meter_update(np.zeros((10, 1), dtype=np.int16), state)
    with pytest.raises(ParameterError, match="NaN or infinite"):
        meter_update(np.full((10, 1), np.nan), state)
