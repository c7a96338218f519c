"""The late-tail network: damped comb filters in parallel, allpass diffusers in series.

Pure functions, no I/O.  Everything is evaluated on an FFT frequency grid
(frequency sampling); the time-domain response is its inverse transform
(see :mod:`render.synthesis`).

Building blocks and their sources:

* Comb ``1 / (1 - g z^-K)`` and allpass ``(-g + z^-M) / (1 - g z^-M)``
  (Schroeder 1962; J. O. Smith, *Physical Audio Signal Processing*, "Schroeder
  Reverberators").
* Loop gain from the decay: ``20 log10 g = -60 τ / T60``, so
  ``g = 10 ** (-3 τ / T60)`` (Schroeder's relation), applied per frequency,
  ``G(f) = 10 ** (-3 K / (fs T60(f)))`` (Jot & Chaigne 1991, "Digital delay
  networks for designing artificial reverberators", AES 90th Convention).
* The realizable one-pole case, a low-pass in the loop:
  ``H(z) = z^-K (1 - p z^-1) / (1 - p z^-1 - g (1 - p) z^-K)``, with Jot's exact
  one-pole fit of ``p`` and the loop gain to two decay times (Smith, PASP,
  "First-Order Delay-Filter Design").

>>> round(loop_gain(4800, rate_hz=48000.0, decay_s=2.0), 4)   # τ = 100 ms, T60 = 2 s
0.7079
>>> p, g = one_pole_fit(1500, rate_hz=48000.0, decay_dc_s=2.0, decay_nyquist_s=1.0)
>>> round(p, 5), round(g, 5)
(0.05391, 0.84929)
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Tuple

import numpy as np

from .errors import ParameterError

__all__ = [
    "loop_gain",
    "one_pole_fit",
    "damped_comb_ba",
    "one_pole_loop_spectrum",
    "unit_delay_phasors",
    "comb_spectrum",
    "comb_bank_spectrum",
    "allpass_chain_spectrum",
    "delay_phasor",
    "allpass_spectrum",
    "NetworkDesign",
    "design_network",
    "primes_near",
    "MIN_COMBS",
    "MAX_COMBS",
    "MODAL_DENSITY_FACTOR",
]

#: At least this many combs per network (offline synthesis affords more than a real-time design).
MIN_COMBS = 16
#: At most this many combs per network (keeps synthesis well under a second).
MAX_COMBS = 64
#: Schroeder's modal-density criterion: the delays must add up to at least 0.15·T60 seconds
#: (Smith, PASP, "Mode Density Requirement").
MODAL_DENSITY_FACTOR = 0.15
#: The delays add up to at least this much in any room (s): about 0.4 modes per Hz, so that even
#: the 125 Hz octave holds tens of modes and its measured decay is stable (our choice).
MIN_TOTAL_DELAY_S = 0.4
#: Comb delays are spread around the mean free time, kept inside this range (seconds).
MEAN_DELAY_RANGE_S = (0.008, 0.050)
#: Largest allpass gain (at ``diffusion = 1``), as in Schroeder's diffusers (~0.7).
MAX_ALLPASS_GAIN = 0.7
#: Number of series allpass diffusers per network.
ALLPASS_COUNT = 4
#: Bins evaluated at a time by :func:`comb_bank_spectrum` and :func:`allpass_chain_spectrum`: the
#: temporaries of one block stay in the processor's cache and cost kilobytes, not megabytes (our choice).
BLOCK_BINS = 8192


def _check_delay(delay_frames):
    if isinstance(delay_frames, bool) or int(delay_frames) != delay_frames or delay_frames < 1:
        raise ParameterError(f"delay_frames = {delay_frames!r}: must be a whole number of frames ≥ 1")
    return int(delay_frames)


def _check_rate(rate_hz):
    if not (isinstance(rate_hz, (int, float)) and math.isfinite(rate_hz) and rate_hz > 0):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be > 0 Hz")
    return float(rate_hz)


def loop_gain(delay_frames, *, rate_hz, decay_s):
    """Loop gain of a comb whose echoes fall 60 dB in ``decay_s``.

    ``g = 10 ** (-3 K / (fs T60))`` (Schroeder's relation).

    Parameters
    ----------
    delay_frames : int
        Loop delay K in frames, ≥ 1.
    rate_hz : float
        Sample rate fs in Hz.
    decay_s : float or ndarray
        Reverberation time T60 in seconds, > 0 (an array gives one gain per value).
    """
    k = _check_delay(delay_frames)
    fs = _check_rate(rate_hz)
    t = np.asarray(decay_s, dtype=float)
    if np.any(~np.isfinite(t)) or np.any(t <= 0):
        raise ParameterError(f"decay_s = {decay_s!r}: must be > 0 s")
    g = np.power(10.0, -3.0 * k / (fs * t))
    return float(g) if g.ndim == 0 else g


def one_pole_fit(delay_frames, *, rate_hz, decay_dc_s, decay_nyquist_s):
    """Jot's exact one-pole loop filter ``g / (1 - p z^-1)`` for two decay times.

    The loop's magnitude equals ``R0 = 10 ** (-3 K / (fs T(0)))`` at DC and
    ``Rπ = 10 ** (-3 K / (fs T(π)))`` at Nyquist:
    ``p = (R0 - Rπ) / (R0 + Rπ)``, ``g = 2 R0 Rπ / (R0 + Rπ)``
    (Smith, PASP, "First-Order Delay-Filter Design").

    Returns
    -------
    (p, g) : tuple of float
        Pole (0 ≤ p < 1 when ``decay_nyquist_s ≤ decay_dc_s``) and loop gain numerator.
    """
    r0 = loop_gain(delay_frames, rate_hz=rate_hz, decay_s=decay_dc_s)
    rpi = loop_gain(delay_frames, rate_hz=rate_hz, decay_s=decay_nyquist_s)
    return (r0 - rpi) / (r0 + rpi), 2.0 * r0 * rpi / (r0 + rpi)


def damped_comb_ba(delay_frames, *, feedback, damping):
    """(b, a) of the one-pole damped comb, for :func:`scipy.signal.lfilter`.

    ``H(z) = z^-K (1 - d z^-1) / (1 - d z^-1 - f (1 - d) z^-K)``: loop gain ``f``
    at DC and ``f (1 - d) / (1 + d)`` at Nyquist.  In Jot's notation
    (:func:`one_pole_fit`) ``d = p`` and ``f = g / (1 - p)``.

    Parameters
    ----------
    delay_frames : int
        K ≥ 2.
    feedback : float
        f, with |f| < 1 (stability).
    damping : float
        d, with 0 ≤ d < 1.

    Returns
    -------
    (b, a) : tuple of ndarray
        Numerator of length K + 2 and denominator of length K + 1.
    """
    k = _check_delay(delay_frames)
    if k < 2:
        raise ParameterError(f"delay_frames = {delay_frames!r}: must be ≥ 2 for a damped comb")
    if not abs(feedback) < 1:
        raise ParameterError(f"feedback = {feedback!r}: must satisfy |f| < 1 (stability)")
    if not 0 <= damping < 1:
        raise ParameterError(f"damping = {damping!r}: must be from 0 to below 1")
    b = np.zeros(k + 2)
    b[k], b[k + 1] = 1.0, -damping
    a = np.zeros(k + 1)
    a[0], a[1] = 1.0, -damping
    a[k] -= feedback * (1.0 - damping)
    return b, a


def unit_delay_phasors(n_fft):
    """``exp(-2πj m / n_fft)`` for m = 0 … n_fft - 1: a table for every delay's phasor.

    ``z^-K`` at bin k is ``table[(K k) mod n_fft]``, exact to rounding and far
    cheaper than a complex exponential per bin and delay.
    """
    m = np.arange(n_fft, dtype=float)
    return np.exp(-2j * np.pi * m / n_fft)


def _delay_phasor(delay_frames, table):
    n_fft = table.shape[0]
    k = np.arange(n_fft // 2 + 1, dtype=np.int64)
    return table[(k * (int(delay_frames) % n_fft)) % n_fft]


def one_pole_loop_spectrum(n_fft, *, feedback, damping):
    """The one-pole loop filter ``f (1 - d) / (1 - d z^-1)`` on the rfft grid of ``n_fft``."""
    table = unit_delay_phasors(n_fft)
    return feedback * (1.0 - damping) / (1.0 - damping * _delay_phasor(1, table))


def delay_phasor(delay_frames, *, table):
    """``z^-K`` at every bin of the rfft grid of ``table`` (see :func:`unit_delay_phasors`)."""
    return _delay_phasor(_check_delay(delay_frames), table)


def comb_spectrum(delay_frames, *, loop, table, phasor=None):
    """``z^-K / (1 - L(ω) z^-K)`` on an rfft grid.

    Parameters
    ----------
    delay_frames : int
        Loop delay K in frames.
    loop : ndarray, shape (n_fft // 2 + 1,)
        Loop filter L(ω) at each bin: real for the zero-phase ideal loop gain
        ``G(f)``, complex for a realizable filter (e.g. :func:`one_pole_loop_spectrum`).
        ``|L| < 1`` everywhere.
    table : ndarray, shape (n_fft,)
        :func:`unit_delay_phasors` of the grid.
    phasor : ndarray, optional
        :func:`delay_phasor` of this delay, when the caller keeps it between calls.
    """
    zk = _delay_phasor(_check_delay(delay_frames), table) if phasor is None else phasor
    return zk / (1.0 - loop * zk)


def allpass_spectrum(delay_frames, *, gain, table):
    """Schroeder allpass ``(-g + z^-M) / (1 - g z^-M)`` on an rfft grid (|g| < 1)."""
    if not abs(gain) < 1:
        raise ParameterError(f"gain = {gain!r}: an allpass needs |g| < 1")
    zm = _delay_phasor(_check_delay(delay_frames), table)
    return (zm - gain) / (1.0 - gain * zm)


def _check_grid(out, bins, table, what):
    n_fft = table.shape[0] if isinstance(table, np.ndarray) and table.ndim == 1 else 0
    if n_fft < 2 or table.dtype != np.complex128:
        shape = getattr(table, "shape", None)
        raise ParameterError(f"table has shape {shape}: expected unit_delay_phasors(n_fft), complex, n_fft ≥ 2")
    if not 1 <= bins <= n_fft // 2 + 1:
        raise ParameterError(f"{what} covers {bins} bins: expected 1 to n_fft // 2 + 1 = {n_fft // 2 + 1}")
    if out is None:
        return np.zeros(bins, dtype=np.complex128)
    if not (isinstance(out, np.ndarray) and out.dtype == np.complex128 and out.shape == (bins,)):
        raise ParameterError(
            f"out has dtype {getattr(out, 'dtype', None)} and shape {getattr(out, 'shape', None)}: "
            f"expected complex128 of shape ({bins},)"
        )
    return out


def _gather_phasors(delay_frames, table, start, offsets, index, out):
    """``z^-K`` at bins ``start … start + len(out) - 1`` into ``out`` (table entries, exact).

    ``offsets`` holds ``(r K) mod n_fft`` for r = 0, 1, …; the index ``((start + r) K) mod n_fft``
    is then ``offsets[r] + (start K mod n_fft)``, below ``2 n_fft``, which ``mode="wrap"`` folds.
    """
    n_fft = table.shape[0]
    count = out.shape[0]
    np.add(offsets[:count], (start * delay_frames) % n_fft, out=index[:count])
    np.take(table, index[:count], mode="wrap", out=out)
    return out


def comb_bank_spectrum(delays_frames, *, signs, log_gain_per_frame, table, out=None):
    """A bank of parallel combs with the ideal loop gain, each of unit energy, on an rfft grid.

    ``Σ_i s_i sqrt(1 - G_i²) z^-K_i / (1 - G_i z^-K_i)`` with the zero-phase
    loop gain ``G_i(ω) = exp(K_i λ(ω))``: λ is the natural log of the gain per
    frame of delay, ``λ = -3 ln(10) / (fs T60(ω))`` for a decay of T60(ω)
    (Schroeder's relation per frequency, Jot & Chaigne 1991), so that every comb
    decays at T60(ω) whatever its delay.  A comb's echoes ``G^m`` have energy
    ``1 / (1 - G²)``, so the factor ``sqrt(1 - G²)`` gives each comb unit energy
    at every frequency (our choice of normalisation).

    The bins are evaluated in blocks of :data:`BLOCK_BINS` with in-place
    arithmetic, so besides ``out`` the memory used is a few blocks, and the
    result equals, bit for bit, adding up the terms
    ``(s_i * sqrt(1 - G_i * G_i)) * comb_spectrum(K_i, loop=G_i, table=table)``
    in the order of the delays.

    Parameters
    ----------
    delays_frames : sequence of int
        Loop delays K_i in frames, each ≥ 1.
    signs : sequence of float
        s_i, one per delay (±1 in :func:`design_network`).
    log_gain_per_frame : ndarray, shape (bins,)
        λ at bins 0 … bins - 1 of the grid, float64, < 0 (so that ``|G| < 1``);
        ``bins`` is at most ``n_fft // 2 + 1``.
    table : ndarray, shape (n_fft,)
        :func:`unit_delay_phasors` of the grid.
    out : ndarray, shape (bins,), complex128, optional
        The sum is added to it in place (and it is returned); a new array otherwise.

    Returns
    -------
    ndarray, shape (bins,), complex128

    Examples
    --------
    >>> import numpy as np
    >>> table = unit_delay_phasors(64)
    >>> lam = np.full(33, np.log(0.5))  # G = 0.5 per frame: G = 0.5 ** K
    >>> bank = comb_bank_spectrum([3], signs=[1.0], log_gain_per_frame=lam, table=table)
    >>> h = np.fft.irfft(bank, 64)  # z^-3 / (1 - 0.125 z^-3), times sqrt(1 - 0.125 ** 2)
    >>> np.round(h[[3, 6, 9]] / np.sqrt(1 - 0.125 ** 2), 6).tolist()
    [1.0, 0.125, 0.015625]
    """
    lam = log_gain_per_frame
    if not (isinstance(lam, np.ndarray) and lam.dtype == np.float64 and lam.ndim == 1):
        raise ParameterError(
            f"log_gain_per_frame has dtype {getattr(lam, 'dtype', None)} and shape {getattr(lam, 'shape', None)}: "
            f"expected a 1-D float64 array"
        )
    bins = lam.shape[0]
    delays = [_check_delay(k) for k in delays_frames]
    signs = [float(s) for s in signs]
    if len(signs) != len(delays):
        raise ParameterError(f"signs has {len(signs)} values: expected one per delay ({len(delays)})")
    if not np.all(lam < 0.0):
        raise ParameterError("log_gain_per_frame: every value must be < 0 (a loop gain below 1)")
    out = _check_grid(out, bins, table, "log_gain_per_frame")
    n_fft = table.shape[0]
    block = min(BLOCK_BINS, bins)
    ramp = np.arange(block, dtype=np.int64)
    offsets = [(ramp * (k % n_fft)) % n_fft for k in delays]
    index = np.empty(block, dtype=np.int64)
    zk = np.empty(block, dtype=np.complex128)
    comb = np.empty(block, dtype=np.complex128)
    gain = np.empty(block)
    weight = np.empty(block)
    for start in range(0, bins, block):
        stop = min(bins, start + block)
        count = stop - start
        lam_b, acc_b = lam[start:stop], out[start:stop]
        z, c, g, w = zk[:count], comb[:count], gain[:count], weight[:count]
        for k, sign, off in zip(delays, signs, offsets):
            _gather_phasors(k, table, start, off, index, z)
            np.multiply(k, lam_b, out=g)
            np.exp(g, out=g)  # G = exp(K λ)
            np.multiply(g, z, out=c)
            np.subtract(1.0, c, out=c)
            np.divide(z, c, out=c)  # z^-K / (1 - G z^-K)
            np.multiply(g, g, out=w)
            np.subtract(1.0, w, out=w)
            np.sqrt(w, out=w)
            np.multiply(sign, w, out=w)  # s sqrt(1 - G²)
            np.multiply(w, c, out=c)
            np.add(acc_b, c, out=acc_b)
    return out


def allpass_chain_spectrum(delays_frames, *, gain, table, bins=None, out=None):
    """Schroeder allpasses in series, ``Π_i (-g + z^-M_i) / (1 - g z^-M_i)``, on an rfft grid.

    Evaluated in blocks of :data:`BLOCK_BINS`; equals, bit for bit, a product
    started at 1 and multiplied by :func:`allpass_spectrum` of each delay in turn.

    Parameters
    ----------
    delays_frames : sequence of int
        Delays M_i in frames, each ≥ 1.
    gain : float
        g, |g| < 1.
    table : ndarray, shape (n_fft,)
        :func:`unit_delay_phasors` of the grid.
    bins : int, optional
        Bins 0 … bins - 1 are evaluated (default: all, ``n_fft // 2 + 1``).
    out : ndarray, shape (bins,), complex128, optional
        Written with the product (and returned); a new array otherwise.

    Returns
    -------
    ndarray, shape (bins,), complex128
        Unit magnitude at every bin.
    """
    if not abs(gain) < 1:
        raise ParameterError(f"gain = {gain!r}: an allpass needs |g| < 1")
    delays = [_check_delay(m) for m in delays_frames]
    if bins is None:
        bins = table.shape[0] // 2 + 1 if isinstance(table, np.ndarray) and table.ndim == 1 else 0
    out = _check_grid(out, int(bins), table, "bins")
    n_fft = table.shape[0]
    block = min(BLOCK_BINS, out.shape[0])
    ramp = np.arange(block, dtype=np.int64)
    offsets = [(ramp * (m % n_fft)) % n_fft for m in delays]
    index = np.empty(block, dtype=np.int64)
    zm = np.empty(block, dtype=np.complex128)
    num = np.empty(block, dtype=np.complex128)
    den = np.empty(block, dtype=np.complex128)
    for start in range(0, out.shape[0], block):
        stop = min(out.shape[0], start + block)
        count = stop - start
        prod = out[start:stop]
        prod.fill(1.0)
        z, a, b = zm[:count], num[:count], den[:count]
        for m, off in zip(delays, offsets):
            _gather_phasors(m, table, start, off, index, z)
            np.subtract(z, gain, out=a)
            np.multiply(gain, z, out=b)
            np.subtract(1.0, b, out=b)
            np.divide(a, b, out=a)
            np.multiply(prod, a, out=prod)
    return out


def primes_near(targets, *, exclude=()):
    """Distinct primes, each the nearest free prime to its target (targets ≥ 2).

    Distinct primes are mutually prime, so no two delay lines share echoes
    (Smith, PASP, "Choice of Delay Lengths").
    """
    taken = set(int(v) for v in exclude)
    out = []
    for target in targets:
        t = max(2, int(round(target)))
        for step in range(0, 100000):
            for cand in (t + step, t - step) if step else (t,):
                if cand >= 2 and cand not in taken and _is_prime(cand):
                    taken.add(cand)
                    out.append(cand)
                    break
            else:
                continue
            break
    return out


def _is_prime(n):
    if n < 2:
        return False
    if n % 2 == 0:
        return n == 2
    r = int(math.isqrt(n))
    for d in range(3, r + 1, 2):
        if n % d == 0:
            return False
    return True


@dataclass(frozen=True)
class NetworkDesign:
    """Delay lines and gains of the independent networks of one room.

    Attributes
    ----------
    comb_delays : tuple of tuple of int
        Comb delays in frames, one tuple per network.
    comb_signs : tuple of tuple of float
        ±1 per comb (seeded), so the first echoes do not all have one polarity.
    allpass_delays : tuple of tuple of int
        Allpass delays in frames, one tuple per network.
    allpass_gain : float
        Gain of every allpass (``0.7 · diffusion``).
    mix : ndarray, shape (channels, networks)
        How the networks combine into the output channels (sets the inter-channel correlation).
    """

    comb_delays: Tuple[Tuple[int, ...], ...]
    comb_signs: Tuple[Tuple[float, ...], ...]
    allpass_delays: Tuple[Tuple[int, ...], ...]
    allpass_gain: float
    mix: np.ndarray

    @property
    def networks(self):
        return len(self.comb_delays)


def design_network(*, rate_hz, channels, mean_free_time_s, decay_max_s, diffusion, spread, rng):
    """Choose the delays and gains of a room's comb/allpass networks.

    Parameters
    ----------
    rate_hz : float
        Sample rate in Hz.
    channels : int
        Output channels, 1 to 16.
    mean_free_time_s : float
        Mean free path / c in seconds: the centre of the comb delays, kept within
        8–50 ms (and raised where needed so that the modal-density rule holds
        with at most :data:`MAX_COMBS` combs).
    decay_max_s : float
        Longest reverberation time the network must produce (sets the comb count:
        Σ delays ≥ 0.15 · T60, Schroeder's modal-density criterion, and at
        least :data:`MIN_TOTAL_DELAY_S`).
    diffusion : float
        0 to 1: allpass gain ``0.7 · diffusion``.
    spread : float
        0 to 1: inter-channel correlation of the tail ≈ ``1 - spread``.
    rng : numpy.random.Generator
        The only source of randomness (seeded by the caller).
    """
    fs = _check_rate(rate_hz)
    if not (isinstance(channels, int) and 1 <= channels <= 16):
        raise ParameterError(f"channels = {channels!r}: must be a whole number from 1 to 16")
    lo, hi = MEAN_DELAY_RANGE_S
    tau = min(max(mean_free_time_s, lo), hi)
    need_s = max(MODAL_DENSITY_FACTOR * decay_max_s, MIN_TOTAL_DELAY_S)
    n_combs = max(MIN_COMBS, math.ceil(need_s / tau))
    if n_combs > MAX_COMBS:
        n_combs = MAX_COMBS
        tau = need_s / MAX_COMBS
    # Independent networks: one per channel, and a shared one when the channels
    # must be partly correlated.
    n_networks = channels if (channels == 1 or spread >= 1.0) else channels + 1
    taken = []
    comb_delays, comb_signs, allpass_delays = [], [], []
    for _ in range(n_networks):
        # Geometric spread over 0.7τ … 1.4τ, jittered, then made mutually prime.
        base = tau * np.geomspace(0.7, 1.4, n_combs)
        jitter = rng.uniform(-0.5, 0.5, n_combs) * (base * (2.0 ** (1.0 / n_combs) - 1.0))
        delays = primes_near(np.sort(base + jitter) * fs, exclude=taken)
        taken.extend(delays)
        comb_delays.append(tuple(delays))
        comb_signs.append(tuple(float(s) for s in rng.choice([-1.0, 1.0], n_combs)))
        ap_targets = [tau / 3.0 ** (i + 1) * fs * rng.uniform(0.9, 1.1) for i in range(ALLPASS_COUNT)]
        ap = primes_near([max(t, 3.0) for t in ap_targets], exclude=taken)
        taken.extend(ap)
        allpass_delays.append(tuple(ap))
    mix = np.zeros((channels, n_networks))
    if n_networks == channels:
        mix[np.arange(channels), np.arange(channels)] = 1.0
    else:
        mix[np.arange(channels), np.arange(channels)] = math.sqrt(spread)
        mix[:, channels] = math.sqrt(1.0 - spread)
    return NetworkDesign(
        comb_delays=tuple(comb_delays),
        comb_signs=tuple(comb_signs),
        allpass_delays=tuple(allpass_delays),
        allpass_gain=MAX_ALLPASS_GAIN * float(diffusion),
        mix=mix,
    )
