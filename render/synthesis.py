"""Impulse-response synthesis: frequency sampling of the room's network, then calibration.

The late tail is the comb/allpass network of :mod:`render.network`, evaluated
on an FFT grid long enough that time-aliasing stays below ``alias_db``
(the tail falls 60 dB per T60, so the grid holds ``-alias_db / 60`` times the
longest decay) and inverse-transformed.  The early part is the image-source
model of :mod:`render.early`.  The tail fades in between the first reflection
and the mixing time, at the level diffuse-field theory gives relative to the
direct sound.

The octave-band reverberation times of a damped comb bank measured by the
ISO 3382 method drift from the loop-gain design (the bands integrate over
neighbouring frequencies, the diffusers and the early part add their own
decay), so the design curve is corrected from measurements of the synthesised
response by :func:`render.analysis.band_t30_s` until every band is within
``tolerance_pct`` of its target.

Level convention (what ``wet_db`` means): every channel of the returned
response has unit energy, ``sum(ir[:, c] ** 2) == 1``.  A dry signal of energy
E therefore gives a wet signal of energy E (per channel) at ``wet_db = 0``.
Time convention: frame 0 of the response is the arrival of the direct sound
(the direct sound itself belongs to the dry stem and is not in the response).

No I/O; deterministic: the same room, rate, channel count and floor give a
bit-identical response.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass
from typing import Tuple

import numpy as np
import scipy.fft

from . import acoustics, analysis, early, network
from .acoustics import OCTAVE_BANDS_HZ
from .errors import ParameterError
from .room import Room
from .units import db_to_gain, power_to_db

__all__ = ["Response", "synthesize", "ENGINE_VERSION", "clear_cache", "response_bands_hz", "trim_tail"]

#: Changes whenever the engine's output for the same inputs changes (part of every cache key).
ENGINE_VERSION = "2"

#: Spacing of the virtual microphones at ``spread = 1`` (m), for the early reflections.
MIC_SPACING_M = 0.17
#: Envelope block for trimming the tail (s).
ENVELOPE_BLOCK_S = 0.005
#: Frames mixed from the networks into the channels at a time (bounds that step's memory).
MIX_BLOCK_FRAMES = 32768
#: Envelope blocks measured at a time when trimming (bounds that step's memory).
ENVELOPE_CHUNK_BLOCKS = 512
#: The grid holds this much more than the target's longest decay (room for calibration).
DECAY_MARGIN = 1.3


@dataclass(frozen=True)
class Response:
    """A synthesised room response and what was measured on it.

    Attributes
    ----------
    ir : ndarray, shape (frames, channels), float64
        The wet response, unit energy per channel, frame 0 = direct sound.
    rate_hz : float
        Sample rate in Hz.
    tail_frames : int
        ``frames - 1``: how much longer than its source a convolved output is.
    bands_hz : tuple of float
        Octave bands that were checked.
    target_s, measured_s : tuple of float
        Target and measured T30 per band (measured: mean over channels).
    error_pct : tuple of float
        ``100 · (measured / target - 1)`` per band, for the mean over channels.
    channel_error_pct : tuple of tuple of float
        The same per channel: ``channel_error_pct[channel][band]``.
    iterations : int
        Calibration passes made (1 = no correction was needed).
    design_s : tuple of float
        The corrected loop-gain design curve at the band centres (mean over networks).
    reverberant_ratio_db : float
        Energy of the response relative to the direct sound before normalisation
        (image sources plus the diffuse tail), in dB.
    room_fingerprint : str
        :meth:`Room.fingerprint` of the room.
    """

    ir: np.ndarray
    rate_hz: float
    tail_frames: int
    bands_hz: Tuple[float, ...]
    target_s: Tuple[float, ...]
    measured_s: Tuple[float, ...]
    error_pct: Tuple[float, ...]
    channel_error_pct: Tuple[Tuple[float, ...], ...]
    iterations: int
    design_s: Tuple[float, ...]
    reverberant_ratio_db: float
    room_fingerprint: str

    @property
    def channels(self) -> int:
        return self.ir.shape[1]

    @property
    def max_error_pct(self) -> float:
        """Largest |error| over bands and channels, in %."""
        return max(abs(e) for row in self.channel_error_pct for e in row)


def response_bands_hz(rate_hz):
    """Octave bands (of 125 Hz – 8 kHz) whose upper edge lies below Nyquist at ``rate_hz``."""
    return tuple(f for f in OCTAVE_BANDS_HZ if f * math.sqrt(2.0) < rate_hz / 2.0)


_CACHE: "OrderedDict[tuple, Response]" = OrderedDict()
_CACHE_SIZE = 16


def clear_cache():
    """Forget every cached response (for tests and benchmarks)."""
    _CACHE.clear()


def synthesize(
    room,
    *,
    rate_hz,
    channels,
    tail_floor_db=-90.0,
    calibrate=True,
    tolerance_pct=1.0,
    max_iterations=8,
    alias_db=-120.0,
):
    """Synthesise a room's impulse response.

    Parameters
    ----------
    room : Room
        The room.
    rate_hz : float
        Sample rate in Hz, 8000 to 384000.
    channels : int
        Output channels, 1 to 16 (each a decorrelated network, see ``Room.spread``).
    tail_floor_db : float
        Where the tail is cut: the envelope's level re the peak, -150 to -20 dB.
    calibrate : bool
        Correct the design from measurements until every band is within ``tolerance_pct``.
    tolerance_pct : float
        Calibration goal per band, in %, > 0.
    max_iterations : int
        Calibration passes at most, ≥ 1.
    alias_db : float
        Largest time-aliasing of the frequency sampling, re the peak, -300 to -60 dB.

    Returns
    -------
    Response

    Examples
    --------
    >>> r = synthesize(Room(decay_s=0.4, size_m=(4.0, 3.0, 2.5)), rate_hz=16000, channels=1)
    >>> r.ir.shape[1], round(float((r.ir ** 2).sum()), 9), r.max_error_pct < 3
    (1, 1.0, True)
    """
    key = _validated_key(
        room,
        rate_hz=rate_hz,
        channels=channels,
        tail_floor_db=tail_floor_db,
        calibrate=calibrate,
        tolerance_pct=tolerance_pct,
        max_iterations=max_iterations,
        alias_db=alias_db,
    )
    hit = _cache_get(key)
    if hit is not None:
        return hit
    result = _synthesize(
        room,
        rate_hz=float(rate_hz),
        channels=channels,
        tail_floor_db=float(tail_floor_db),
        calibrate=calibrate,
        tolerance_pct=float(tolerance_pct),
        max_iterations=max_iterations,
        alias_db=float(alias_db),
    )
    _cache_put(key, result)
    return result


def _validated_key(room, *, rate_hz, channels, tail_floor_db, calibrate, tolerance_pct, max_iterations, alias_db):
    """Check :func:`synthesize`'s arguments (ParameterError) and return its cache key.

    The key names everything that shapes the response; :mod:`render.response_cache`
    builds its on-disk key from it.
    """
    if not isinstance(room, Room):
        raise ParameterError(f"room = {room!r}: expected a Room")
    if not (isinstance(rate_hz, (int, float)) and 8000 <= rate_hz <= 384000):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be from 8000 to 384000 Hz")
    if isinstance(channels, bool) or not isinstance(channels, int) or not 1 <= channels <= 16:
        raise ParameterError(f"channels = {channels!r}: must be a whole number from 1 to 16")
    if not -150.0 <= tail_floor_db <= -20.0:
        raise ParameterError(f"tail_floor_db = {tail_floor_db!r}: must be from -150 to -20 dB")
    if not -300.0 <= alias_db <= -60.0:
        raise ParameterError(f"alias_db = {alias_db!r}: must be from -300 to -60 dB")
    if not tolerance_pct > 0:
        raise ParameterError(f"tolerance_pct = {tolerance_pct!r}: must be > 0 %")
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, int) or max_iterations < 1:
        raise ParameterError(f"max_iterations = {max_iterations!r}: must be a whole number ≥ 1")
    return (
        ENGINE_VERSION,
        room.fingerprint(),
        float(rate_hz),
        channels,
        float(tail_floor_db),
        bool(calibrate),
        float(tolerance_pct),
        max_iterations,
        float(alias_db),
    )


def _cache_get(key):
    """The in-process cache's response for ``key`` (marked as recently used), or None."""
    hit = _CACHE.get(key)
    if hit is not None:
        _CACHE.move_to_end(key)
    return hit


