"""Specification of render.limiter: a true-peak look-ahead limiter's gain curve, streaming."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import resample_poly

import render.limiter
from render.errors import ParameterError
from render.limiter import (
    HOLD_FRAMES,
    SAFETY_MARGIN_DB,
    limit,
    limiter_flush,
    limiter_init,
    limiter_result,
    limiter_update,
    peak_envelope,
)
from render.truepeak import brute_force_true_peak, oversampling_factor, true_peak_dbtp
from render.units import db_to_gain, gain_to_db

RATES = (44100, 48000, 96000)


# --------------------------------------------------------------------------- material


def fade(x, rate_hz, fade_s=0.005):
    """Raised-cosine fades at both ends (so the material ends at zero)."""
    n = int(fade_s * rate_hz)
    ramp = np.sin(np.linspace(0.0, np.pi / 2, n)) ** 2
    x = x.copy()
    x[:n] *= ramp[:, None]
    x[-n:] *= ramp[::-1, None]
    return x


def band_limit(x, rate_hz, f_max_hz):
    """Zero every DFT bin above f_max_hz (a brickwall, done on the whole signal)."""
    spectrum = np.fft.rfft(x, axis=0)
    spectrum[np.fft.rfftfreq(x.shape[0], 1.0 / rate_hz) > f_max_hz] = 0.0
    return np.fft.irfft(spectrum, x.shape[0], axis=0)


def material(name, rate_hz, seconds=0.2, seed=7):
    """(signal, highest frequency in Hz) of a named loud test signal (invented material)."""
    rng = np.random.default_rng(seed)
    frames = int(seconds * rate_hz)
    n = np.arange(frames)
    if name == "noise bursts":
        gate = (np.sin(2 * np.pi * 15 * n / rate_hz) > 0.3).astype(float)
        x = rng.standard_normal((frames, 2)) * gate[:, None]
        f_max = rate_hz / 4
        x = fade(band_limit(x, rate_hz, f_max), rate_hz)
        return x * (2.0 / np.max(np.abs(x))), f_max
    if name == "sine near Nyquist":
        f = 0.45 * rate_hz
        x = 2.0 * np.sin(2 * np.pi * f * n / rate_hz + 0.4)[:, None]
        return fade(x, rate_hz), f
    if name == "clipped square":
        x = np.clip(4.0 * np.sin(2 * np.pi * 997 * n / rate_hz), -1.0, 1.0)[:, None] * np.ones((1, 2))
        return x, rate_hz / 2  # clipped digitally: content up to Nyquist
    if name == "full-scale spike":
        x = np.zeros((frames, 1))
        x[frames // 2] = 1.0
        return x, rate_hz / 2
    if name == "one hot channel":
        quiet = 0.03 * band_limit(rng.standard_normal((frames, 1)), rate_hz, rate_hz / 4)
        hot = 2.0 * np.sin(2 * np.pi * 1000 * n / rate_hz)[:, None]
        return fade(np.concatenate([quiet, hot], axis=1), rate_hz), rate_hz / 4
    if name == "clipped noise":  # heavy limiting: most frames need reduction
        return np.clip(0.8 * rng.standard_normal((frames, 2)), -1.0, 1.0), rate_hz / 2
    if name == "spike train":
        # Sparse peaks in silence: the second is louder than the first's release curve (the release
        # restarts), the third quieter (it stays under the curve), then two close together.
        x = np.zeros((frames, 2))
        for where, height in ((0.15, 1.5), (0.3, 2.5), (0.45, 1.2), (0.7, 2.0), (0.71, 1.8)):
            x[int(where * frames), int(where * 10) % 2] = height
        return x, rate_hz / 2
    raise KeyError(name)


MATERIALS = ("noise bursts", "sine near Nyquist", "clipped square", "full-scale spike", "one hot channel")


def reference_peak_db(y):
    """Band-limited peak by 16x polyphase resampling, zero padded (scipy as the reference library)."""
    pad = np.zeros((256, y.shape[1]))
    z = np.concatenate([pad, y, pad])
    return gain_to_db(max(float(np.max(np.abs(resample_poly(z[:, c], 16, 1)))) for c in range(z.shape[1])))


def under_read_db(f_max_hz, rate_hz):
    """Worst-case BS.1770 under-read at f_max: -20 log10 cos(pi f / (n fs)) (ITU-R BS.1770 Annex 2)."""
    n = oversampling_factor(rate_hz=rate_hz)
    return -20.0 * math.log10(math.cos(math.pi * f_max_hz / (rate_hz * n)))


def stream(x, block, **kwargs):
    state = limiter_init(channels=x.shape[1], **kwargs)
    gains = []
    for start in range(0, x.shape[0], block):
        g, state = limiter_update(x[start:start + block], state)
        gains.append(g)
    g, state = limiter_flush(state)
    gains.append(g)
    return np.concatenate(gains), state


# --------------------------------------------------------------------------- streaming


@pytest.mark.parametrize("name", ["noise bursts", "clipped noise", "spike train"])
@pytest.mark.parametrize(
    "frames, block",
    # 73 = K + 1 frames, the attack's reach; 70000 > the internal piece
    [(400, 1), (9600, 7), (9600, 73), (9600, 4801), (9600, 20000), (70000, 4801)],
)
def test_block_by_block_gains_equal_one_pass_exactly(name, frames, block):
    x, _ = material(name, 48000, seconds=frames / 48000)
    settings = dict(rate_hz=48000, ceiling_dbtp=-3.0, lookahead_ms=1.5, release_ms=20.0)
    _, one_pass, _ = limit(x, **settings)
    blocked, state = stream(x, block, **settings)
    assert blocked.shape == (frames,)
    assert np.array_equal(blocked, one_pass)
    assert limiter_result(state).frames == frames


@pytest.mark.parametrize("rate_hz", RATES)
def test_gains_trail_the_input_by_the_latency(rate_hz):
    x, _ = material("noise bursts", rate_hz, seconds=0.05)
    state = limiter_init(rate_hz=rate_hz, channels=2, ceiling_dbtp=-1.0)
    fed = 0
    for block in (1, 3, 50, 200, 1000):
        g, state = limiter_update(x[fed:fed + block], state)
        fed += block
        assert state.frames_out == max(0, fed - state.latency_frames)
    # 1.5 ms look-ahead + hold + the interpolator's 6 frames to the right
    assert state.latency_frames == round(1.5e-3 * rate_hz) + HOLD_FRAMES + 6


def test_an_empty_block_changes_nothing():
    state = limiter_init(rate_hz=48000, channels=1, ceiling_dbtp=-1.0)
    g, new = limiter_update(np.zeros((0, 1)), state)
    assert g.shape == (0,) and new.frames_in == 0 and new.frames_out == 0


# --------------------------------------------------------------------------- the design, restated


def reference_gain(x, *, rate_hz, ceiling_dbtp, lookahead_ms, release_ms):
    """The module docstring's five steps, written as plain loops (independent arithmetic)."""
    K = round(lookahead_ms * 1e-3 * rate_hz)
    H = HOLD_FRAMES
    lead = K + 6
    padded = np.concatenate([np.zeros((lead, x.shape[1])), x, np.zeros((6, x.shape[1]))])
    p = peak_envelope(padded, rate_hz=rate_hz)
    t = db_to_gain(ceiling_dbtp - SAFETY_MARGIN_DB)
    g_req = np.where(p > t, t / np.maximum(p, 1e-300), 1.0)
    n_all = g_req.size
    m = np.array([g_req[max(0, n - H): n + K + H + 1].min() for n in range(n_all)])
    a = math.exp(-1.0 / (release_ms * 1e-3 * rate_hz))
    r = np.empty(n_all)
    previous = 1.0
    for n in range(n_all):
        previous = r[n] = min(m[n], 1.0 - (1.0 - previous) * a)
    k = np.arange(K + 1)
    w = np.sin(np.pi * (k + 1) / (K + 2)) ** 2
    w /= w.sum()
    s = np.array([sum(w[j] * (r[n - j] if n - j >= 0 else 1.0) for j in range(K + 1)) for n in range(n_all)])
    return np.minimum(s, g_req)[lead:lead + x.shape[0]]


