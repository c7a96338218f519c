"""Figures for looking before listening: a room's response and a batch's loudness, as PNG bytes.

Needs matplotlib (the ``plots`` extra).  It is imported inside the drawing
functions, and figures are drawn on matplotlib's Agg canvas directly (no
``pyplot``), so importing this module costs nothing and no global backend,
style or state of matplotlib changes.  Nothing here reads or writes files:
each drawing function returns the bytes of one PNG; :mod:`render.report_html`
does the I/O.

The two numeric helpers, :func:`decay_fit_line` and
:func:`smoothed_magnitude_db`, need only numpy.

Example: the least-squares T30 line of an exact exponential decay.

>>> import numpy as np
>>> curve_db = -120.0 * np.arange(48000) / 48000  # 60 dB in 0.5 s
>>> slope, intercept = decay_fit_line(curve_db, rate_hz=48000)
>>> round(-60.0 / slope, 6), round(intercept, 6)
(0.5, 0.0)
"""

from __future__ import annotations

import io
import math
import os

import numpy as np
import scipy.fft

from . import __version__
from .acoustics import OCTAVE_BANDS_HZ
from .analysis import DECAY_RANGES_DB, analyze, schroeder_decay_db
from .errors import OutputError, ParameterError
from .units import power_to_db

__all__ = [
    "response_figure_png",
    "loudness_figure_png",
    "decay_fit_line",
    "smoothed_magnitude_db",
    "order_for_review",
    "loudness_figure_size_px",
    "RESPONSE_SIZE_PX",
    "T30_JND_FRACTION",
    "MISSING_MATPLOTLIB",
]

#: Size of :func:`response_figure_png` in pixels (width, height).
RESPONSE_SIZE_PX = (1600, 1200)
#: Resolution of every figure, dots per inch (sets the size of text and lines in pixels).
DPI = 160
#: Width of :func:`loudness_figure_png` in pixels; its height grows with the number of files.
LOUDNESS_WIDTH_PX = 1600
#: Most files drawn in the loudness figure (failures first); the rest are only in the report's table.
LOUDNESS_MAX_ROWS = 60
#: Just-noticeable difference of the reverberation time, as a fraction (ISO 3382-1 Annex A: 5 %).
T30_JND_FRACTION = 0.05
#: Magnitude smoothing: 1 / SMOOTHING_FRACTION octave wide (1/3 octave, common practice).
SMOOTHING_FRACTION = 3
#: The message when matplotlib cannot be imported.
MISSING_MATPLOTLIB = "plots need matplotlib: pip install 'render[plots]'"

# A calm palette of our own: blue-grey ink on warm paper, a deep slate blue
# and a soft amber for the two channels, sage green for targets, brick for trouble.
_PAPER = "#f8f7f3"
_PANEL = "#ffffff"
_INK = "#26313b"
_MUTED = "#6e7781"
_GRID = "#e6e4de"
_CHANNEL = ("#2f5f8a", "#c98a35")
_FIT = "#26313b"
_TARGET = "#4e8a5f"
_TARGET_FILL = "#dcebdf"
_RANGE_FILL = "#eef1f4"
_BEFORE = "#9aa3ab"
_TROUBLE = "#b6473f"
_CHANNEL_MARKERS = ("o", "D")

# Waveforms longer than this many frames are drawn as a min/max envelope.
_ENVELOPE_BINS = 2400
# Decay curves are thinned to at most this many points (they are smooth).
_CURVE_POINTS = 4000
# Smoothed magnitude: points per octave of the log-frequency grid, and its lowest frequency.
_POINTS_PER_OCTAVE = 48
_LOWEST_HZ = 20.0


# --------------------------------------------------------------------------- matplotlib


def _matplotlib():
    """(Figure, FigureCanvasAgg, rc_context), or OutputError if matplotlib is missing."""
    try:
        import matplotlib
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError as e:
        raise OutputError(f"{MISSING_MATPLOTLIB} ({e})") from None
    return Figure, FigureCanvasAgg, matplotlib.rc_context


