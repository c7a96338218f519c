"""The late-tail network's building blocks against published relations and scipy."""

import math

import numpy as np
import pytest
import scipy.signal

from render import network
from render.errors import ParameterError


# Schroeder's relation g = 10^(-3 τ / T60) (J. O. Smith, PASP, "Schroeder Reverberators");
# the check values are derived from it in REFERENCES.md.
@pytest.mark.parametrize(
    "tau_s, decay_s, expected",
    [(0.100, 2.0, 0.708), (0.050, 1.0, 0.7079), (0.0297, 2.0, 0.9025)],
)
def test_loop_gain_matches_schroeder_relation(tau_s, decay_s, expected):
    rate = 48000.0
    g = network.loop_gain(int(round(tau_s * rate)), rate_hz=rate, decay_s=decay_s)
    assert g == pytest.approx(expected, abs=5e-4)


# Jot's exact one-pole fit (Smith, PASP, "First-Order Delay-Filter Design"), check values derived there.
@pytest.mark.parametrize(
    "decay_nyquist_s, p_expected, g_expected",
    [(1.0, 0.05391, 0.84929), (0.5, 0.16050, 0.75361)],
)
def test_one_pole_fit_check_values(decay_nyquist_s, p_expected, g_expected):
    p, g = network.one_pole_fit(1500, rate_hz=48000.0, decay_dc_s=2.0, decay_nyquist_s=decay_nyquist_s)
    assert p == pytest.approx(p_expected, abs=1e-5)
    assert g == pytest.approx(g_expected, abs=1e-5)


def test_one_pole_fit_reaches_both_decay_times():
    # |g / (1 - p z^-1)| at DC and Nyquist gives back the two T60s (PASP, same section).
    k, rate = 1500, 48000.0
    p, g = network.one_pole_fit(k, rate_hz=rate, decay_dc_s=2.0, decay_nyquist_s=0.7)
    for mag, decay in ((g / (1 - p), 2.0), (g / (1 + p), 0.7)):
        assert -60.0 * k / rate / (20 * math.log10(mag)) == pytest.approx(decay, rel=1e-12)


def test_damped_comb_decay_at_dc_and_nyquist():
    # f = 0.84, d = 0.2, N = 2400 at 48 kHz: T60 = 1.98 s at DC, 0.60 s at Nyquist (derived in REFERENCES.md
    # from the low-pass-feedback comb's loop gains f and f(1 - d)/(1 + d)).
    n_fft, k, rate = 4800, 2400, 48000.0
    loop = network.one_pole_loop_spectrum(n_fft, feedback=0.84, damping=0.2)
    t_dc = -60.0 * k / rate / (20 * math.log10(abs(loop[0])))
    t_ny = -60.0 * k / rate / (20 * math.log10(abs(loop[-1])))
    assert t_dc == pytest.approx(1.98, abs=0.005)
    assert t_ny == pytest.approx(0.60, abs=0.005)


@pytest.mark.parametrize("k", [2, 37, 401, 4000])
@pytest.mark.parametrize("damping", [0.0, 0.5, 0.9])
def test_frequency_sampled_damped_comb_equals_lfilter(k, damping):
    # scipy.signal.lfilter on the exported (b, a) is the reference library.
    feedback = 0.3 if k >= 400 else 0.9
    b, a = network.damped_comb_ba(k, feedback=feedback, damping=damping)
    # Grid long enough that the slowest pole has decayed below 1e-13 before it wraps round.
    radius = np.max(np.abs(np.roots(a))) if k < 1000 else feedback ** (1.0 / k)
    n_fft = int(k + math.log(1e-13) / math.log(radius)) + 64
    n_fft += n_fft % 2
    impulse = np.zeros(n_fft)
    impulse[0] = 1.0
    ref = scipy.signal.lfilter(b, a, impulse)
    table = network.unit_delay_phasors(n_fft)
    loop = network.one_pole_loop_spectrum(n_fft, feedback=feedback, damping=damping)
    ours = np.fft.irfft(network.comb_spectrum(k, loop=loop, table=table), n_fft)
    assert np.max(np.abs(ours - ref)) <= 1e-9 * np.max(np.abs(ref))


@pytest.mark.parametrize("gain", [0.0, 0.35, 0.7, -0.5])
def test_allpass_has_unit_magnitude(gain):
    # Schroeder allpass (-g + z^-M)/(1 - g z^-M): |A| = 1 at every frequency (PASP).
    table = network.unit_delay_phasors(1024)
    a = network.allpass_spectrum(13, gain=gain, table=table)
    assert np.max(np.abs(np.abs(a) - 1.0)) < 1e-12