@pytest.mark.parametrize(
    "name, rate_hz, seconds, lookahead_ms, release_ms",
    [
        ("noise bursts", 48000, 0.03, 1.0, 5.0),
        ("full-scale spike", 44100, 0.03, 1.0, 5.0),
        ("clipped square", 96000, 0.03, 1.0, 5.0),
        ("clipped noise", 48000, 0.03, 1.5, 50.0),  # limited almost everywhere
        ("one hot channel", 44100, 0.05, 0.5, 20.0),
        ("sine near Nyquist", 96000, 0.03, 2.0, 5.0),
        ("spike train", 48000, 0.1, 1.5, 50.0),  # long releases between sparse peaks
        ("spike train", 44100, 0.1, 1.0, 5.0),
    ],
)
def test_gain_follows_the_documented_design(name, rate_hz, seconds, lookahead_ms, release_ms):
    # The module's own arithmetic (sparse stages, the release's closed-form attack sum) against the
    # docstring's five steps written as per-frame loops: equal to rounding (our choice: 1e-12).
    x, _ = material(name, rate_hz, seconds=seconds)
    settings = dict(rate_hz=rate_hz, ceiling_dbtp=-2.0, lookahead_ms=lookahead_ms, release_ms=release_ms)
    _, gain, _ = limit(x, **settings)
    expected = reference_gain(x, **settings)
    assert np.any(expected < 0.9)  # the material is limited
    assert np.max(np.abs(gain - expected)) < 1e-12


