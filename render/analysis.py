"""ISO 3382-1 acoustic analysis of room impulse responses (pure DSP, no I/O).

Measures, per channel, in octave bands and broadband: the early decay time
EDT and the reverberation times T20 and T30 (least-squares lines fitted to the
Schroeder decay curve), the clarity indices C50 and C80, the definition D50,
the centre time Ts, the usable decay range, and for two channels the late
inter-aural cross-correlation coefficient IACC.  Definitions follow
ISO 3382-1:2009; see :func:`analyze` for the choices made where the standard
leaves room.

The same code serves ``render analyze`` (any response, ours or measured in a
real room) and the calibration loop of :mod:`render.synthesis`, which calls
:func:`band_t30_s` several times per room, so the band filtering runs in the
FFT domain (one forward transform of the response, one product and one inverse
transform per band) and the filters' frequency responses are cached per
transform size.

Example: an exact exponential decay that falls 60 dB in 0.5 s.

>>> import numpy as np
>>> rate_hz = 48000
>>> t = np.arange(rate_hz) / rate_hz
>>> ir = np.exp(-3.0 * np.log(10.0) * t / 0.5)[:, np.newaxis]
>>> result = analyze(ir, rate_hz=rate_hz)
>>> broadband = result.channels[0].broadband
>>> round(broadband.t30_s, 6), round(broadband.edt_s, 6)
(0.5, 0.5)
>>> round(broadband.d50, 4)  # 1 - exp(-6 ln(10) * 0.05 s / 0.5 s)
0.7488
>>> [band.band_hz for band in result.channels[0].bands]
[125.0, 250.0, 500.0, 1000.0, 2000.0, 4000.0, 8000.0]
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import Optional, Tuple

import numpy as np
import scipy.fft
import scipy.signal

from .acoustics import OCTAVE_BANDS_HZ
from .errors import AnalysisError, ParameterError
from .units import db_to_gain, db_to_power, power_to_db

__all__ = [
    "octave_band_sos",
    "band_filter",
    "schroeder_decay_db",
    "decay_time_s",
    "analyze",
    "band_t30_s",
    "iacc",
    "BandResult",
    "ChannelAnalysis",
    "Analysis",
    "DECAY_RANGES_DB",
]

#: Evaluation ranges of the decay curve in dB (start, stop), ISO 3382-1:2009.
DECAY_RANGES_DB = {"EDT": (0.0, -10.0), "T20": (-5.0, -25.0), "T30": (-5.0, -35.0)}

#: The bottom of an evaluation range must lie this far above the noise (ISO 3382-1).
NOISE_MARGIN_DB = 10.0

#: The response starts where it first rises to this level re its maximum (ISO 3382-1, A.3.4).
ONSET_DB = -20.0

#: Curvature 100 (T30/T20 - 1) above this is flagged (ISO 3382-2, from memory).
CURVATURE_LIMIT_PCT = 10.0

#: Band filters: the product of bandwidth and decay time below which the filter's
#: own decay biases the result, for time-reversed filtering (Jacobsen & Rindel,
#: "Time reversed decay measurements", J. Sound Vib. 117, 1987: from memory).
MIN_BANDWIDTH_TIME = 4.0

_EDGE = math.sqrt(2.0)
_MIN_RATE_HZ = 1000.0
# The band filters' impulse responses are cut where their envelope has fallen
# to this fraction of its start; the tail beyond sums to < 1e-12 of the peak.
_TAIL_FRACTION = 1e-15
# Lundeby et al. (1995): local intervals per 10 dB of decay (3 to 10), the
# fraction of the response first taken as noise, and the iteration limit.
_INTERVALS_PER_10DB = 5
_NOISE_FRACTION = 0.1
# A noise window whose first half is this much louder than its second is still decaying.
_STEADY_DB = 6.0
# Block levels are median-filtered over this many blocks before looking for a crossing.
_MEDIAN_BLOCKS = 5
_LUNDEBY_ITERATIONS = 5
# Late energy below this fraction of the total makes C50 / C80 unmeasurable.
_LATE_FLOOR = 1e-9
_SMALLEST = float(np.nextafter(0.0, 1.0))


# --------------------------------------------------------------------------- results


def _fmt_num(value, digits):
    return "\u2014" if value is None else f"{value:.{digits}f}"


def _band_label(band_hz):
    if band_hz is None:
        return "broadband"
    if band_hz >= 1000.0:
        return f"{band_hz / 1000.0:g} kHz"
    return f"{band_hz:g} Hz"


@dataclass(frozen=True)
class BandResult:
    """ISO 3382-1 parameters of one channel in one band.

    Attributes
    ----------
    band_hz : float or None
        Octave-band centre frequency in Hz; None for the unfiltered (broadband) response.
    edt_s, t20_s, t30_s : float or None
        Early decay time and reverberation times in seconds; None when the
        decay curve does not allow the measurement (see ``notes``).
    c50_db, c80_db : float or None
        Clarity indices in dB; None when there is no measurable energy after
        50 / 80 ms.
    d50 : float or None
        Definition, 0 to 1.
    ts_ms : float or None
        Centre time in milliseconds after the onset.
    decay_range_db : float
        Usable decay range: how far the decay falls from its start before it
        meets the noise floor, in dB (0 when there is no decay).
    curvature_pct : float or None
        ``100 (T30 / T20 - 1)``; above 10 % the decay is not a single straight line.
    notes : tuple of str
        Plain-language reasons for missing values and warnings.
    """

    band_hz: Optional[float]
    edt_s: Optional[float]
    t20_s: Optional[float]
    t30_s: Optional[float]
    c50_db: Optional[float]
    c80_db: Optional[float]
    d50: Optional[float]
    ts_ms: Optional[float]
    decay_range_db: float
    curvature_pct: Optional[float]
    notes: Tuple[str, ...] = ()

    def to_dict(self):
        """JSON-ready dict of the fields (None for missing values, notes as a list)."""
        return {
            "band_hz": self.band_hz,
            "edt_s": self.edt_s,
            "t20_s": self.t20_s,
            "t30_s": self.t30_s,
            "c50_db": self.c50_db,
            "c80_db": self.c80_db,
            "d50": self.d50,
            "ts_ms": self.ts_ms,
            "decay_range_db": self.decay_range_db,
            "curvature_pct": self.curvature_pct,
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class ChannelAnalysis:
    """Results of one channel: the unfiltered response and each octave band (low to high)."""

    broadband: BandResult
    bands: Tuple[BandResult, ...]

    def to_dict(self):
        """JSON-ready dict: ``{"broadband": {...}, "bands": [{...}, ...]}``."""
        return {"broadband": self.broadband.to_dict(), "bands": [b.to_dict() for b in self.bands]}


_TABLE_ROWS = (
    ("EDT (s)", "edt_s", 2),
    ("T20 (s)", "t20_s", 2),
    ("T30 (s)", "t30_s", 2),
    ("C50 (dB)", "c50_db", 1),
    ("C80 (dB)", "c80_db", 1),
    ("D50", "d50", 2),
    ("Ts (ms)", "ts_ms", 0),
    ("range (dB)", "decay_range_db", 0),
)


@dataclass(frozen=True)
class Analysis:
    """ISO 3382-1 analysis of a (frames, channels) impulse response.

    Attributes
    ----------
    rate_hz : float
        Sample rate in Hz.
    frames : int
        Length of the analysed response in frames.
    channels : tuple of ChannelAnalysis
        One entry per channel, in channel order.
    iacc_late : float or None
        IACC over 80 ms after the onset to the end, for two channels; None otherwise.
    onset_frame : int
        Frame where the response first rises to 20 dB below its maximum; the
        energy parameters count time from here.
    """

    rate_hz: float
    frames: int
    channels: Tuple[ChannelAnalysis, ...]
    iacc_late: Optional[float]
    onset_frame: int

    def to_dict(self):
        """JSON-ready dict of everything measured (floats, ints, strings, lists and None)."""
        return {
            "rate_hz": self.rate_hz,
            "frames": self.frames,
            "onset_frame": self.onset_frame,
            "iacc_late": self.iacc_late,
            "channels": [c.to_dict() for c in self.channels],
        }

    def format_table(self):
        """Plain-text tables, one per channel: quantities down, bands across.

        ``—`` marks a value that could not be measured; the reasons follow
        each table.  Two-channel responses end with the IACC line.
        """
        lines = [
            f"onset at frame {self.onset_frame} ({1e3 * self.onset_frame / self.rate_hz:.1f} ms); "
            f"{self.frames} frames at {self.rate_hz:g} Hz"
        ]
        for index, channel in enumerate(self.channels):
            results = list(channel.bands) + [channel.broadband]
            header = [""] + [_band_label(r.band_hz) for r in results]
            rows = [header]
            for label, attr, digits in _TABLE_ROWS:
                rows.append([label] + [_fmt_num(getattr(r, attr), digits) for r in results])
            widths = [max(len(row[i]) for row in rows) for i in range(len(header))]
            lines.append("")
            lines.append(f"channel {index + 1} of {len(self.channels)}")
            for row in rows:
                cells = [row[0].ljust(widths[0])] + [cell.rjust(w) for cell, w in zip(row[1:], widths[1:])]
                lines.append("  ".join(cells).rstrip())
            notes = [f"  {_band_label(r.band_hz)}: {note}" for r in results for note in r.notes]
            if notes:
                lines.append("notes:")
                lines.extend(notes)
        if len(self.channels) == 2:
            lines.append("")
            lines.append(f"IACC (late, 80 ms after the onset to the end): {_fmt_num(self.iacc_late, 2)}")
        return "\n".join(lines)


# --------------------------------------------------------------------------- validation


def _is_real_number(value):
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


def _check_rate(rate_hz):
    if not (_is_real_number(rate_hz) and math.isfinite(rate_hz) and rate_hz >= _MIN_RATE_HZ):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a finite number ≥ {_MIN_RATE_HZ:g} Hz")
    return float(rate_hz)


def _check_ir(ir, name="ir"):
    arr = np.asarray(ir)
    if arr.dtype.kind not in "fiu":
        raise ParameterError(f"{name} has dtype {arr.dtype}: expected real samples (float64)")
    if arr.ndim != 2:
        raise ParameterError(
            f"{name} has shape {arr.shape}: expected (frames, channels); mono is (frames, 1)"
        )
    if arr.shape[0] == 0 or arr.shape[1] == 0:
        raise ParameterError(f"{name} has shape {arr.shape}: expected at least one frame and one channel")
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ParameterError(f"{name} contains NaN or infinite samples: expected finite values")
    return arr


def _require_signal(x, name="ir"):
    if not np.any(x):
        raise AnalysisError(f"{name} is all zeros ({x.shape[0]} frames): there is no response to analyse")


def _check_bands(bands_hz):
    try:
        bands = tuple(bands_hz)
    except TypeError:
        raise ParameterError(f"bands_hz = {bands_hz!r}: expected a sequence of frequencies in Hz") from None
    for b in bands:
        if not (_is_real_number(b) and math.isfinite(b) and b > 0):
            raise ParameterError(f"bands_hz contains {b!r}: every centre frequency must be a finite number > 0 Hz")
    return tuple(float(b) for b in bands)


def _band_fits(band_hz, rate):
    return band_hz * _EDGE < 0.5 * rate


# --------------------------------------------------------------------------- band filters


def octave_band_sos(center_hz, *, rate_hz, order=3):
    """Butterworth octave band-pass filter as second-order sections.

    The band edges are ``center_hz / sqrt(2)`` and ``center_hz * sqrt(2)``;
    ``order`` is the Butterworth order per edge, so the default 3 gives a
    6th-order band-pass (three sections), common practice for room-acoustic
    octave analysis.  ISO 3382-1 asks for octave filters to IEC 61260; this
    design is an approximation of such a filter, its class is not verified here.

    Parameters
    ----------
    center_hz : float
        Band centre frequency in Hz, > 0; the upper edge ``center_hz * sqrt(2)``
        must lie below the Nyquist frequency.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    order : int
        Butterworth order per band edge, 1 to 10.

    Returns
    -------
    ndarray, shape (order, 6)
        Second-order sections in :func:`scipy.signal.sosfilt` layout.

    Examples
    --------
    >>> octave_band_sos(1000.0, rate_hz=48000).shape
    (3, 6)
    """
    rate = _check_rate(rate_hz)
    if not (_is_real_number(center_hz) and math.isfinite(center_hz) and center_hz > 0):
        raise ParameterError(f"center_hz = {center_hz!r}: must be a finite number > 0 Hz")
    if not (isinstance(order, (int, np.integer)) and not isinstance(order, bool) and 1 <= order <= 10):
        raise ParameterError(f"order = {order!r}: must be an integer from 1 to 10")
    low, high = float(center_hz) / _EDGE, float(center_hz) * _EDGE
    if high >= 0.5 * rate:
        raise ParameterError(
            f"center_hz = {center_hz:g}: the upper band edge {high:.1f} Hz must lie below the Nyquist "
            f"frequency {0.5 * rate:g} Hz (rate_hz = {rate:g})"
        )
    return scipy.signal.butter(int(order), [low, high], btype="bandpass", output="sos", fs=rate)


@functools.lru_cache(maxsize=64)
def _band_impulse(band_hz, rate, order):
    """(sos, impulse response) of one band, the response cut where it has rung out.

    The cut comes where the envelope of the slowest pole, ``r ** n``, has
    fallen to 1e-15; everything beyond sums to less than 1e-12 of the peak.
    """
    sos = octave_band_sos(band_hz, rate_hz=rate, order=order)
    radius = float(np.max(np.abs(scipy.signal.sos2zpk(sos)[1])))
    length = int(math.ceil(math.log(_TAIL_FRACTION) / math.log(radius))) if 0 < radius < 1 else 1
    impulse = np.zeros(max(length, 1))
    impulse[0] = 1.0
    response = scipy.signal.sosfilt(sos, impulse)
    sos.setflags(write=False)
    response.setflags(write=False)
    return sos, response


def _fft_size(frames, bands, rate):
    """Transform size: at least the response plus the longest ringing, from a sparse ladder.

    The ladder ``{16, 18, 20, 24, 25, 27, 30} * 2**k`` (steps of at most 20 %)
    lets responses of similar length share the cached band responses, which
    matters in the calibration loop, where the length changes a little from
    one call to the next.
    """
    need = frames + max(_band_impulse(b, rate, 3)[1].shape[0] for b in bands)
    scale = 1
    while 30 * scale < need:
        scale *= 2
    return min(m * scale for m in (16, 18, 20, 24, 25, 27, 30) if m * scale >= need)


@functools.lru_cache(maxsize=2)
def _band_responses(bands, rate, n_fft):
    """Conjugate frequency responses ``conj(H)``, shape (bands, n_fft // 2 + 1), on the rfft grid.

    ``H`` is the transform of the band filter's impulse response (computed
    by :func:`scipy.signal.sosfilt`, cut where it has rung out), which equals
    the rational response :func:`scipy.signal.freqz_sos` evaluates to a few
    times 1e-12 (the peak gain is 1; the tests compare the two) and costs a
    few ms per band where freqz_sos takes ~30 ms on a 6 s grid.  The conjugate
    is stored because the decay analysis filters time-reversed.
    """
    # One band at a time (zero-padded by rfft itself), so that building the table needs no
    # more memory than the table: the same numbers as one batched transform of the padded rows.
    conj = np.empty((len(bands), n_fft // 2 + 1), dtype=np.complex128)
    for k, band in enumerate(bands):
        conj[k] = scipy.fft.rfft(_band_impulse(band, rate, 3)[1], n=n_fft)
    np.conjugate(conj, out=conj)
    conj.setflags(write=False)
    return conj


@functools.lru_cache(maxsize=1)
def _band_energy_weights(bands, rate, n_fft):
    """``|H|^2`` and ``Re(conj(H) G)``, each (bands, n_fft // 2 + 1), with ``G`` the transform of ``n h[n]``.

    ``Re(conj(H) G) = |H|^2 * group delay``: with it the first moment of the
    filtered energy, ``sum n y[n]^2``, is a weighted sum over frequency.
    """
    conj = _band_responses(bands, rate, n_fft)
    weighted = np.zeros((len(bands), n_fft))
    for k, band in enumerate(bands):
        h = _band_impulse(band, rate, 3)[1]
        weighted[k, : h.shape[0]] = _ramp(h.shape[0]) * h
    moment = scipy.fft.rfft(weighted, axis=-1)
    power = conj.real**2 + conj.imag**2
    delay = conj.real * moment.real - conj.imag * moment.imag  # Re(conj(H) G) with conj = conj(H)
    power.setflags(write=False)
    delay.setflags(write=False)
    return power, delay


_RAMP = np.zeros(0)


def _ramp(n):
    """Read-only ``arange(n)`` as float64 (shared, so long sums need no new index array)."""
    global _RAMP
    if _RAMP.shape[0] < n:
        ramp = np.arange(max(n, 2 * _RAMP.shape[0]), dtype=np.float64)
        ramp.setflags(write=False)
        _RAMP = ramp
    return _RAMP[:n]


def _channel_spectra(x, n_fft):
    """rfft of each channel, zero-padded to n_fft: shape (channels, n_fft // 2 + 1)."""
    return scipy.fft.rfft(np.ascontiguousarray(x.T), n=n_fft, axis=-1)


def _band_signal(spectra, conj_response, n_fft, reverse):
    """One band, channels first (channels, n_fft): time-reversed filter when reverse, else causal."""
    product = spectra * (conj_response if reverse else np.conj(conj_response))
    return scipy.fft.irfft(product, n=n_fft, axis=-1)


def band_filter(ir, *, rate_hz, bands_hz=OCTAVE_BANDS_HZ, reverse=True):
    """Filter a response into octave bands in the FFT domain.

    The response is zero-padded until the slowest band filter has rung out
    (its impulse response envelope below 1e-15 of its start), transformed
    once, multiplied by each band's frequency response and transformed back,
    which equals :func:`scipy.signal.sosfilt` (linear, not circular filtering)
    to rounding error.

    Parameters
    ----------
    ir : array_like, shape (frames, channels)
        Impulse response, float64.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    bands_hz : sequence of float
        Band centres in Hz; each upper edge ``center * sqrt(2)`` must lie below Nyquist.
    reverse : bool
        If True (default), filter the time-reversed response and reverse the
        result, i.e. apply the conjugate (anti-causal) frequency response.
        ISO 3382 permits this; it moves the filter's own ringing before the
        sound instead of into the decay, which matters for short decays in low
        bands.  The output stays aligned with the input in time.

    Returns
    -------
    ndarray, shape (bands, frames, channels)
        Band signals, float64, C-contiguous.

    Examples
    --------
    >>> import numpy as np
    >>> impulse = np.zeros((4800, 1)); impulse[100, 0] = 1.0
    >>> band_filter(impulse, rate_hz=48000, bands_hz=(500.0, 1000.0)).shape
    (2, 4800, 1)
    """
    x = _check_ir(ir)
    rate = _check_rate(rate_hz)
    bands = _check_bands(bands_hz)
    if not bands:
        return np.zeros((0,) + x.shape)
    for b in bands:
        octave_band_sos(b, rate_hz=rate)  # raises for a band above Nyquist
    frames = x.shape[0]
    n_fft = _fft_size(frames, bands, rate)
    spectra = _channel_spectra(x, n_fft)
    responses = _band_responses(bands, rate, n_fft)
    out = np.empty((len(bands), frames, x.shape[1]))
    for k in range(len(bands)):
        out[k] = _band_signal(spectra, responses[k], n_fft, bool(reverse))[:, :frames].T
    return out


# --------------------------------------------------------------------------- decay curves


def _first_reaching(values, threshold, axis):
    """First index along ``axis`` (0 or 1 of a 2-D array) where any entry of |values| reaches threshold.

    Scans in chunks, since the onset is usually near the start.
    """
    length = values.shape[axis]
    begin, chunk = 0, 4096
    while begin < length:
        part = values[begin : begin + chunk] if axis == 0 else values[:, begin : begin + chunk]
        hit = np.any(np.abs(part) >= threshold, axis=1 - axis)
        if hit.any():
            return begin + int(np.argmax(hit))
        begin += chunk
        chunk *= 2
    return 0


def _onset_channels_first(power):
    """First frame at which any channel's power reaches ONSET_DB re the overall maximum.

    ``power`` has shape (channels, frames).
    """
    peak = float(np.max(power))
    if not peak > 0:
        return 0
    return _first_reaching(power, peak * db_to_power(ONSET_DB), axis=1)


def _onset_frame(x):
    """Onset of a (frames, channels) response by the ISO 3382-1 rule (see :func:`analyze`)."""
    peak = max(float(np.max(x)), -float(np.min(x)))
    if not peak > 0:
        return 0
    return _first_reaching(x, peak * db_to_gain(ONSET_DB), axis=0)


def _backward_sum_inplace(power):
    """Turn a 1-D power array into Schroeder's backward sum ``S[n] = sum over m >= n``, in place."""
    view = power[::-1]
    np.cumsum(view, out=view)
    return power


def _first_below(values, threshold, lo, hi):
    """First index in [lo, hi) of a non-increasing 1-D array with ``values[i] < threshold``, else hi."""
    while lo < hi:
        mid = (lo + hi) // 2
        if values[mid] < threshold:
            hi = mid
        else:
            lo = mid + 1
    return lo


def _dot(a, b):
    """Dot product of 1-D arrays without BLAS.

    OpenBLAS threads long dot products, and on a busy machine each call can
    then wait milliseconds for its second thread; einsum's own loop does not.
    """
    return float(np.einsum("i,i->", a, b)) if a.ndim == 1 else np.einsum("i,i...->...", a, b)


def _sum_from(backward, index):
    return float(backward[index]) if index < backward.shape[0] else 0.0


def _line_fit(x0, dx, y):
    """Least-squares (slope, intercept) of y over the uniform grid ``x0 + dx * j``, or None.

    Sums over the shared index ramp, so no temporary arrays.
    """
    n = y.shape[0]
    if n < 2:
        return None
    sum_y = float(np.sum(y))
    sum_jy = float(_dot(_ramp(n), y))
    slope_j = (sum_jy - 0.5 * (n - 1) * sum_y) / (n * (n * n - 1.0) / 12.0)
    slope = slope_j / dx
    return slope, sum_y / n - slope * (x0 + 0.5 * dx * (n - 1))


def _block_levels(backward, stop, width, total):
    """Mean power in dB re ``total`` per frame of the blocks of ``width`` frames in [0, stop).

    Block j spans frames ``[j * width, (j + 1) * width)``; its centre is
    ``(width - 1) / 2 + j * width``.
    """
    count = stop // width
    if count < 1:
        return np.zeros(0)
    edges = np.arange(count + 1) * width
    upper = backward[edges[:-1]]
    if edges[-1] < backward.shape[0]:
        lower = backward[edges[1:]]
    else:
        lower = np.append(backward[edges[1:-1]], 0.0)
    return power_to_db((upper - lower) / (width * total))


def _block_bias(width, slope):
    """How far the mean of an exponential over a block lies above its value at the block centre.

    ``sinh(w b / 2) / (w sinh(b / 2))`` for blocks of ``w`` frames and a decay of
    ``b`` nepers of power per frame (``slope`` in dB per frame); dividing it out
    makes a line fitted to block means exact for an exponential decay.
    """
    if not slope < 0 or width <= 1:
        return 1.0
    # the same ratio written with q = db_to_power(slope), the power ratio per frame:
    # (1 - q**w) / (w (1 - q) q**((w - 1) / 2))
    return (1.0 - db_to_power(width * slope)) / (
        width * (1.0 - db_to_power(slope)) * db_to_power(0.5 * (width - 1) * slope)
    )


@dataclass(frozen=True)
class _Truncation:
    stop: int  # frames [0, stop) of the response are integrated
    tail: float  # energy added for the part beyond stop (same units as the power)
    decay_range_db: float


def _truncation(backward):
    """Where a decay meets its noise floor, the energy compensation, and the decay range.

    A simplified form of the iterative method of Lundeby, Vigran, Bietz and
    Vorländer, "Uncertainties of measurements in room acoustics", Acustica 81
    (1995).  Its first steps as quoted in secondary sources: average the
    squared response in local intervals; take a first noise level from the
    last 10 % of the response; fit a line from the peak interval down to the
    interval 5-10 dB above the noise.  Its later steps from memory: intervals
    sized for 3-10 per 10 dB of decay; the noise re-estimated from a point
    5-10 dB of decay beyond the crosspoint (where the line meets the noise),
    at least the last 10 %; the late decay fitted over 10-20 dB ending 5-10 dB
    above the noise; repeated until the crosspoint settles.  Here:

    - first intervals of 1 % of the response (Lundeby: 10-50 ms; this function
      does not know the sample rate), first fit from the peak to 10 dB above
      the noise;
    - then fixed intervals, 5 per 10 dB of the first fit's slope; the noise
      from 5 dB beyond the crosspoint, but a window longer than the last 10 %
      whose first half is more than 6 dB louder than its second is still
      decay, and then the last 10 % is used; the late fit from 30 to 10 dB
      above the noise; at most 5 rounds, stopping when the crosspoint moves
      less than one interval;
    - level crossings are looked for in the block levels median-filtered
      over 5 blocks (robust to dips of a fluctuating decay and to a rise at
      the very end, such as a time-reversed filter's ringing of a truncation);
    - the compensation is the energy of the late line continued from the
      crosspoint to infinity, corrected for the block averaging so that it is
      exact for an exponential decay; no noise is subtracted;
    - the decay range is the first fit's level at frame 0 minus the noise.

    ``backward`` is the 1-D backward sum of the squared response.
    """
    total = float(backward[0])
    n_end = _first_below(backward, _SMALLEST, 0, backward.shape[0])  # trailing exact zeros are no noise
    if not total > 0 or n_end < 1:
        return _Truncation(stop=backward.shape[0], tail=0.0, decay_range_db=0.0)

    last_part = int((1.0 - _NOISE_FRACTION) * n_end)

    def noise_db(start):
        # Mean power from `start` to the end; a window longer than the last 10 %
        # must look like noise (its two halves within 6 dB), else the last 10 % is used.
        start = int(min(max(start, 0), last_part))
        if start < last_part:
            mid = (start + n_end) // 2
            first_half = (float(backward[start]) - float(backward[mid])) / (mid - start)
            if first_half > db_to_power(_STEADY_DB) * float(backward[mid]) / (n_end - mid):
                start = last_part
        return power_to_db(_sum_from(backward, start) / ((n_end - start) * total))

    def first_below(levels, first, level):
        # First block from `first` on where the running median of 5 blocks falls below
        # `level` (len(levels) if none): the median ignores a single-block dip of a
        # fluctuating decay, and a rise at the very end (a truncation's ringing) does
        # not matter because the first crossing is taken.
        part = levels[first:]
        if part.size >= _MEDIAN_BLOCKS:
            half = _MEDIAN_BLOCKS // 2
            padded = np.concatenate([np.full(half, part[0]), part, np.full(half, part[-1])])
            part = np.median(np.lib.stride_tricks.sliding_window_view(padded, _MEDIAN_BLOCKS), axis=1)
        below = np.flatnonzero(part < level)
        return first + int(below[0]) if below.size else levels.size

    def fit_blocks(levels, width, first, last):
        return _line_fit(0.5 * (width - 1) + width * first, float(width), levels[first:last])

    width = max(1, n_end // 100)
    noise = noise_db(last_part)
    levels = _block_levels(backward, n_end, width, total)
    fallback = _Truncation(
        stop=n_end, tail=0.0, decay_range_db=max(0.0, float(np.max(levels)) - noise) if levels.size else 0.0
    )
    if levels.size < 3:
        return fallback
    peak = int(np.argmax(levels))
    fit = fit_blocks(levels, width, peak, first_below(levels, peak, noise + NOISE_MARGIN_DB))
    if fit is None or not fit[0] < 0:
        return fallback
    slope, intercept = fit
    line_width = width
    # The decay's level at frame 0 by the first fit (block-mean bias removed): the top of the range.
    start_level = intercept - power_to_db(_block_bias(width, slope))
    cross = (noise - intercept) / slope
    width = int(min(max(round(10.0 / -slope / _INTERVALS_PER_10DB), 1), max(1, n_end // 10)))
    levels = _block_levels(backward, n_end, width, total)
    if levels.size >= 3:
        peak = int(np.argmax(levels))
        for _ in range(_LUNDEBY_ITERATIONS):
            noise = noise_db(cross + 5.0 / -slope)
            end = first_below(levels, peak, noise + NOISE_MARGIN_DB)
            start = min(first_below(levels, peak, noise + NOISE_MARGIN_DB + 20.0), max(peak, end - 2))
            fit = fit_blocks(levels, width, start, end)
            if fit is None or not fit[0] < 0:
                break
            slope, intercept = fit
            line_width = width
            new_cross = (noise - intercept) / slope
            moved = abs(new_cross - cross)
            cross = new_cross
            if moved < width:
                break
    stop = int(min(max(round(cross), 1), n_end))
    # Energy of the late decay line continued from `stop` on: a geometric series.
    tail = total * db_to_power(intercept + slope * stop) / (1.0 - db_to_power(slope))
    tail /= _block_bias(line_width, slope)
    return _Truncation(stop=stop, tail=float(tail), decay_range_db=max(0.0, start_level - noise))


def _curve_db(backward, trunc, end):
    """Decay curve in dB re its start over frames [0, end), end <= trunc.stop."""
    s_stop = _sum_from(backward, trunc.stop)
    start = float(backward[0]) - s_stop + trunc.tail
    if not start > 0:
        return np.full(end, np.nan)
    energy = backward[:end] - s_stop
    energy += trunc.tail
    energy /= start
    return power_to_db(energy)


def _curve_prefix_db(backward, trunc, lowest_db):
    """The decay curve from frame 0 to a few frames past where it first falls below ``lowest_db``.

    Equal, frame by frame, to the start of the full curve: the fits need no more.
    """
    s_stop = _sum_from(backward, trunc.stop)
    start = float(backward[0]) - s_stop + trunc.tail
    threshold = db_to_power(lowest_db) * start - trunc.tail + s_stop  # curve < lowest  <=>  S < threshold
    first = _first_below(backward, threshold, 0, trunc.stop)  # S is non-increasing
    return _curve_db(backward, trunc, min(trunc.stop, first + 8))


def schroeder_decay_db(ir_band):
    """Schroeder backward-integrated decay curve, per channel, with noise-floor handling.

    ``E(t) = ∫_t^∞ p²(τ) dτ`` (Schroeder 1965), as the backward sum of the
    squared samples, in dB re ``E(0)`` (frame 0 of the input; pass the response
    from its onset).  Before integrating, the noise level is estimated (first
    from the last 10 % of the response), the point where the decay meets it
    is found, the sum is cut there, and the energy the fitted late decay would
    have had beyond that point is added back: a simplified form of the
    iterative method of Lundeby et al., "Uncertainties of measurements in room
    acoustics", Acustica 81 (1995); the steps and the simplifications are
    listed in the source of ``_truncation``.  A noise-free exponential decay
    comes out as an exact straight line.

    Parameters
    ----------
    ir_band : array_like, shape (frames, channels)
        Response (usually one band of it), float64.

    Returns
    -------
    ndarray, shape (frames, channels)
        Decay curve in dB, 0 at frame 0, falling; NaN from the truncation
        point on (and for a channel that is all zeros).

    Examples
    --------
    >>> import numpy as np
    >>> ir = (0.5 ** np.arange(200.0))[:, np.newaxis]  # power falls 6.02 dB per frame
    >>> np.round(schroeder_decay_db(ir)[:3, 0], 2)
    array([  0.  ,  -6.02, -12.04])
    """
    x = _check_ir(ir_band, "ir_band")
    if np.any(x):
        x = _normalised(x)
    out = np.full(x.shape, np.nan)
    for c in range(x.shape[1]):
        backward = _backward_sum_inplace(np.square(x[:, c]))
        if not backward[0] > 0:
            continue
        trunc = _truncation(backward)
        out[: trunc.stop, c] = _curve_db(backward, trunc, trunc.stop)
    return out


def _fit_decay(curve_db, rate, start_db, stop_db):
    """(decay time in s, None) or (None, reason) from a 1-D decay curve in dB."""
    at_start = np.flatnonzero(curve_db <= start_db)
    if at_start.size == 0:
        return None, f"the decay curve does not fall to {start_db:g} dB"
    first = int(at_start[0])
    outside = np.flatnonzero(~(curve_db[first:] >= stop_db))  # below stop_db, or NaN
    if outside.size == 0 or np.isnan(curve_db[first + int(outside[0])]):
        lowest = float(np.nanmin(curve_db))
        return None, f"the decay curve ends at {lowest:.0f} dB, above {stop_db:g} dB"
    last = first + int(outside[0])  # exclusive
    if last - first < 2:
        return None, f"too few samples between {start_db:g} and {stop_db:g} dB"
    fit = _line_fit(float(first), 1.0, curve_db[first:last])
    if fit is None or not fit[0] < 0:
        return None, "the decay curve does not fall"
    return -60.0 / (fit[0] * rate), None


def _range_reason(stop_db, decay_range_db):
    need = NOISE_MARGIN_DB - stop_db
    if decay_range_db < need:
        return f"not enough decay range ({math.floor(decay_range_db):.0f} dB; needs {need:.0f} dB)"
    return None


def decay_time_s(decay_db, *, rate_hz, start_db, stop_db, decay_range_db=None):
    """Decay time from a least-squares line over ``[start_db, stop_db]`` of a decay curve.

    The line is fitted to the curve from the first frame at or below
    ``start_db`` to the last frame before it first falls below ``stop_db``,
    and extrapolated to 60 dB (ISO 3382-1): EDT uses (0, -10), T20 (-5, -25),
    T30 (-5, -35), see :data:`DECAY_RANGES_DB`.

    Parameters
    ----------
    decay_db : array_like, shape (frames,)
        One channel of :func:`schroeder_decay_db`: dB re the start, NaN where
        the curve was cut at the noise floor.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    start_db, stop_db : float
        Evaluation range in dB, ``0 >= start_db > stop_db``.
    decay_range_db : float or None
        Decay range above the noise floor in dB (see :class:`BandResult`).
        ISO 3382-1 wants the bottom of the range at least 10 dB above the
        noise, so with a value here the result is None unless
        ``decay_range_db >= 10 - stop_db`` (T20 needs 35 dB, T30 45 dB).  None
        skips this check.

    Returns
    -------
    float or None
        Seconds for 60 dB of decay; None when the curve does not reach
        ``stop_db`` (at least 10 dB above the noise), or does not fall.

    Examples
    --------
    >>> import numpy as np
    >>> curve = -60.0 * np.arange(48000) / 48000 / 0.8  # 60 dB in 0.8 s
    >>> round(decay_time_s(curve, rate_hz=48000, start_db=-5.0, stop_db=-35.0), 6)
    0.8
    >>> print(decay_time_s(curve, rate_hz=48000, start_db=-5.0, stop_db=-35.0, decay_range_db=31.0))
    None
    """
    rate = _check_rate(rate_hz)
    curve = np.asarray(decay_db, dtype=np.float64)
    if curve.ndim != 1:
        raise ParameterError(f"decay_db has shape {curve.shape}: expected one curve, shape (frames,)")
    for name, value in (("start_db", start_db), ("stop_db", stop_db)):
        if not (_is_real_number(value) and math.isfinite(value) and value <= 0):
            raise ParameterError(f"{name} = {value!r}: must be a finite level ≤ 0 dB")
    if not stop_db < start_db:
        raise ParameterError(f"stop_db = {stop_db!r}: must lie below start_db = {start_db!r}")
    if decay_range_db is not None:
        if not (_is_real_number(decay_range_db) and math.isfinite(decay_range_db)):
            raise ParameterError(f"decay_range_db = {decay_range_db!r}: must be a finite number of dB or None")
        if _range_reason(stop_db, decay_range_db) is not None:
            return None
    return _fit_decay(curve, rate, float(start_db), float(stop_db))[0]


def _decays(backward, rate, names, band_hz):
    """Decay times of one channel from its backward sum: ({name: value}, range_db, notes)."""
    values, notes = {}, []
    if not float(backward[0]) > 0:
        return {n: None for n in names}, 0.0, ["no energy after the onset"]
    trunc = _truncation(backward)
    lowest = min(DECAY_RANGES_DB[n][1] for n in names)
    curve = _curve_prefix_db(backward, trunc, lowest)
    for name in names:
        start_db, stop_db = DECAY_RANGES_DB[name]
        reason = _range_reason(stop_db, trunc.decay_range_db)
        value = None
        if reason is None:
            value, reason = _fit_decay(curve, rate, start_db, stop_db)
        if reason is not None:
            notes.append(f"{name}: {reason}")
        values[name] = value
    if band_hz is not None:
        bandwidth = band_hz * (_EDGE - 1.0 / _EDGE)
        short = [n for n in names if values[n] is not None and bandwidth * values[n] < MIN_BANDWIDTH_TIME]
        if short:
            notes.append(
                f"{', '.join(short)} shorter than {MIN_BANDWIDTH_TIME / bandwidth:.3f} s: "
                f"the band filter's own decay may bias it"
            )
    return values, float(trunc.decay_range_db), notes


# --------------------------------------------------------------------------- energy parameters


def _energy_parameters(early50, early80, total, late50, late80, first_moment, rate):
    """(c50, c80, d50, ts_ms, notes) from energies of one channel (late energies given separately)."""
    notes = []
    if not total > 0:
        return None, None, None, None, ["no energy after the onset"]

    def clarity(early, late, te_ms):
        if late <= _LATE_FLOOR * total:
            notes.append(f"C{te_ms}: no measurable energy after {te_ms} ms")
            return None
        if not early > 0:
            notes.append(f"C{te_ms}: no energy in the first {te_ms} ms")
            return None
        return power_to_db(early / late)

    c50 = clarity(early50, late50, 50)
    c80 = clarity(early80, late80, 80)
    d50 = min(1.0, max(0.0, early50 / total))
    ts_ms = 1e3 * first_moment / (total * rate)
    return c50, c80, d50, ts_ms, notes


def _early_frames(rate):
    return int(round(0.050 * rate)), int(round(0.080 * rate))


def _broadband_energies(x, onset, rate):
    """Per channel: (early50, early80, total, late50, late80, first moment in frames x energy)."""
    n50, n80 = _early_frames(rate)
    out = [np.zeros(x.shape[1]) for _ in range(6)]
    for c in range(x.shape[1]):
        power = np.square(x[onset:, c])
        values = (
            np.sum(power[:n50]),
            np.sum(power[:n80]),
            np.sum(power),
            np.sum(power[n50:]),
            np.sum(power[n80:]),
            _dot(_ramp(power.shape[0]), power),
        )
        for array, value in zip(out, values):
            array[c] = value
    return tuple(out)


def _band_energies(x, spectra, bands, rate, n_fft, onset):
    """Energies of the causally filtered bands, per (band, channel), from the onset to infinity.

    Totals and first moments come from the spectrum: Parseval, and
    ``sum n y[n]^2 = (1/N) sum conj(Y) DFT(n y)`` with
    ``DFT(n y) = DFT(n x) H + X DFT(n h)``; only the first 80 ms after the
    onset are filtered in the time domain.  Equal to filtering with
    :func:`scipy.signal.sosfilt` and summing, to rounding error.
    Returns (early50, early80, total, late50, late80, first), each (bands, channels).
    """
    frames, channels = x.shape
    power_h, delay_h = _band_energy_weights(bands, rate, n_fft)
    weights = np.full(spectra.shape[1], 2.0 / n_fft)  # rfft bins stand for two, except DC and Nyquist
    weights[0] = 1.0 / n_fft
    if n_fft % 2 == 0:
        weights[-1] = 1.0 / n_fft
    spectra_n = scipy.fft.rfft(np.ascontiguousarray(x.T) * _ramp(frames), n=n_fft, axis=-1)
    power_x = (spectra.real**2 + spectra.imag**2) * weights  # (C, K)
    cross_x = (spectra.real * spectra_n.real + spectra.imag * spectra_n.imag) * weights  # Re(conj(X) DFT(n x))
    total_all = np.einsum("bk,ck->bc", power_h, power_x)  # (B, C): sum over all frames of y^2
    first_all = np.einsum("bk,ck->bc", power_h, cross_x) + np.einsum("bk,ck->bc", delay_h, power_x)  # sum n y^2

    n50, n80 = _early_frames(rate)
    head = np.zeros((onset + n80, channels))
    head[: min(frames, onset + n80)] = x[: onset + n80]
    index = _ramp(onset)
    shape = (len(bands), channels)
    pre, pre_first, early50, early80 = (np.zeros(shape) for _ in range(4))
    for k, band in enumerate(bands):
        y = scipy.signal.sosfilt(np.array(_band_impulse(band, rate, 3)[0]), head, axis=0)
        p = y * y
        pre[k] = p[:onset].sum(axis=0)
        pre_first[k] = np.einsum("n,nc->c", index, p[:onset])
        early50[k] = p[onset : onset + n50].sum(axis=0)
        early80[k] = p[onset:].sum(axis=0)
    total = np.maximum(total_all - pre, 0.0)
    first = (first_all - pre_first) - onset * total
    late50 = np.maximum(total - early50, 0.0)
    late80 = np.maximum(total - early80, 0.0)
    return early50, early80, total, late50, late80, first


# --------------------------------------------------------------------------- IACC


def _iacc_value(x, rate, onset, start_s, stop_s, max_lag_ms):
    a = onset + int(round(start_s * rate))
    b = x.shape[0] if stop_s is None else min(x.shape[0], onset + int(round(stop_s * rate)))
    if b - a < 2:
        window = "the end" if stop_s is None else f"{stop_s:g} s"
        raise AnalysisError(
            f"the IACC window from {start_s:g} s to {window} after the onset (frame {onset}) holds "
            f"{max(0, b - a)} frames of the {x.shape[0]}-frame response: too short"
        )
    left, right = np.ascontiguousarray(x[a:b, 0]), np.ascontiguousarray(x[a:b, 1])
    energy = _dot(left, left) * _dot(right, right)
    if not energy > 0:
        raise AnalysisError("a channel is silent in the IACC window: the cross-correlation is undefined")
    n = b - a
    lag = min(int(math.floor(max_lag_ms * 1e-3 * rate + 1e-9)), n - 1)
    n_fft = scipy.fft.next_fast_len(n + lag, real=True)
    # corr[tau] = sum over n of left[n] right[n + tau], zero outside the window (no wrap: n_fft >= n + lag)
    corr = scipy.fft.irfft(np.conj(scipy.fft.rfft(left, n_fft)) * scipy.fft.rfft(right, n_fft), n_fft)
    best = max(float(np.max(np.abs(corr[: lag + 1]))), float(np.max(np.abs(corr[n_fft - lag :]))) if lag else 0.0)
    return min(1.0, best / math.sqrt(energy))


def iacc(ir, *, rate_hz, start_s=0.08, stop_s=None, max_lag_ms=1.0):
    """Inter-aural cross-correlation coefficient of a two-channel response.

    ``IACF(τ) = ∫ pL(t) pR(t + τ) dt / sqrt(∫ pL² dt ∫ pR² dt)`` over the
    window ``[start_s, stop_s]`` after the onset (signals taken as zero
    outside it), and ``IACC = max |IACF(τ)|`` for ``|τ| <= max_lag_ms``
    (ISO 3382-1:2009, annex on binaural measures: from memory).  The default
    window is the late part, 80 ms to the end (IACC_L).  Broadband only: the
    standard also uses octave bands, which this function does not.

    Parameters
    ----------
    ir : array_like, shape (frames, 2)
        Left and right channels, float64.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    start_s : float
        Window start in seconds after the onset, ≥ 0.
    stop_s : float or None
        Window end in seconds after the onset (> start_s); None for the end of the response.
    max_lag_ms : float
        Largest lag searched, in ms, 0 to 10.

    Returns
    -------
    float
        IACC, 0 to 1.

    Examples
    --------
    >>> import numpy as np
    >>> noise = np.random.default_rng(1).standard_normal(9600)
    >>> round(iacc(np.stack([noise, noise], axis=1), rate_hz=48000), 6)
    1.0
    """
    x = _check_ir(ir)
    rate = _check_rate(rate_hz)
    if x.shape[1] != 2:
        raise ParameterError(f"ir has {x.shape[1]} channel(s): IACC needs exactly two (left, right)")
    if not (_is_real_number(start_s) and math.isfinite(start_s) and start_s >= 0):
        raise ParameterError(f"start_s = {start_s!r}: must be a finite number ≥ 0 s")
    if stop_s is not None and not (_is_real_number(stop_s) and math.isfinite(stop_s) and stop_s > start_s):
        raise ParameterError(f"stop_s = {stop_s!r}: must be None or a finite number > start_s = {start_s!r} s")
    if not (_is_real_number(max_lag_ms) and math.isfinite(max_lag_ms) and 0 <= max_lag_ms <= 10):
        raise ParameterError(f"max_lag_ms = {max_lag_ms!r}: must be from 0 to 10 ms")
    _require_signal(x)
    x = _normalised(x)
    return _iacc_value(x, rate, _onset_frame(x), float(start_s), stop_s, float(max_lag_ms))


# --------------------------------------------------------------------------- analysis


def _band_decay_table(x, rate, bands, names):
    """Decay results per (band, channel) of the time-reversed band signals.

    Each band's decay curve starts at that band's own onset (the ISO rule on
    the band signal): the time-reversed filter moves the band's share of the
    direct sound to just before the broadband onset, and this keeps it.
    Returns (table[band][channel] of _decays results, channel spectra, n_fft).
    """
    frames = x.shape[0]
    n_fft = _fft_size(frames, bands, rate)
    spectra = _channel_spectra(x, n_fft)
    return _band_decays(spectra, frames, rate, bands, names, n_fft), spectra, n_fft


def _band_decays(spectra, frames, rate, bands, names, n_fft):
    """The decay table of :func:`_band_decay_table` from the channel spectra (see there)."""
    channels = spectra.shape[0]
    responses = _band_responses(bands, rate, n_fft)
    table = []
    for k, band in enumerate(bands):
        power = _band_signal(spectra, responses[k], n_fft, reverse=True)[:, :frames]
        np.square(power, out=power)
        onset = _onset_channels_first(power)
        table.append(
            [_decays(_backward_sum_inplace(power[c, onset:]), rate, names, band) for c in range(channels)]
        )
        del power
    return table


def _normalised(x):
    """x divided by its peak magnitude (a new array): every measure here is scale-free, and
    squares of very large or very small samples stay inside the float range."""
    return x / max(float(np.max(x)), -float(np.min(x)))


def _check_all(ir, rate_hz, bands_hz):
    x = _check_ir(ir)
    rate = _check_rate(rate_hz)
    bands = _check_bands(bands_hz)
    _require_signal(x)
    return _normalised(x), rate, bands


def _curvature(t20, t30):
    if t20 is None or t30 is None:
        return None
    return 100.0 * (t30 / t20 - 1.0)


def _band_result(band_hz, decays, energies):
    values, decay_range, decay_notes = decays
    c50, c80, d50, ts_ms, energy_notes = energies
    curvature = _curvature(values["T20"], values["T30"])
    notes = list(decay_notes) + list(energy_notes)
    if curvature is not None and curvature > CURVATURE_LIMIT_PCT:
        notes.append(
            f"curvature {curvature:.0f} % (T30 / T20 - 1) is above {CURVATURE_LIMIT_PCT:g} %: "
            f"the decay is not a straight line"
        )

    def num(v):
        return None if v is None else float(v)

    return BandResult(
        band_hz=band_hz,
        edt_s=num(values["EDT"]),
        t20_s=num(values["T20"]),
        t30_s=num(values["T30"]),
        c50_db=num(c50),
        c80_db=num(c80),
        d50=num(d50),
        ts_ms=num(ts_ms),
        decay_range_db=float(decay_range),
        curvature_pct=num(curvature),
        notes=tuple(notes),
    )


def analyze(ir, *, rate_hz, bands_hz=OCTAVE_BANDS_HZ):
    """ISO 3382-1:2009 room-acoustic parameters of an impulse response.

    Per channel, broadband (the unfiltered response) and in each octave band
    whose upper edge lies below Nyquist (others are left out, e.g. 8 kHz at a
    16 kHz rate):

    - EDT, T20, T30 from least-squares lines over 0 to -10, -5 to -25 and -5
      to -35 dB of the Schroeder decay curve (:func:`schroeder_decay_db`,
      with the noise-floor truncation and compensation described there),
      extrapolated to 60 dB; None when the decay range is less than
      ``10 dB - bottom of the range`` (ISO 3382-1: the bottom at least 10 dB
      above the noise; T20 needs 35 dB, T30 45 dB).  Bands use the
      time-reversed filter (ISO 3382 permits it), and each band's decay
      curve starts at that band's own onset.
    - ``C_te = 10 lg(∫_0^te p² / ∫_te^∞ p²)`` for te = 50 and 80 ms,
      ``D50 = ∫_0^50ms p² / ∫_0^∞ p²`` and ``Ts = ∫ t p² / ∫ p²``, with t = 0
      at the broadband onset; bands use the ordinary (causal) filter, so the
      band's share of the direct sound falls after the onset, and the
      integrals to infinity include the filter's ringing past the end.

    The onset is the first frame at which the broadband response (any
    channel) rises to 20 dB below its maximum (ISO 3382-1:2009, A.3.4, as
    quoted in secondary sources and from memory); frames before it are not
    counted.

    Parameters
    ----------
    ir : array_like, shape (frames, channels)
        Impulse response, float64 (other real dtypes are converted).
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    bands_hz : sequence of float
        Octave-band centres in Hz.

    Returns
    -------
    Analysis
        Results per channel, the IACC for two channels, and the onset frame.

    Raises
    ------
    ParameterError
        ``ir`` not 2-D, empty or not finite; bad ``rate_hz`` or ``bands_hz``.
    AnalysisError
        ``ir`` is all zeros.
    """
    x, rate, bands = _check_all(ir, rate_hz, bands_hz)
    usable = tuple(b for b in bands if _band_fits(b, rate))
    frames, channels = x.shape
    onset = _onset_frame(x)
    names = tuple(DECAY_RANGES_DB)

    broad_energy = _broadband_energies(x, onset, rate)
    broadband = []
    for c in range(channels):
        decays = _decays(_backward_sum_inplace(np.square(x[onset:, c])), rate, names, None)
        energies = _energy_parameters(*(float(v[c]) for v in broad_energy), rate)
        broadband.append(_band_result(None, decays, energies))

    band_results = [[] for _ in range(channels)]
    if usable:
        table, spectra, n_fft = _band_decay_table(x, rate, usable, names)
        band_energy = _band_energies(x, spectra, usable, rate, n_fft, onset)
        for k, band in enumerate(usable):
            for c in range(channels):
                energies = _energy_parameters(*(float(v[k, c]) for v in band_energy), rate)
                band_results[c].append(_band_result(band, table[k][c], energies))

    iacc_late = None
    if channels == 2:
        try:
            iacc_late = _iacc_value(x, rate, onset, 0.08, None, 1.0)
        except AnalysisError:
            iacc_late = None
    return Analysis(
        rate_hz=rate,
        frames=frames,
        channels=tuple(
            ChannelAnalysis(broadband=broadband[c], bands=tuple(band_results[c])) for c in range(channels)
        ),
        iacc_late=iacc_late,
        onset_frame=onset,
    )


def band_t30_s(ir, *, rate_hz, bands_hz=OCTAVE_BANDS_HZ):
    """T30 per octave band and channel: the fast path of :func:`analyze`.

    Runs only what T30 needs and gives exactly the numbers of
    ``analyze(...).channels[c].bands[k].t30_s`` (same ``bands_hz``).

    Parameters
    ----------
    ir : array_like, shape (frames, channels)
        Impulse response, float64.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    bands_hz : sequence of float
        Octave-band centres in Hz.

    Returns
    -------
    ndarray, shape (len(bands_hz), channels)
        T30 in seconds; NaN where it cannot be measured, including every
        band whose upper edge reaches Nyquist (one row per requested band).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(24000) / 48000
    >>> ir = rng.standard_normal((24000, 1)) * np.exp(-3 * np.log(10) * t / 0.25)[:, None]
    >>> t30 = band_t30_s(ir, rate_hz=48000, bands_hz=(1000.0, 4000.0))
    >>> t30.shape, bool(np.all(np.abs(t30 / 0.25 - 1) < 0.05))
    ((2, 1), True)
    """
    # As _check_all, but the response is normalised straight into the zero-padded transform input
    # (this runs once per calibration pass of the synthesis: no copies of the response besides it).
    x = _check_ir(ir)
    rate = _check_rate(rate_hz)
    bands = _check_bands(bands_hz)
    _require_signal(x)
    frames, channels = x.shape
    out = np.full((len(bands), channels), np.nan)
    rows = [k for k, b in enumerate(bands) if _band_fits(b, rate)]
    if rows:
        usable = tuple(bands[k] for k in rows)
        n_fft = _fft_size(frames, usable, rate)
        padded = np.zeros((channels, n_fft))
        np.divide(x.T, max(float(np.max(x)), -float(np.min(x))), out=padded[:, :frames])  # = _normalised(x).T
        del x
        spectra = scipy.fft.rfft(padded, axis=-1)  # = _channel_spectra(_normalised(x), n_fft)
        del padded
        table = _band_decays(spectra, frames, rate, usable, ("T30",), n_fft)
        for row, per_channel in zip(rows, table):
            for c, (values, _, _) in enumerate(per_channel):
                if values["T30"] is not None:
                    out[row, c] = values["T30"]
    return out