def test_unit_delay_table_equals_complex_exponential():
    n_fft, k = 1000, 173
    table = network.unit_delay_phasors(n_fft)
    comb = network.comb_spectrum(k, loop=np.zeros(n_fft // 2 + 1), table=table)
    exact = np.exp(-2j * np.pi * np.arange(n_fft // 2 + 1) * k / n_fft)
    assert np.max(np.abs(comb - exact)) < 1e-12


@pytest.mark.parametrize("decay_max_s", [0.2, 2.0, 8.0, 30.0])
@pytest.mark.parametrize("channels", [1, 2])
def test_design_meets_modal_density_and_mutual_primality(decay_max_s, channels):
    rate = 48000.0
    design = network.design_network(
        rate_hz=rate, channels=channels, mean_free_time_s=0.02, decay_max_s=decay_max_s,
        diffusion=0.7, spread=0.5, rng=np.random.default_rng(1),
    )
    every = [d for net in design.comb_delays for d in net] + [d for net in design.allpass_delays for d in net]
    assert len(set(every)) == len(every)
    for i, a in enumerate(every):  # mutually prime (PASP, "Choice of Delay Lengths")
        for b in every[i + 1:]:
            assert math.gcd(a, b) == 1
    for net in design.comb_delays:
        assert len(net) >= 12  # at least 12 combs per channel (the floor)
        # Sum of delays >= 0.15 T60 (PASP, "Mode Density Requirement")
        assert sum(net) / rate >= network.MODAL_DENSITY_FACTOR * decay_max_s * 0.98
    assert design.mix.shape[0] == channels


def test_design_is_seeded():
    kw = dict(rate_hz=44100.0, channels=2, mean_free_time_s=0.03, decay_max_s=2.0, diffusion=0.5, spread=1.0)
    a = network.design_network(rng=np.random.default_rng(7), **kw)
    b = network.design_network(rng=np.random.default_rng(7), **kw)
    c = network.design_network(rng=np.random.default_rng(8), **kw)
    assert a.comb_delays == b.comb_delays and a.comb_signs == b.comb_signs
    assert a.comb_delays != c.comb_delays


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: network.loop_gain(0, rate_hz=48000.0, decay_s=1.0), "delay_frames = 0"),
        (lambda: network.loop_gain(10, rate_hz=0, decay_s=1.0), "rate_hz = 0"),
        (lambda: network.loop_gain(10, rate_hz=48000.0, decay_s=-1.0), "decay_s = -1.0"),
        (lambda: network.damped_comb_ba(10, feedback=1.0, damping=0.1), "feedback = 1.0"),
        (lambda: network.damped_comb_ba(10, feedback=0.5, damping=1.0), "damping = 1.0"),
        (lambda: network.allpass_spectrum(3, gain=1.0, table=network.unit_delay_phasors(8)), "gain = 1.0"),
        (lambda: network.design_network(rate_hz=48000.0, channels=0, mean_free_time_s=0.02, decay_max_s=1.0,
                                        diffusion=0.5, spread=1.0, rng=np.random.default_rng(0)), "channels = 0"),
    ],
)
def test_parameter_errors(call, match):
    with pytest.raises(ParameterError, match=match):
        call()


def test_primes_near_are_distinct_primes():
    out = network.primes_near([10, 10, 10, 100, 2], exclude=[11])
    assert len(set(out)) == 5 and 11 not in out
    assert all(all(p % d for d in range(2, int(p ** 0.5) + 1)) for p in out)


def _bank_by_terms(delays, signs, lam, table, start=0.0):
    """The bank written out term by term (added to ``start``), as the synthesis used to sum it."""
    acc = np.full(lam.shape[0], start, dtype=complex)
    for k, s in zip(delays, signs):
        g = np.exp(k * lam)
        z = network.delay_phasor(k, table=table)[: lam.shape[0]]
        acc += (s * np.sqrt(1.0 - g * g)) * (z / (1.0 - g * z))  # comb_spectrum's formula, on these bins
    return acc


@pytest.mark.parametrize("n_fft", [1000, 2 * network.BLOCK_BINS + 6, 50000])
@pytest.mark.parametrize("delays", [(1, 2, 3), (37, 401, 1103, 60001)])
def test_comb_bank_equals_its_terms_bit_for_bit(n_fft, delays):
    # Our choice: the blocked, in-place bank must give exactly the sum of its terms (the engine's
    # output must not change without an ENGINE_VERSION bump), for grids smaller and larger than a
    # block, and delays longer than the grid.
    rng = np.random.default_rng(11)
    table = network.unit_delay_phasors(n_fft)
    lam = -rng.uniform(1e-5, 1e-2, n_fft // 2 + 1)
    signs = rng.choice([-1.0, 1.0], len(delays))
    bank = network.comb_bank_spectrum(delays, signs=signs, log_gain_per_frame=lam, table=table)
    assert bank.tobytes() == _bank_by_terms(delays, signs, lam, table).tobytes()
    # Added to `out` in place, over fewer bins than the grid.
    part = lam[: n_fft // 4]
    out = np.full(part.shape[0], 1.0 + 2.0j)
    assert network.comb_bank_spectrum(delays, signs=signs, log_gain_per_frame=part, table=table, out=out) is out
    assert out.tobytes() == _bank_by_terms(delays, signs, part, table, start=1.0 + 2.0j).tobytes()


@pytest.mark.parametrize("gain_per_frame", [0.999, 0.99])
def test_comb_bank_equals_lfilter(gain_per_frame):
    # scipy.signal.lfilter as the reference library: with a loop gain G = g^K at every frequency each
    # comb is 1 / (1 - G z^-K) delayed by K, weighted s sqrt(1 - G^2).
    delays, signs = (97, 211, 379), (1.0, -1.0, 1.0)
    n_fft = int(max(delays) * math.log(1e-13) / math.log(gain_per_frame ** min(delays))) + 2 * max(delays)
    n_fft += n_fft % 2
    lam = np.full(n_fft // 2 + 1, math.log(gain_per_frame))
    ours = np.fft.irfft(
        network.comb_bank_spectrum(delays, signs=signs, log_gain_per_frame=lam, table=network.unit_delay_phasors(n_fft)),
        n_fft,
    )
    impulse = np.zeros(n_fft)
    impulse[0] = 1.0
    ref = np.zeros(n_fft)
    for k, s in zip(delays, signs):
        g = gain_per_frame ** k
        b = np.zeros(k + 1)
        b[k] = 1.0
        a = np.zeros(k + 1)
        a[0], a[k] = 1.0, -g
        ref += s * math.sqrt(1.0 - g * g) * scipy.signal.lfilter(b, a, impulse)
    assert np.max(np.abs(ours - ref)) <= 1e-9 * np.max(np.abs(ref))


@pytest.mark.parametrize("n_fft", [64, 2 * network.BLOCK_BINS + 6])
@pytest.mark.parametrize("gain", [0.0, 0.7, -0.5])
def test_allpass_chain_is_the_product_of_its_allpasses(n_fft, gain):
    # Our choice: bit for bit the product started at 1 (as the engine formed it); |A| = 1 (PASP).
    table = network.unit_delay_phasors(n_fft)
    delays = (3, 13, 31, 97)
    expected = np.ones(n_fft // 2 + 1, dtype=complex)
    for m in delays:
        expected *= network.allpass_spectrum(m, gain=gain, table=table)
    chain = network.allpass_chain_spectrum(delays, gain=gain, table=table)
    assert chain.tobytes() == expected.tobytes()
    assert np.max(np.abs(np.abs(chain) - 1.0)) < 1e-12


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(signs=[1.0]), "signs has 1 values: expected one per delay"),
        (dict(log_gain_per_frame=np.zeros(5)), "every value must be < 0"),
        (dict(log_gain_per_frame=-np.ones(5, dtype=np.float32)), "expected a 1-D float64 array"),
        (dict(log_gain_per_frame=-np.ones(6)), "covers 6 bins: expected 1 to n_fft // 2 \\+ 1 = 5"),
        (dict(out=np.zeros(4, dtype=complex)), "out has dtype complex128 and shape \\(4,\\)"),
        (dict(table=np.ones(8)), "table has shape \\(8,\\): expected unit_delay_phasors"),
    ],
)
def test_comb_bank_parameter_errors(kwargs, match):
    call = dict(signs=[1.0, -1.0], log_gain_per_frame=-np.ones(5), table=network.unit_delay_phasors(8))
    call.update(kwargs)
    with pytest.raises(ParameterError, match=match):
        network.comb_bank_spectrum([3, 5], **call)
    with pytest.raises(ParameterError, match="gain = 1.0"):
        network.allpass_chain_spectrum([3], gain=1.0, table=network.unit_delay_phasors(8))