@pytest.mark.parametrize("name", ["noise bursts", "clipped noise", "spike train"])
@pytest.mark.parametrize("fraction", [0.0, math.inf])
def test_sparse_and_dense_stages_give_the_same_gains(name, fraction, monkeypatch):
    # Each stage works range by range or over the whole piece, chosen per piece by how much is
    # limited, and in chunks; the choices must not change a single bit (our choice: exact).
    # 0: always the whole piece; inf: always range by range; small pieces and chunks, so that a
    # boundary falls everywhere.
    x, _ = material(name, 48000, seconds=0.2)
    settings = dict(rate_hz=48000, ceiling_dbtp=-3.0, lookahead_ms=1.5, release_ms=20.0)
    _, expected, _ = limit(x, **settings)
    for constant, value in (("_SPARSE_FRACTION", fraction), ("_DENSE_INTERPOLATION", fraction), ("_PIECE", 997),
                            ("_INTERPOLATION_CHUNK", 1000), ("_ATTACK_CHUNK", 101)):
        monkeypatch.setattr(render.limiter, constant, value)
    _, gain, _ = limit(x, **settings)
    assert np.array_equal(gain, expected)


# --------------------------------------------------------------------------- peak envelope


@pytest.mark.parametrize("rate_hz", [44100, 96000])
def test_envelope_maximum_is_the_bs1770_true_peak(rate_hz, rng):
    x = np.zeros((1000, 2))
    x[6:-6] = band_limit(rng.standard_normal((988, 2)), rate_hz, 0.45 * rate_hz)
    env = peak_envelope(x, rate_hz=rate_hz)
    # ITU-R BS.1770 Annex 2, as render.truepeak computes it: the same values, so exactly equal
    assert gain_to_db(float(env.max())) == brute_force_true_peak(x, rate_hz=rate_hz).true_peak_dbtp
    assert np.all(env >= np.max(np.abs(x), axis=1))


# --------------------------------------------------------------------------- levels


@pytest.mark.parametrize("rate_hz", RATES)
@pytest.mark.parametrize("ceiling_dbtp", [-1.0, -6.0])
def test_material_under_the_ceiling_passes_untouched(rate_hz, ceiling_dbtp, rng):
    x = fade(band_limit(rng.standard_normal((int(0.1 * rate_hz), 2)), rate_hz, 0.4 * rate_hz), rate_hz)
    level = true_peak_dbtp(x, rate_hz=rate_hz).true_peak_dbtp
    x *= db_to_gain(ceiling_dbtp - 0.5 - level)  # true peak 0.5 dB under the ceiling
    y, gain, reduction_db = limit(x, rate_hz=rate_hz, ceiling_dbtp=ceiling_dbtp)
    assert np.all(gain == 1.0)
    assert np.array_equal(y, x)
    assert reduction_db == 0.0


@pytest.mark.parametrize("rate_hz", RATES)
@pytest.mark.parametrize("name", MATERIALS)
@pytest.mark.parametrize("ceiling_dbtp", [-1.0, -6.0])
def test_loud_material_is_held_under_the_ceiling(name, rate_hz, ceiling_dbtp):
    x, f_max = material(name, rate_hz)
    y, gain, reduction_db = limit(x, rate_hz=rate_hz, ceiling_dbtp=ceiling_dbtp)
    assert reduction_db > 0.5
    # The output measured with the BS.1770 meter (ITU-R BS.1770 Annex 2, render.truepeak): under
    # the ceiling, and the safety margin is barely needed (at most 0.01 dB of it used).
    measured = true_peak_dbtp(y, rate_hz=rate_hz).true_peak_dbtp
    assert measured <= ceiling_dbtp
    assert measured <= ceiling_dbtp - SAFETY_MARGIN_DB + 0.01
    # An independent, finer reading (16x, scipy as the reference library): within 0.1 dB plus the
    # worst-case under-read of 4x (2x) oversampling at the material's highest frequency, which the
    # meter, and so the limiter, cannot see (ITU-R BS.1770 Annex 2; 0.688 dB at Nyquist for 4x).
    assert reference_peak_db(y) <= ceiling_dbtp + 0.1 + under_read_db(f_max, rate_hz)
    # The gain: in (0, 1], shared by the channels, and continuous: a raised-cosine attack over
    # K + 1 frames moves at most 2 (1 - min gain) / (K + 2) per frame.
    assert np.all(gain > 0.0) and np.all(gain <= 1.0)
    assert np.array_equal(y, x * gain[:, None])
    K = round(1.5e-3 * rate_hz)
    assert np.max(np.abs(np.diff(gain))) <= 2.0 * (1.0 - gain.min()) / (K + 2) + 1e-12