_STYLE = {
    "font.size": 8.5,
    "axes.titlesize": 9.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlecolor": _INK,
    "axes.labelsize": 8.5,
    "axes.labelcolor": _INK,
    "axes.edgecolor": _MUTED,
    "axes.linewidth": 0.7,
    "axes.facecolor": _PANEL,
    "axes.grid": True,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "grid.color": _GRID,
    "grid.linewidth": 0.6,
    "xtick.color": _MUTED,
    "ytick.color": _MUTED,
    "xtick.labelcolor": _INK,
    "ytick.labelcolor": _INK,
    "xtick.labelsize": 7.5,
    "ytick.labelsize": 7.5,
    "legend.fontsize": 7.5,
    "legend.frameon": True,
    "legend.framealpha": 0.92,
    "legend.edgecolor": _GRID,
    "text.color": _INK,
    "figure.facecolor": _PAPER,
    "savefig.facecolor": _PAPER,
    "lines.solid_capstyle": "round",
}


def _png(fig, canvas_class):
    canvas_class(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": f"render {__version__}"})
    return buf.getvalue()


# --------------------------------------------------------------------------- numeric helpers


def decay_fit_line(decay_db, *, rate_hz, start_db=DECAY_RANGES_DB["T30"][0], stop_db=DECAY_RANGES_DB["T30"][1]):
    """The least-squares line over ``[start_db, stop_db]`` of a decay curve (ISO 3382-1).

    The frames fitted are those :func:`render.analysis.decay_time_s` fits:
    from the first frame at or below ``start_db`` to the last frame before
    the curve first falls below ``stop_db``.

    Parameters
    ----------
    decay_db : array_like, shape (frames,)
        One channel of :func:`render.analysis.schroeder_decay_db`, in dB re its
        start; NaN where it was cut at the noise floor.
    rate_hz : float
        Sample rate in Hz, > 0.
    start_db, stop_db : float
        Evaluation range in dB, ``0 >= start_db > stop_db``; default the T30
        range, -5 to -35 dB.

    Returns
    -------
    (slope_db_per_s, intercept_db) or None
        The line ``level_db = intercept_db + slope_db_per_s * t``, t in seconds
        from frame 0 of ``decay_db``; the decay time is ``-60 / slope_db_per_s``.
        None when the curve does not span the range or does not fall.

    Examples
    --------
    >>> import numpy as np
    >>> print(decay_fit_line(np.linspace(0.0, -20.0, 100), rate_hz=1000))  # never reaches -35 dB
    None
    """
    if not (isinstance(rate_hz, (int, float, np.integer, np.floating)) and math.isfinite(rate_hz) and rate_hz > 0):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a finite number > 0 Hz")
    if not (start_db <= 0 and stop_db < start_db):
        raise ParameterError(f"start_db = {start_db!r}, stop_db = {stop_db!r}: expected 0 >= start_db > stop_db")
    curve = np.asarray(decay_db, dtype=np.float64)
    if curve.ndim != 1:
        raise ParameterError(f"decay_db has shape {curve.shape}: expected one curve, shape (frames,)")
    at_start = np.flatnonzero(curve <= start_db)
    if at_start.size == 0:
        return None
    first = int(at_start[0])
    outside = np.flatnonzero(~(curve[first:] >= stop_db))  # below stop_db, or NaN
    if outside.size == 0 or np.isnan(curve[first + int(outside[0])]):
        return None
    last = first + int(outside[0])
    if last - first < 2:
        return None
    t = np.arange(first, last) / float(rate_hz)
    slope, intercept = np.polyfit(t, curve[first:last], 1)
    if not slope < 0:
        return None
    return float(slope), float(intercept)


def smoothed_magnitude_db(ir, *, rate_hz, fraction=SMOOTHING_FRACTION, lowest_hz=_LOWEST_HZ):
    """Magnitude response per channel, power-averaged over 1/``fraction`` octave, in dB re 1.

    At each frequency f of a log-spaced grid the power ``|H|²`` of the rfft
    bins from ``f · 2^(-1/(2 fraction))`` to ``f · 2^(1/(2 fraction))`` is
    averaged (the nearest bin where the window holds none).  A unit impulse
    is 0 dB everywhere; a response of unit energy averages 0 dB (Parseval).

    Parameters
    ----------
    ir : array_like, shape (frames, channels)
        Impulse response, float64.
    rate_hz : float
        Sample rate in Hz, > 0.
    fraction : int
        Smoothing width as a fraction of an octave, 1 to 48 (3: third-octave).
    lowest_hz : float
        Lowest frequency of the grid in Hz, > 0 and below Nyquist.

    Returns
    -------
    freqs_hz : ndarray, shape (points,)
        The grid, ``lowest_hz`` to ``rate_hz / 2``, 48 points per octave.
    level_db : ndarray, shape (points, channels)
        ``10 log10`` of the averaged power, dB re 1.

    Examples
    --------
    >>> import numpy as np
    >>> ir = np.zeros((64, 1)); ir[0, 0] = 1.0
    >>> f, level = smoothed_magnitude_db(ir, rate_hz=48000)
    >>> float(np.max(np.abs(level))), round(float(f[-1]), 1)
    (0.0, 24000.0)
    """
    x = np.asarray(ir, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] < 1 or x.shape[1] < 1:
        raise ParameterError(f"ir has shape {x.shape}: expected (frames, channels); mono is (frames, 1)")
    if not (math.isfinite(rate_hz) and rate_hz > 0):
        raise ParameterError(f"rate_hz = {rate_hz!r}: must be a finite number > 0 Hz")
    if not (isinstance(fraction, (int, np.integer)) and 1 <= fraction <= 48):
        raise ParameterError(f"fraction = {fraction!r}: must be a whole number from 1 to 48")
    nyquist = rate_hz / 2.0
    if not (0 < lowest_hz < nyquist):
        raise ParameterError(f"lowest_hz = {lowest_hz!r}: must lie between 0 and Nyquist ({nyquist:g} Hz)")
    # At least 1/4 Hz resolution for short responses, so the low bands hold bins.
    n_fft = scipy.fft.next_fast_len(max(x.shape[0], int(math.ceil(4.0 * rate_hz))), real=True)
    spectrum = scipy.fft.rfft(x, n=n_fft, axis=0)
    power = spectrum.real**2 + spectrum.imag**2  # (bins, channels)
    bin_hz = rate_hz / n_fft
    octaves = math.log2(nyquist / lowest_hz)
    freqs = lowest_hz * 2.0 ** (np.arange(int(math.floor(octaves * _POINTS_PER_OCTAVE)) + 1) / _POINTS_PER_OCTAVE)
    freqs[-1] = nyquist if abs(freqs[-1] - nyquist) < 1e-9 * nyquist else freqs[-1]
    if freqs[-1] < nyquist:
        freqs = np.append(freqs, nyquist)
    half = 2.0 ** (0.5 / fraction)
    lo = np.clip(np.ceil(freqs / half / bin_hz).astype(int), 0, power.shape[0] - 1)
    hi = np.clip(np.floor(freqs * half / bin_hz).astype(int), 0, power.shape[0] - 1)
    cumulative = np.vstack([np.zeros((1, power.shape[1])), np.cumsum(power, axis=0)])
    count = (hi - lo + 1)[:, None]
    mean = (cumulative[hi + 1] - cumulative[lo]) / np.maximum(count, 1)
    empty = (hi < lo)
    if np.any(empty):
        nearest = np.clip(np.round(freqs[empty] / bin_hz).astype(int), 0, power.shape[0] - 1)
        mean[empty] = power[nearest]
    return freqs, power_to_db(mean)


# --------------------------------------------------------------------------- ordering


def _entry_rank(entry):
    if entry.get("status") == "failed":
        return 0
    if (entry.get("loudness") or {}).get("met") is False:
        return 1
    return 2


def order_for_review(entries):
    """Source entries of a manifest in the order to look at them: failed, then targets missed, then the rest.

    Stable: within each kind the manifest's order is kept.

    Parameters
    ----------
    entries : list of dict
        ``manifest["sources"]``.

    Returns
    -------
    list of dict

    Examples
    --------
    >>> rows = [{"source": "a", "status": "rendered", "loudness": {"met": True}},
    ...         {"source": "b", "status": "rendered", "loudness": {"met": False}},
    ...         {"source": "c", "status": "failed"}]
    >>> [e["source"] for e in order_for_review(rows)]
    ['c', 'b', 'a']
    """
    return sorted(entries, key=_entry_rank)


# --------------------------------------------------------------------------- the response figure


def _check_targets(targets, bands_hz):
    bands = tuple(float(b) for b in (OCTAVE_BANDS_HZ if bands_hz is None else bands_hz))
    if targets is None:
        return bands, None
    values = [math.nan if t is None else float(t) for t in targets]
    if len(values) != len(bands):
        raise ParameterError(
            f"targets has {len(values)} values for {len(bands)} bands ({', '.join(f'{b:g}' for b in bands)} Hz): "
            f"expected one T30 in seconds per band"
        )
    return bands, np.array(values)


def _envelope(samples, rate_hz):
    """(t, low, high) for a min/max envelope of a long 1-D signal, or (t, x, None) for a short one."""
    n = samples.shape[0]
    if n <= 2 * _ENVELOPE_BINS:
        return np.arange(n) / rate_hz, samples, None
    per_bin = int(math.ceil(n / _ENVELOPE_BINS))
    bins = int(math.ceil(n / per_bin))
    padded = np.full(bins * per_bin, np.nan)
    padded[:n] = samples
    blocks = padded.reshape(bins, per_bin)
    t = (np.arange(bins) * per_bin + 0.5 * per_bin) / rate_hz
    return t, np.nanmin(blocks, axis=1), np.nanmax(blocks, axis=1)


def _signed(value, digits):
    """``+1.2``, ``-0.4`` or ``0.0`` (no sign on what rounds to zero)."""
    value = round(float(value), digits)
    return f"{0.0:.{digits}f}" if value == 0 else f"{value:+.{digits}f}"


def _band_label(band_hz):
    return f"{band_hz / 1000:g}k" if band_hz >= 1000 else f"{band_hz:g}"


def _legend_in_channel_order(ax, **kwargs):
    handles, labels = ax.get_legend_handles_labels()
    pairs = sorted(zip(labels, handles), key=lambda lh: lh[0])
    ax.legend([h for _, h in pairs], [lab for lab, _ in pairs], **kwargs)


def _draw_waveform(ax, x, rate, shown):
    for c in reversed(range(shown)):  # channel 1 drawn last, on top
        t, low, high = _envelope(x[:, c], rate)
        label = f"channel {c + 1}"
        if high is None:
            ax.plot(t, low, color=_CHANNEL[c], lw=0.8, alpha=0.9, label=label)
        else:
            ax.fill_between(t, low, high, color=_CHANNEL[c], alpha=0.85 if c == 0 else 0.6, lw=0, label=label)
    peak = float(np.max(np.abs(x[:, :shown]))) or 1.0
    ax.set_ylim(-1.08 * peak, 1.08 * peak)
    ax.set_xlim(0.0, x.shape[0] / rate)
    ax.axhline(0.0, color=_MUTED, lw=0.5)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("amplitude (full scale = 1)")
    ax.set_title("Waveform")
    if shown > 1:
        _legend_in_channel_order(ax, loc="upper right")


def _draw_decay(ax, x, rate, analysis, shown):
    onset = analysis.onset_frame
    start_db, stop_db = DECAY_RANGES_DB["T30"]
    ax.axhspan(stop_db, start_db, color=_RANGE_FILL, lw=0, zorder=0)
    ax.text(0.99, stop_db + 1.0, f"T30 fit range, {start_db:g} to {stop_db:g} dB", color=_MUTED,
            fontsize=7, ha="right", va="bottom", transform=ax.get_yaxis_transform())
    lowest = -60.0
    notes = []
    fits = []
    for c in range(shown):
        curve = schroeder_decay_db(x[onset:, c : c + 1])[:, 0]
        valid = np.flatnonzero(np.isfinite(curve))
        if valid.size == 0:
            notes.append(f"channel {c + 1}: no decay to draw")
            continue
        end = int(valid[-1]) + 1
        idx = np.arange(0, end, max(1, end // _CURVE_POINTS))
        t30 = analysis.channels[c].broadband.t30_s
        text = f"T30 {t30:.2f} s" if t30 is not None else "T30 not measurable"
        ax.plot((onset + idx) / rate, curve[idx], color=_CHANNEL[c], lw=1.5, label=f"channel {c + 1}, {text}",
                zorder=2)
        lowest = min(lowest, float(np.nanmin(curve[:end])))
        fit = decay_fit_line(curve, rate_hz=rate) if t30 is not None else None
        if fit is not None:
            fits.append(fit)
        elif t30 is None:
            reasons = [n for n in analysis.channels[c].broadband.notes if n.startswith("T30")]
            notes.append(f"channel {c + 1}: " + (reasons[0] if reasons else "T30 not measurable"))
    for k, (slope, intercept) in enumerate(fits):
        ends = np.array([max(0.0, -intercept / slope), (-65.0 - intercept) / slope])
        ax.plot(onset / rate + ends, intercept + slope * ends, color=_FIT, lw=0.9, ls=(0, (5, 3)), zorder=3,
                label="T30 line: least squares over -5 to -35 dB, extrapolated" if k == 0 else None)
        marks = (np.array([start_db, stop_db]) - intercept) / slope
        ax.plot(onset / rate + marks, [start_db, stop_db], ls="none", marker="|", ms=9, mew=1.4, color=_FIT,
                zorder=4)
    ax.set_ylim(max(lowest - 5.0, -90.0), 3.0)
    ax.set_xlim(0.0, x.shape[0] / rate)
    ax.set_xlabel("time (s)")
    ax.set_ylabel("energy decay (dB re start)")
    ax.set_title("Schroeder decay curve (broadband)")
    ax.legend(loc="upper right")
    if notes:
        ax.text(0.01, 0.02, "\n".join(notes), transform=ax.transAxes, fontsize=7, color=_TROUBLE,
                va="bottom", ha="left")


def _draw_bands(ax, analysis, bands, targets, shown):
    centres = np.array(bands)
    seen = []
    if targets is not None:
        ok = np.isfinite(targets)
        ax.fill_between(centres[ok], targets[ok] * (1 - T30_JND_FRACTION), targets[ok] * (1 + T30_JND_FRACTION),
                        color=_TARGET_FILL, lw=0, label=f"target ± {100 * T30_JND_FRACTION:g} % (JND, ISO 3382-1)")
        ax.plot(centres[ok], targets[ok], color=_TARGET, lw=1.0, ls=(0, (2, 2)), marker="_", ms=14, mew=2.0,
                label="target T30")
        seen += list(targets[ok] * (1 - T30_JND_FRACTION)) + list(targets[ok] * (1 + T30_JND_FRACTION))
    measured = np.full((len(bands), shown), np.nan)
    for c in range(shown):
        by_band = {b.band_hz: b.t30_s for b in analysis.channels[c].bands}
        measured[:, c] = [math.nan if by_band.get(b) is None else by_band[b] for b in bands]
        ax.plot(centres, measured[:, c], color=_CHANNEL[c], lw=1.0, marker=_CHANNEL_MARKERS[c],
                ms=5.5 if c == 0 else 5, mfc=_CHANNEL[c] if c == 0 else _PANEL, mew=1.3,
                label=f"measured, channel {c + 1}", zorder=4)
    seen += [float(v) for v in measured.ravel() if math.isfinite(v)]
    lo, hi = (min(seen), max(seen)) if seen else (0.0, 1.0)
    span = max(hi - lo, 0.1 * hi, 0.02)
    bottom, top = max(0.0, lo - 0.45 * span), hi + 0.35 * span
    ax.set_ylim(bottom, top)
    if targets is not None:
        # The deviation of the channels' mean from the target, under each band.
        for b, target, row in zip(centres, targets, measured):
            values = row[np.isfinite(row)]
            if not (math.isfinite(target) and values.size):
                continue
            error = 100.0 * (float(np.mean(values)) / target - 1.0)
            ax.text(b, bottom + 0.05 * (top - bottom), f"{_signed(error, 1)} %", ha="center", va="bottom", fontsize=7,
                    color=_TROUBLE if abs(error) > 100 * T30_JND_FRACTION else _MUTED)
        ax.text(0.01, 0.12, ("mean of the channels" if shown > 1 else "measured") + " against the target:",
                transform=ax.transAxes, fontsize=6.5,
                color=_MUTED, ha="left", va="bottom")
    missing = [_band_label(b) for b, row in zip(bands, measured) if not np.all(np.isfinite(row))]
    ax.set_xscale("log")
    ax.set_xticks(centres)
    ax.set_xticklabels([_band_label(b) for b in bands])
    ax.minorticks_off()
    ax.set_xlim(centres[0] / 1.4, centres[-1] * 1.4)
    ax.set_xlabel("octave band (Hz)")
    ax.set_ylabel("T30 (s)")
    ax.set_title("Reverberation time per octave band")
    ax.legend(loc="upper right", ncol=2)
    if missing:
        ax.text(0.01, 0.98, "not measurable in: " + ", ".join(missing) + " Hz", transform=ax.transAxes,
                fontsize=7, color=_TROUBLE, ha="left", va="top")


def _draw_magnitude(ax, x, rate, shown):
    freqs, level = smoothed_magnitude_db(x[:, :shown], rate_hz=rate)
    for c in reversed(range(shown)):
        ax.plot(freqs, level[:, c], color=_CHANNEL[c], lw=1.3, label=f"channel {c + 1}")
    top = float(np.max(level))
    bottom = float(np.min(level))
    ax.set_xscale("log")
    ax.set_xlim(freqs[0], freqs[-1])
    ax.set_ylim(max(bottom - 3.0, top - 60.0), top + 4.0)
    ticks = [f for f in (20, 50, 100, 200, 500, 1000, 2000, 5000, 10000, 20000) if freqs[0] <= f <= freqs[-1]]
    ax.set_xticks(ticks)
    ax.set_xticklabels([_band_label(f) for f in ticks])
    ax.minorticks_off()
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("magnitude (dB re 1)")
    ax.set_title(f"Magnitude response (1/{SMOOTHING_FRACTION}-octave smoothed)")
    if shown > 1:
        _legend_in_channel_order(ax, loc="lower right")


def response_figure_png(ir, *, rate_hz, title, targets=None, bands_hz=None):
    """Four views of an impulse response in one PNG: waveform, decay, band T30, magnitude.

    Top left, the waveform (channel 1, and 2 if present); top right, the
    broadband Schroeder decay curve per channel with the T30 line (the
    least-squares line from -5 to -35 dB, extrapolated, ISO 3382-1); bottom
    left, the octave-band T30 per channel against ``targets`` with the
    ±5 % just-noticeable difference (ISO 3382-1 Annex A) shaded; bottom
    right, the 1/3-octave smoothed magnitude response on a log-frequency axis.
    Responses with more than two channels show the first two (the title says so).

    Parameters
    ----------
    ir : array_like, shape (frames, channels)
        Impulse response, float64.
    rate_hz : float
        Sample rate in Hz, ≥ 1000.
    title : str
        Printed above the panels.
    targets : sequence of float, optional
        Target T30 in seconds per band of ``bands_hz`` (None or NaN for a band
        without one); none drawn when omitted.
    bands_hz : sequence of float, optional
        Octave-band centres in Hz; default 125 Hz to 8 kHz.

    Returns
    -------
    bytes
        A PNG of :data:`RESPONSE_SIZE_PX` pixels.

    Raises
    ------
    OutputError
        matplotlib is not installed.
    ParameterError, AnalysisError
        As :func:`render.analysis.analyze` (bad shape or rate, all zeros), or
        ``targets`` and ``bands_hz`` of different lengths.
    """
    Figure, Canvas, rc_context = _matplotlib()
    bands, target_values = _check_targets(targets, bands_hz)
    analysis = analyze(ir, rate_hz=rate_hz, bands_hz=bands)
    x = np.ascontiguousarray(ir, dtype=np.float64)
    rate = float(rate_hz)
    channels = x.shape[1]
    shown = min(channels, 2)
    heading = str(title)
    facts = f"{rate:g} Hz, {channels} channel{'s' if channels != 1 else ''}, {x.shape[0] / rate:.2f} s"
    if channels > 2:
        facts += " (channels 1 and 2 drawn)"
    with rc_context(_STYLE):
        width, height = RESPONSE_SIZE_PX
        fig = Figure(figsize=(width / DPI, height / DPI), dpi=DPI, layout="constrained")
        fig.get_layout_engine().set(h_pad=0.08, w_pad=0.08, hspace=0.06, wspace=0.04)
        fig.suptitle(f"{heading}    ·    {facts}", x=0.012, ha="left", fontsize=11, fontweight="bold", color=_INK)
        axes = fig.subplots(2, 2)
        _draw_waveform(axes[0, 0], x, rate, shown)
        _draw_decay(axes[0, 1], x, rate, analysis, shown)
        _draw_bands(axes[1, 0], analysis, bands, target_values, shown)
        _draw_magnitude(axes[1, 1], x, rate, shown)
        return _png(fig, Canvas)


# --------------------------------------------------------------------------- the loudness figure


def _short_names(entries):
    """Row labels: source keys without their common leading folders; the group where a key repeats."""
    keys = [str(e.get("source", "?")) for e in entries]
    parts = [k.replace(os.sep, "/").split("/") for k in keys]
    common = 0
    if len(parts) > 1:
        while all(len(p) > common + 1 for p in parts) and len({p[common] for p in parts}) == 1:
            common += 1
    elif parts:
        common = len(parts[0]) - 1
    labels = ["/".join(p[common:]) for p in parts]
    repeated = {k for k in keys if keys.count(k) > 1}
    return [f"{label} (group {e.get('group')})" if k in repeated else label
            for label, k, e in zip(labels, keys, entries)]


def loudness_figure_size_px(rows):
    """Pixel size (width, height) of :func:`loudness_figure_png` for ``rows`` files (at most 60 drawn)."""
    shown = min(max(int(rows), 0), LOUDNESS_MAX_ROWS)
    return LOUDNESS_WIDTH_PX, 360 + 40 * max(shown, 1)


def _value(block, key):
    if not isinstance(block, dict):
        return None
    v = block.get(key)
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) else None


class _Rows:
    """Everything one panel of the loudness figure draws, collected row by row and drawn in a few artists."""

    def __init__(self):
        self.before, self.after_ok, self.after_bad, self.links, self.marks, self.spans, self.seen = \
            [], [], [], [], [], [], []

    def pair(self, y, before, after, bad):
        if before is not None:
            self.before.append((before, y))
        if after is not None:
            (self.after_bad if bad else self.after_ok).append((after, y))
        if before is not None and after is not None:
            self.links.append([(before, y), (after, y)])
        self.seen += [v for v in (before, after) if v is not None]

    def mark(self, y, x, span=0.0):
        self.marks.append([(x, y - 0.5), (x, y + 0.5)])
        if span:
            self.spans.append([(x - span, y - 0.5), (x + span, y - 0.5), (x + span, y + 0.5), (x - span, y + 0.5)])
        self.seen += [x - span, x + span]

    def draw(self, ax, *, mark_colour, mark_style):
        from matplotlib.collections import LineCollection, PolyCollection

        if self.spans:
            ax.add_collection(PolyCollection(self.spans, facecolors=_TARGET_FILL, edgecolors="none", zorder=1))
        if self.marks:
            ax.add_collection(LineCollection(self.marks, colors=mark_colour, linewidths=1.2, linestyles=mark_style,
                                             zorder=2))
        if self.links:
            ax.add_collection(LineCollection(self.links, colors=_BEFORE, linewidths=1.0, zorder=3))
        for points, style in ((self.before, dict(mfc=_PANEL, mec=_BEFORE, mew=1.4, ms=6)),
                              (self.after_ok, dict(color=_CHANNEL[0], ms=6.5)),
                              (self.after_bad, dict(color=_TROUBLE, ms=6.5))):
            if points:
                xs, ys = zip(*points)
                ax.plot(xs, ys, ls="none", marker="o", zorder=5, **style)


def loudness_figure_png(entries, *, title="Loudness and true peak per file"):
    """Per file, integrated loudness before and after against the target, and true peak against the ceiling.

    One row per file, failures first, then files that missed the delivery
    target, then the rest (:func:`order_for_review`); at most 60 rows (a
    note counts the rest).  Left: integrated loudness in LUFS before the
    loudness stage (hollow) and of the delivered mix (filled; brick when the
    target was missed), joined by a line, with the target ± its tolerance
    shaded.  Right: true peak in dBTP, the same way, with the ceiling.

    Parameters
    ----------
    entries : list of dict
        ``manifest["sources"]``: each with ``source``, ``status`` and, when
        measured, ``loudness`` (``before`` and ``after`` with
        ``integrated_lufs`` and ``true_peak_dbtp``, ``target_lufs``,
        ``tolerance_lu``, ``ceiling_dbtp``, ``met``).
    title : str
        Printed above the panels.

    Returns
    -------
    bytes
        A PNG of :func:`loudness_figure_size_px` pixels.

    Raises
    ------
    OutputError
        matplotlib is not installed.
    """
    Figure, Canvas, rc_context = _matplotlib()
    from matplotlib.collections import PolyCollection
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    ordered = order_for_review(list(entries))
    rows = ordered[:LOUDNESS_MAX_ROWS]
    labels = _short_names(rows)
    width, height = loudness_figure_size_px(len(ordered))
    lufs, peaks = _Rows(), _Rows()
    notes = []
    for i, entry in enumerate(rows):
        y = float(i)
        loud = entry.get("loudness") if isinstance(entry.get("loudness"), dict) else {}
        before, after = loud.get("before"), loud.get("after")
        target, tol = _value(loud, "target_lufs"), _value(loud, "tolerance_lu") or 0.0
        ceiling = _value(loud, "ceiling_dbtp")
        lb, la = _value(before, "integrated_lufs"), _value(after, "integrated_lufs")
        pb, pa = _value(before, "true_peak_dbtp"), _value(after, "true_peak_dbtp")
        if target is not None:
            lufs.mark(y, target, tol)
        if ceiling is not None:
            peaks.mark(y, ceiling)
        peak_bad = ceiling is not None and pa is not None and pa > ceiling + 1e-6
        loud_bad = loud.get("met") is False and not peak_bad
        lufs.pair(y, lb, la, loud_bad)
        peaks.pair(y, pb, pa, peak_bad)
        if entry.get("status") == "failed":
            notes.append((y, "failed", True))
        elif la is None and lb is None:
            reason = after.get("reason") if isinstance(after, dict) else None
            notes.append((y, "not measured" + (f": {reason}" if reason else ""), False))
    with rc_context(_STYLE):
        fig = Figure(figsize=(width / DPI, height / DPI), dpi=DPI, layout="constrained")
        fig.get_layout_engine().set(h_pad=0.08, w_pad=0.08, wspace=0.03)
        fig.suptitle(title, x=0.012, ha="left", fontsize=11, fontweight="bold", color=_INK)
        ax_l, ax_p = fig.subplots(1, 2, sharey=True, gridspec_kw={"width_ratios": [3, 2]})
        stripes = [[(0, i - 0.5), (1, i - 0.5), (1, i + 0.5), (0, i + 0.5)] for i in range(1, len(rows), 2)]
        for ax in (ax_l, ax_p):
            if stripes:
                ax.add_collection(PolyCollection(stripes, facecolors="#f3f2ee", edgecolors="none", zorder=0,
                                                 transform=ax.get_yaxis_transform()))
        lufs.draw(ax_l, mark_colour=_TARGET, mark_style="solid")
        peaks.draw(ax_p, mark_colour=_TROUBLE, mark_style=(0, (3, 2)))
        for y, note, failed in notes:
            ax_l.text(0.01, y, note, transform=ax_l.get_yaxis_transform(), va="center", ha="left", fontsize=7.5,
                      color=_TROUBLE if failed else _MUTED, fontweight="bold" if failed else "normal")
        n = max(len(rows), 1)
        ax_l.set_ylim(n - 0.5, -0.5)
        ax_l.set_yticks(range(len(rows)))
        ax_l.set_yticklabels(labels)
        for tick, entry in zip(ax_l.get_yticklabels(), rows):
            if _entry_rank(entry) < 2:
                tick.set_color(_TROUBLE)
            if entry.get("status") == "failed":
                tick.set_fontweight("bold")
        for ax, seen, unit, name in ((ax_l, lufs.seen, "LUFS", "integrated loudness"),
                                     (ax_p, peaks.seen, "dBTP", "true peak")):
            lo, hi = (min(seen), max(seen)) if seen else (-30.0, 0.0)
            pad = max(1.5, 0.08 * (hi - lo))
            ax.set_xlim(lo - pad, hi + pad)
            ax.set_xlabel(f"{name} ({unit})")
            ax.grid(axis="y", visible=False)
            ax.tick_params(axis="y", length=0)
        any_target, any_ceiling = bool(lufs.marks), bool(peaks.marks)
        ax_l.set_title("Integrated loudness" + (" and target" if any_target else " of the mix"))
        ax_p.set_title("True peak" + (" and ceiling" if any_ceiling else " of the mix"))
        if not rows:
            ax_l.text(0.5, 0.5, "no files in the manifest", transform=ax_l.transAxes, ha="center", color=_MUTED)
        if len(ordered) > len(rows):
            fig.text(0.012, 0.004, f"… and {len(ordered) - len(rows)} more files: see the report's table",
                     fontsize=7.5, color=_MUTED, ha="left", va="bottom")
        handles = []
        if lufs.before or peaks.before:
            handles.append(Line2D([], [], ls="none", marker="o", ms=6, mfc=_PANEL, mec=_BEFORE, mew=1.4,
                                  label="before the loudness stage"))
        handles.append(Line2D([], [], ls="none", marker="o", ms=6.5, color=_CHANNEL[0], label="delivered mix"))
        if lufs.after_bad or peaks.after_bad:
            handles.append(Line2D([], [], ls="none", marker="o", ms=6.5, color=_TROUBLE,
                                  label="delivered mix, target missed"))
        if any_target:
            handles.append(Patch(color=_TARGET_FILL, label="target ± tolerance"))
        if any_ceiling:
            handles.append(Line2D([], [], color=_TROUBLE, lw=1.1, ls=(0, (3, 2)), label="true-peak ceiling"))
        fig.legend(handles=handles, loc="outside lower center", ncol=len(handles), frameon=False)
        return _png(fig, Canvas)