def _cache_put(key, response):
    """Keep ``response`` in the in-process cache (the least recently used beyond 16 is dropped)."""
    _CACHE[key] = response
    _CACHE.move_to_end(key)
    while len(_CACHE) > _CACHE_SIZE:
        _CACHE.popitem(last=False)


def _mic_positions(room, channels):
    """One virtual microphone per channel, spaced across the talker's line of sight."""
    src = np.array(room.source_m)
    lis = np.array(room.listener_m)
    if channels == 1:
        return [tuple(lis)]
    look = lis - src
    across = np.array([-look[1], look[0], 0.0])
    if np.linalg.norm(across) < 1e-9:
        across = np.array([0.0, 1.0, 0.0])
    across /= np.linalg.norm(across)
    spacing = MIC_SPACING_M * room.spread
    lo = np.full(3, 0.05)
    hi = np.array(room.size_m) - 0.05
    out = []
    for c in range(channels):
        p = lis + (c / (channels - 1) - 0.5) * spacing * across
        out.append(tuple(np.clip(p, lo, hi)))
    return out


def _early_part(room, *, rate_hz, channels, freqs_hz, n_fft, mix_s):
    """Image-source reflections per channel (direct sound excluded), direct amplitude = 1."""
    c = room.speed_of_sound
    # Walls absorb what the target decay says (Eyring), frequency by frequency.
    alpha = np.array(
        [
            acoustics.eyring_absorption_coefficient(
                volume_m3=room.volume_m3, surface_m2=room.surface_m2, decay_s=float(t)
            )
            for t in room.decay_at(np.array(OCTAVE_BANDS_HZ))
        ]
    )
    beta_bands = early.reflection_coefficient(alpha)
    beta = np.interp(np.log10(np.maximum(freqs_hz, 1.0)), np.log10(OCTAVE_BANDS_HZ), beta_bands)
    r0 = room.distance_m
    # Reflections arriving by the mixing time count in full; later ones fade out (raised cosine)
    # by twice the mixing time, where the diffuse tail has taken over.
    reach_m = r0 + 2.0 * mix_s * c
    smallest = min(room.size_m)
    max_order = int(min(12, max(2, math.ceil(reach_m / smallest) + 1)))
    out = np.zeros((channels, n_fft))
    first_s = np.inf
    for ch, mic in enumerate(_mic_positions(room, channels)):
        images = early.image_sources(
            size_m=room.size_m, source_m=room.source_m, listener_m=mic, max_order=max_order
        )
        keep = images.distances_m < reach_m
        dist, orders = images.distances_m[keep], images.orders[keep]
        arrival_s = (dist - r0) / c
        fade = np.clip((arrival_s - mix_s) / mix_s, 0.0, 1.0)
        weight = 0.5 + 0.5 * np.cos(np.pi * fade)
        delay_frames = arrival_s * rate_hz + early.SINC_HALF_TAPS  # room for the sinc's left side
        first_s = min(first_s, float(arrival_s.min())) if dist.size else first_s
        spectrum = np.zeros(n_fft // 2 + 1, dtype=complex)
        for n in np.unique(orders):
            sel = orders == n
            taps = early.fractional_delay_taps(delay_frames[sel], weight[sel] * r0 / dist[sel], frames=n_fft)
            part = scipy.fft.rfft(taps, workers=1)
            del taps
            np.multiply(part, beta ** int(n), out=part)
            spectrum += part
            del part
        # Rotate left by the sinc's half length (np.roll, without its temporary).
        h = early.SINC_HALF_TAPS % n_fft
        signal = scipy.fft.irfft(spectrum, n_fft, workers=1)
        del spectrum
        out[ch, : n_fft - h] = signal[h:]
        out[ch, n_fft - h :] = signal[:h]
    return out, (first_s if math.isfinite(first_s) else 0.0)


def _fade_in_head(n, start, stop):
    """The first frames of a fade-in window of ``n`` frames (every later frame of it is 1).

    0 before ``start``, a raised cosine from ``start`` to ``stop``, 1 after;
    ``start`` and ``stop`` are clipped to the window.
    """
    start = max(0, min(start, n))
    stop = max(start + 1, min(stop, n))
    w = np.zeros(min(stop, n))
    ramp = np.arange(stop - start) / (stop - start)
    w[start:stop] = (0.5 - 0.5 * np.cos(np.pi * ramp))[: w.shape[0] - start]
    return w


def _envelope_block(rate_hz):
    return max(1, int(round(ENVELOPE_BLOCK_S * rate_hz)))


def _trim_end(ir, *, rate_hz, floor_db):
    """Frames kept by :func:`trim_tail` (``ir`` may be any (frames, channels) view), or None to keep all."""
    frames = ir.shape[0]
    block = _envelope_block(rate_hz)
    n_blocks = frames // block
    if n_blocks == 0 or not np.any(ir):
        return None
    # RMS per block, the largest over channels, a chunk of blocks at a time (each chunk laid out
    # frames-first, as the envelope was always measured, so the sums round alike).
    env = np.empty(n_blocks)
    for b0 in range(0, n_blocks, ENVELOPE_CHUNK_BLOCKS):
        b1 = min(n_blocks, b0 + ENVELOPE_CHUNK_BLOCKS)
        part = np.ascontiguousarray(ir[b0 * block : b1 * block])
        env[b0:b1] = np.sqrt(np.mean(part.reshape(b1 - b0, block, -1) ** 2, axis=1)).max(axis=1)
    above = np.nonzero(env > env.max() * db_to_gain(floor_db))[0]
    last = int(above[-1]) if above.size else 0
    return min(frames, (last + 2) * block)


def _fade_out(out, *, rate_hz):
    """Raised-cosine fade over the last envelope block of ``out``, in place."""
    end = out.shape[0]
    fade = min(_envelope_block(rate_hz), end)
    out[end - fade :] *= (0.5 + 0.5 * np.cos(np.pi * (np.arange(1, fade + 1) / fade)))[:, None]


def trim_tail(ir, *, rate_hz, floor_db):
    """Cut a response where its envelope falls below ``floor_db`` re the envelope's peak.

    The envelope is the RMS in 5 ms blocks (the largest over channels); the
    response ends one block after the last block above the floor, with a
    raised-cosine fade over that block.

    Parameters
    ----------
    ir : ndarray, shape (frames, channels)
    rate_hz : float
    floor_db : float
        Negative level in dB re the absolute peak.

    Returns
    -------
    ndarray, shape (frames_kept, channels)
        A new C-contiguous array.
    """
    end = _trim_end(ir, rate_hz=rate_hz, floor_db=floor_db)
    if end is None:
        return ir.copy()
    out = ir[:end].copy()
    _fade_out(out, rate_hz=rate_hz)
    return out


def _synthesize(room, *, rate_hz, channels, tail_floor_db, calibrate, tolerance_pct, max_iterations, alias_db):
    rng = np.random.default_rng([room.seed, int(round(rate_hz)), channels, 0x5EED])
    bands = response_bands_hz(rate_hz)
    targets = np.asarray(room.decay_at(np.array(bands)), dtype=float)
    c = room.speed_of_sound
    mix_s = acoustics.mixing_time_s(volume_m3=room.volume_m3)
    design = network.design_network(
        rate_hz=rate_hz,
        channels=channels,
        mean_free_time_s=room.mean_free_path_m / c,
        decay_max_s=room.decay_max_s,
        diffusion=room.diffusion,
        spread=room.spread,
        rng=rng,
    )
    # Grid: the slowest decay falls -alias_db before it wraps round.
    diagonal_m = math.sqrt(sum(v * v for v in room.size_m))
    early_reach_s = max(3.0 * diagonal_m, room.distance_m + 1.5 * mix_s * c) / c + 0.01
    n_fft = scipy.fft.next_fast_len(
        int(math.ceil((-alias_db / 60.0) * DECAY_MARGIN * room.decay_max_s * rate_hz + early_reach_s * rate_hz)),
        real=True,
    )
    n_fft += n_fft % 2
    bins = n_fft // 2 + 1
    freqs_hz = np.arange(bins) * (rate_hz / n_fft)

    er, first_s = _early_part(room, rate_hz=rate_hz, channels=channels, freqs_hz=freqs_hz, n_fft=n_fft, mix_s=mix_s)
    start_frame = int(round(first_s * rate_hz))
    stop_frame = max(start_frame + 1, int(round(mix_s * rate_hz)))
    fade_head = _fade_in_head(n_fft, start_frame, stop_frame)  # the fade-in window is 1 after these frames
    del freqs_hz

    def grid_curves():
        # (log10 of each bin's frequency, spectral balance), recomputed each pass (a few ms)
        # rather than kept: the balance follows diffuse-field theory, energy ∝ T60(f)
        # (w = 4P / (cA), A ∝ V / T).
        log_bins = np.arange(bins) * (rate_hz / n_fft)
        balance = room.decay_at(log_bins)
        balance /= room.decay_mid_s
        np.sqrt(balance, out=balance)
        np.maximum(log_bins, 1.0, out=log_bins)
        np.log10(log_bins, out=log_bins)
        return log_bins, balance

    # Theoretical diffuse energy after the mixing time, direct sound = 1 (see DEVELOPERS.md):
    # per-frame energy density 4π r² c / (V fs) · exp(-13.8155 t / T).
    decay_rate = 6.0 * math.log(10.0) / room.decay_mid_s
    r0 = room.distance_m
    target_late = 4.0 * math.pi * r0**2 * c / room.volume_m3 / decay_rate * math.exp(-decay_rate * mix_s)
    log_bands = np.log10(np.array(bands))
    # Memory: nothing of size n_fft is kept per comb or allpass; the spectra are evaluated in small
    # blocks of bins (network.comb_bank_spectrum), so a pass needs the networks' time signals,
    # one spectrum and the unit phasor table, whatever the number of combs.
    table = network.unit_delay_phasors(n_fft)
    ln_gain = -3.0 * math.log(10.0)  # ln of the loop gain per frame of delay is ln_gain / (fs T60)

    def render_tail(design_bands_s):
        # design_bands_s: (networks, bands) loop-gain design curve of each network.
        nets = np.empty((design.networks, n_fft))
        log_bins, balance = grid_curves()
        for j in range(design.networks):
            lam = np.interp(log_bins, log_bands, design_bands_s[j])  # T60 at each bin
            np.multiply(rate_hz, lam, out=lam)
            np.divide(ln_gain, lam, out=lam)  # ln G per frame of delay
            acc = network.comb_bank_spectrum(
                design.comb_delays[j], signs=design.comb_signs[j], log_gain_per_frame=lam, table=table
            )
            del lam
            post = network.allpass_chain_spectrum(design.allpass_delays[j], gain=design.allpass_gain, table=table)
            np.multiply(post, balance, out=post)
            np.divide(post, math.sqrt(len(design.comb_delays[j])), out=post)
            np.multiply(acc, post, out=acc)
            del post
            if j == design.networks - 1:
                del log_bins, balance  # not needed for the last transform
            nets[j] = scipy.fft.irfft(acc, n_fft, workers=1)
            del acc
        # Mix the networks into the channels block by block, each block written over the first
        # rows of `nets` (a block of the output depends only on the same block of the input).
        for a in range(0, n_fft, MIX_BLOCK_FRAMES):
            nets[:channels, a : a + MIX_BLOCK_FRAMES] = design.mix @ nets[:, a : a + MIX_BLOCK_FRAMES]
        tail = nets[:channels]  # (channels, n_fft)
        tail[:, : fade_head.shape[0]] *= fade_head
        late = np.empty(channels)
        square = np.empty(n_fft - min(stop_frame, n_fft))
        for ch in range(channels):
            late[ch] = np.sum(np.square(tail[ch, stop_frame:], out=square))
        del square
        tail *= np.sqrt(target_late / np.maximum(late, 1e-300))[:, None]
        np.add(er, tail, out=tail)
        end = _trim_end(tail.T, rate_hz=rate_hz, floor_db=tail_floor_db)
        wet = np.ascontiguousarray(tail[:, :end].T)  # (frames, channels); `nets` is freed on return
        if end is not None:
            _fade_out(wet, rate_hz=rate_hz)
        return wet

    # Each channel is calibrated on its own measurement (its own network); a network shared by
    # all channels (spread < 1) follows their mean.
    design_s = np.tile(targets, (design.networks, 1))
    # Step exponent per channel and band: halved whenever the error changes sign (the band
    # over-reacted), so that a band whose measurement is more sensitive than the design settles.
    step = np.ones((channels, len(bands)))
    last_sign = np.zeros((channels, len(bands)))
    iterations = 0
    while True:
        iterations += 1
        wet = None  # the last pass's response is not kept while the next one is rendered
        wet = render_tail(design_s)
        measured_ch = analysis.band_t30_s(wet, rate_hz=rate_hz, bands_hz=bands).T  # (channels, bands)
        err = np.abs(measured_ch / targets[None, :] - 1.0) * 100.0
        if not calibrate or iterations >= max_iterations or np.all(err <= tolerance_pct):
            break
        finite = np.isfinite(measured_ch)
        sign = np.where(finite, np.sign(targets[None, :] - measured_ch), 0.0)
        step = np.where(sign * last_sign < 0, step * 0.5, np.minimum(1.0, step * 1.25))
        last_sign = sign
        # A band that could not be measured keeps its design (no correction from it).
        ratio = np.where(finite, (targets[None, :] / np.where(finite, measured_ch, 1.0)) ** step, 1.0)
        per_network = np.ones_like(design_s)
        per_network[:channels] = ratio if design.networks >= channels else ratio.mean(axis=0)
        if design.networks > channels:
            per_network[channels:] = np.exp(np.log(ratio).mean(axis=0))
        design_s = np.clip(design_s * per_network, 0.5 * targets, DECAY_MARGIN * targets)
    er = table = None  # free both for what follows: render_tail is not called again
    finite = np.isfinite(measured_ch)
    measured = np.where(finite.any(axis=0), np.where(finite, measured_ch, 0.0).sum(axis=0) / np.maximum(finite.sum(axis=0), 1), np.nan)

    energy = np.sum(wet**2, axis=0)
    reverberant_ratio_db = power_to_db(float(np.mean(energy)))
    wet = wet / np.sqrt(energy)[None, :]
    predelay = int(round(room.predelay_ms * 1e-3 * rate_hz))
    if predelay:
        wet = np.concatenate([np.zeros((predelay, channels)), wet])
    wet = np.ascontiguousarray(wet)
    wet.setflags(write=False)
    return Response(
        ir=wet,
        rate_hz=rate_hz,
        tail_frames=wet.shape[0] - 1,
        bands_hz=bands,
        target_s=tuple(float(t) for t in targets),
        measured_s=tuple(float(m) for m in measured),
        error_pct=tuple(float(e) for e in 100.0 * (measured / targets - 1.0)),
        channel_error_pct=tuple(tuple(float(e) for e in row) for row in 100.0 * (measured_ch / targets[None, :] - 1.0)),
        iterations=iterations,
        design_s=tuple(float(d) for d in design_s.mean(axis=0)),
        reverberant_ratio_db=reverberant_ratio_db,
        room_fingerprint=room.fingerprint(),
    )