@pytest.mark.parametrize("rate_hz", RATES)
def test_a_full_scale_sine_limited_to_minus_6_dbtp_reports_about_6_db(rate_hz):
    n = np.arange(int(0.2 * rate_hz))
    x = fade(np.sin(2 * np.pi * 997 * n / rate_hz)[:, None], rate_hz)
    y, gain, reduction_db = limit(x, rate_hz=rate_hz, ceiling_dbtp=-6.0)
    level = true_peak_dbtp(x, rate_hz=rate_hz).true_peak_dbtp  # ~0 dBTP
    assert reduction_db == pytest.approx(level + 6.0 + SAFETY_MARGIN_DB, abs=1e-9)
    assert reduction_db == pytest.approx(6.0, abs=0.1)
    # The steady part sits at that reduction (the per-cycle readings differ by < 0.001 dB)
    assert -gain_to_db(float(np.median(gain))) == pytest.approx(reduction_db, abs=0.01)
    state = stream(x, 1000, rate_hz=rate_hz, ceiling_dbtp=-6.0)[1]
    result = limiter_result(state)
    assert result.max_reduction_db == reduction_db
    assert result.frames == x.shape[0]
    assert result.reduced_frames == np.count_nonzero(gain < 1.0)


def test_gain_is_flat_around_a_peak_then_releases_with_the_time_constant():
    rate_hz, release_ms = 48000, 50.0
    x = np.zeros((20000, 1))
    x[5000] = 1.0
    _, gain, reduction_db = limit(x, rate_hz=rate_hz, ceiling_dbtp=-6.0, release_ms=release_ms)
    n0, K = 5000, round(1.5e-3 * rate_hz)
    # Hold: the same gain over the 12-tap neighbourhood of the peak
    flat = gain[n0 - HOLD_FRAMES:n0 + HOLD_FRAMES + 1]
    assert np.max(np.abs(flat - gain[n0])) < 1e-15
    assert gain[n0] == pytest.approx(db_to_gain(-reduction_db), rel=1e-12)
    # Attack: no reduction more than K + hold + 6 frames ahead of the peak
    assert np.all(gain[:n0 - K - 2 * HOLD_FRAMES - 1] == 1.0)
    # Release: past the attack's reach the reduction decays by e every release_ms
    tau = round(release_ms * 1e-3 * rate_hz)
    start = n0 + HOLD_FRAMES + 6 + K
    ratio = (1.0 - gain[start + tau]) / (1.0 - gain[start])
    assert ratio == pytest.approx(math.exp(-1.0), rel=1e-6)


def test_stereo_gain_is_linked():
    x, _ = material("one hot channel", 48000)
    y, gain, _ = limit(x, rate_hz=48000, ceiling_dbtp=-1.0)
    # The quiet channel is reduced with the hot one: the image does not shift.
    assert np.array_equal(y[:, 0], x[:, 0] * gain)
    assert gain.min() < 0.5


# --------------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(ceiling_dbtp=0.5), r"ceiling_dbtp = 0\.5: must be in \[-60, 0\] dBTP"),
        (dict(ceiling_dbtp=float("nan")), r"ceiling_dbtp = nan"),
        (dict(lookahead_ms=0.1), r"lookahead_ms = 0\.1: must be in \[0\.5, 20\] ms"),
        (dict(rate_hz=16000, lookahead_ms=0.5), r"is 8 frames: must be at least 16 frames"),
        (dict(release_ms=0.0), r"release_ms = 0\.0: must be in \(0, 10000\] ms"),
        (dict(channels=0), r"channels = 0: must be an integer >= 1"),
        (dict(rate_hz=0), r"rate_hz = 0: must be > 0 Hz"),
    ],
)
def test_bad_settings_are_refused(kwargs, match):
    settings = dict(rate_hz=48000, channels=2, ceiling_dbtp=-1.0)
    settings.update(kwargs)
    with pytest.raises(ParameterError, match=match):
        limiter_init(**settings)


def test_bad_blocks_and_a_finished_stream_are_refused():
    state = limiter_init(rate_hz=48000, channels=2, ceiling_dbtp=-1.0)
    with pytest.raises(ParameterError, match="block has 1 channels: expected 2"):
        limiter_update(np.zeros((10, 1)), state)
    with pytest.raises(ParameterError, match="NaN or infinite"):
        limiter_update(np.full((10, 2), np.nan), state)
    with pytest.raises(ParameterError, match=r"block\.ndim = 1"):
        limiter_update(np.zeros(10), state)
    _, done = limiter_flush(state)
    with pytest.raises(ParameterError, match="state was flushed"):
        limiter_update(np.zeros((10, 2)), done)
    with pytest.raises(ParameterError, match="state was flushed"):
        limiter_flush(done)
