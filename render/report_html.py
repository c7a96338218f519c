"""The visual report of an output folder: PNG figures and one self-contained HTML page.

:func:`write_report` reads ``OUTDIR/manifest.json`` and each room response it
lists, draws the figures of :mod:`render.plots`, and writes

* ``OUTDIR/report/room-<response>.png``, one per room response, and
  ``OUTDIR/report/loudness.png``;
* ``OUTDIR/report.html``, with the same images embedded as ``data:`` URIs,
  its style inline, and no script, font, link or path outside the page: it
  opens offline, moved or mailed on its own.

Every file is written to a temporary name beside its place and renamed into
it.  Text from the manifest is HTML-escaped.  :func:`analyze_plot` is the
figure of ``render analyze FILE --plot OUT.png``.
"""

from __future__ import annotations

import base64
import html
import os
import re
from pathlib import Path, PurePosixPath

from .errors import OutputError, RenderError
from .manifest import SCHEMA_VERSION, read_manifest, write_bytes_atomic

__all__ = ["write_report", "analyze_plot", "REPORT_NAME", "FIGURES_DIR"]

#: The page, in the output folder.
REPORT_NAME = "report.html"
#: The folder of the PNG figures, in the output folder.
FIGURES_DIR = "report"
_MANIFEST = "manifest.json"
_JND_PCT = 5.0  # ISO 3382-1 Annex A: reverberation time JND 5 %
_OFF = ' class="off"'


# --------------------------------------------------------------------------- files


def _write_atomic(path, data):
    """Write bytes atomically (temporary file, fsync, rename): :func:`render.manifest.write_bytes_atomic`."""
    return write_bytes_atomic(path, data)


def _load_manifest(out_dir):
    path = out_dir / _MANIFEST
    if not path.is_file():
        shards = sorted(out_dir.glob("manifest.shard-*-of-*.json"))
        hint = (f"combine the {len(shards)} shard manifests first: render merge {out_dir}" if shards
                else "render the job first: render run JOB.toml")
        raise OutputError(f"{path}: no manifest to report on ({hint})")
    manifest = read_manifest(path)
    if manifest is None:
        raise OutputError(f"{path}: unreadable, or not a manifest of schema version {SCHEMA_VERSION}")
    return manifest


def _figure_name(entry, taken):
    """``room-<response file without .ir.wav>.png``, made safe and unique."""
    stem = PurePosixPath(str(entry.get("path") or entry.get("name") or "room")).name
    for suffix in (".ir.wav", ".wav"):
        if stem.endswith(suffix):
            stem = stem[: -len(suffix)]
            break
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", stem).strip("._") or "room"
    name, k = f"room-{stem}.png", 2
    while name in taken:
        name, k = f"room-{stem}-{k}.png", k + 1
    taken.add(name)
    return name


# --------------------------------------------------------------------------- values


def _esc(value):
    return html.escape("" if value is None else str(value), quote=True)


def _num(value, digits, unit=""):
    if not isinstance(value, (int, float)) or isinstance(value, bool) or value != value:
        return "\u2014"
    text = f"{round(float(value), digits) + 0.0:.{digits}f}".replace("-", "\u2212")  # + 0.0: no "-0.0"
    return f"{text}{unit}"


def _signed(value, digits):
    if not isinstance(value, (int, float)) or isinstance(value, bool) or value != value:
        return "\u2014"
    value = round(float(value), digits)
    if value == 0:
        return f"{0.0:.{digits}f}"  # no sign on what rounds to zero
    return f"{value:+.{digits}f}".replace("-", "\u2212")


def _room_from_entry(entry):
    """The Room of a manifest room entry (for its derived values), or None."""
    from .room import Room

    params = dict(entry.get("parameters") or {})
    if params.get("source_m") is not None and params.get("listener_m") is not None:
        params.pop("distance_m", None)  # the resolved positions stand
    for key in ("size_m", "source_m", "listener_m", "decay_bands_s"):
        if isinstance(params.get(key), list):
            params[key] = tuple(params[key])
    try:
        return Room(name=str(entry.get("name") or "room"), **params)
    except (RenderError, TypeError, ValueError):
        return None


# --------------------------------------------------------------------------- page

_CSS = """
:root { --ink: #26313b; --muted: #6e7781; --line: #e2e0da; --paper: #f8f7f3; --panel: #ffffff;
        --good: #3f7a52; --good-bg: #e4f0e7; --bad: #b6473f; --bad-bg: #f7e4e1; --soft: #f3f2ee; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
main { max-width: 1180px; margin: 0 auto; padding: 28px 28px 12px; }
h1 { font-size: 26px; margin: 0 0 4px; letter-spacing: -0.01em; }
h2 { font-size: 19px; margin: 34px 0 10px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
h3 { font-size: 16px; margin: 24px 0 8px; }
p.sub { color: var(--muted); margin: 0 0 16px; }
.summary { display: flex; flex-wrap: wrap; gap: 10px; margin: 14px 0 6px; }
.pill { background: var(--panel); border: 1px solid var(--line); border-radius: 999px; padding: 4px 14px; }
.pill b { font-variant-numeric: tabular-nums; }
.pill.bad { background: var(--bad-bg); border-color: #e8c3bd; color: var(--bad); }
.pill.good { background: var(--good-bg); border-color: #c5dccb; color: var(--good); }
section.room { background: var(--panel); border: 1px solid var(--line); border-radius: 10px;
               padding: 6px 18px 16px; margin: 16px 0 22px; }
figure { margin: 8px 0 12px; }
figure img { display: block; width: 100%; height: auto; border-radius: 6px; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: 13px; margin-top: 4px; }
.tables { display: flex; flex-wrap: wrap; gap: 22px; align-items: flex-start; }
table { border-collapse: collapse; background: var(--panel); font-variant-numeric: tabular-nums; }
th, td { padding: 5px 10px; border-bottom: 1px solid var(--line); text-align: right; vertical-align: top; }
th { font-size: 13px; font-weight: 600; color: var(--muted); background: var(--soft); }
td.name, th.name { text-align: left; }
table.files { width: 100%; font-size: 13.5px; }
table.files th, table.files td { padding: 5px 7px; }
table.files td { white-space: nowrap; }
table.files td.file { white-space: normal; overflow-wrap: anywhere; }
table.files tr.detail td { white-space: normal; overflow-wrap: anywhere; }
table.files td.file { min-width: 180px; max-width: 360px; }
tr.failed td { background: var(--bad-bg); }
tr.detail td { text-align: left; font-size: 13px; color: var(--muted); border-bottom: 1px solid var(--line); }
tr.detail.failed td { color: var(--bad); }
.off { color: var(--bad); font-weight: 600; }
.tag { display: inline-block; border-radius: 4px; padding: 0 7px; font-size: 12.5px; font-weight: 600;
       white-space: nowrap; }
.tag.met, .tag.rendered { background: var(--good-bg); color: var(--good); }
.tag.missed, .tag.failed { background: var(--bad-bg); color: var(--bad); }
.tag.skipped, .tag.none { background: var(--soft); color: var(--muted); }
.error { color: var(--bad); }
footer { max-width: 1180px; margin: 30px auto 40px; padding: 12px 28px; color: var(--muted); font-size: 13px;
         border-top: 1px solid var(--line); }
footer code { font-size: 12px; word-break: break-all; }
"""


def _data_uri(png):
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _summary(manifest):
    sources = manifest.get("sources") or []
    statuses = [e.get("status") for e in sources]
    counts = {k: statuses.count(k) for k in ("rendered", "skipped", "failed")}
    summary = manifest.get("summary") or {}
    met = sum(1 for e in sources if (e.get("loudness") or {}).get("met") is True)
    missed = sum(1 for e in sources if (e.get("loudness") or {}).get("met") is False)
    pills = [
        f'<span class="pill"><b>{counts["rendered"]}</b> rendered</span>',
        f'<span class="pill"><b>{counts["skipped"]}</b> skipped</span>',
        f'<span class="pill{" bad" if counts["failed"] else ""}"><b>{counts["failed"]}</b> failed</span>',
    ]
    if summary.get("not_run"):
        pills.append(f'<span class="pill bad"><b>{int(summary["not_run"])}</b> not run</span>')
    if summary.get("interrupted"):
        pills.append('<span class="pill bad">interrupted</span>')
    if met or missed:
        pills.append(f'<span class="pill{" good" if not missed else ""}"><b>{met}</b> delivery targets met</span>')
        pills.append(f'<span class="pill{" bad" if missed else ""}"><b>{missed}</b> missed</span>')
    else:
        pills.append('<span class="pill">no delivery target</span>')
    rooms = len(manifest.get("rooms") or [])
    pills.append(f'<span class="pill"><b>{rooms}</b> room response{"s" if rooms != 1 else ""}</span>')
    text = (f"{counts['rendered']} rendered, {counts['skipped']} skipped, {counts['failed']} failed; "
            + (f"delivery targets {met} met, {missed} missed" if met or missed else "no delivery target"))
    return '<div class="summary" aria-label="' + _esc(text) + '">' + "".join(pills) + "</div>"


def _room_section(entry, figure):
    """One room: its figure (or why there is none) and the tables."""
    name = entry.get("name") or "room"
    out = [f'<section class="room" id="{_esc("room-" + str(name))}">']
    rate = entry.get("rate_hz")
    ch = entry.get("channels")
    out.append(f"<h3>{_esc(name)} <small class=\"sub\">· {_esc(entry.get('path'))} · "
               f"{_esc(_num(rate, 0, ' Hz'))} · {_esc(ch)} ch</small></h3>")
    png, problem = figure
    if png is not None:
        out.append(f'<figure><img src="{_data_uri(png)}" width="1600" height="1200" '
                   f'alt="{_esc(f"Response of room {name}: waveform, decay curve, T30 per band, magnitude")}">'
                   f"<figcaption>Top: waveform and broadband Schroeder decay with the T30 line. Bottom: T30 per "
                   f"octave band against the target (shaded: ±{_JND_PCT:g} %, the just-noticeable difference), "
                   f"and the 1/3-octave magnitude response.</figcaption></figure>")
    else:
        out.append(f'<p class="error">No figure: {_esc(problem)}</p>')

    room = _room_from_entry(entry)
    rows = []
    if room is not None:
        rows += [
            ("size", "\u00d7".join(f"{v:g}" for v in room.size_m) + " m"),
            ("volume", _num(room.volume_m3, 1, " m\u00b3")),
            ("talker to microphone", _num(room.distance_m, 2, " m")),
            ("critical distance", _num(room.critical_distance_m, 2, " m")),
            ("Schroeder frequency", _num(room.schroeder_frequency_hz, 0, " Hz")),
            ("predelay", _num(room.predelay_ms, 1, " ms")),
        ]
    else:
        rows.append(("derived values", "\u2014 (room parameters not readable)"))
    derived = ['<table class="derived"><tr><th class="name">derived value</th><th></th></tr>']
    derived += [f'<tr><td class="name">{_esc(k)}</td><td>{_esc(v)}</td></tr>' for k, v in rows]
    derived.append("</table>")

    bands = entry.get("bands_hz") or []
    targets = entry.get("t30_target_s") or []
    measured = entry.get("t30_measured_s") or []
    errors = entry.get("t30_error_pct") or []
    band = ['<table class="bands"><tr><th class="name">band</th><th>target T30</th><th>measured T30</th>'
            '<th>error</th></tr>']
    for i, b in enumerate(bands):
        t = targets[i] if i < len(targets) else None
        m = measured[i] if i < len(measured) else None
        e = errors[i] if i < len(errors) else None
        off = isinstance(e, (int, float)) and abs(e) > _JND_PCT
        label = f"{b / 1000:g} kHz" if isinstance(b, (int, float)) and b >= 1000 else f"{_num(b, 0)} Hz"
        band.append(f'<tr><td class="name">{_esc(label)}</td><td>{_esc(_num(t, 3, " s"))}</td>'
                    f'<td>{_esc(_num(m, 3, " s"))}</td>'
                    f"<td{_OFF if off else ''}>{_esc(_signed(e, 1))} %</td></tr>")
    band.append("</table>")
    out.append('<div class="tables">' + "".join(derived) + "".join(band) + "</div>")
    out.append("</section>")
    return "\n".join(out)


def _loudness_of(entry):
    loud = entry.get("loudness") if isinstance(entry.get("loudness"), dict) else {}
    before = loud.get("before") if isinstance(loud.get("before"), dict) else {}
    after = loud.get("after") if isinstance(loud.get("after"), dict) else {}
    return loud, before, after


def _is_number(value):
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _files_table(entries):
    """One row per file, failures first; columns of a loudness stage only when the batch had one."""
    from .plots import order_for_review

    ordered = order_for_review(list(entries))
    stage = any(_is_number(_loudness_of(e)[0].get("target_lufs")) or _is_number(_loudness_of(e)[0].get("ceiling_dbtp"))
                or _loudness_of(e)[1] for e in ordered)
    columns = [("file", "name file"), ("room", "name"), ("status", "name")]
    if stage:
        columns += [("loudness before<br>LUFS", ""), ("loudness after<br>LUFS", ""), ("target<br>LUFS", ""),
                    ("true peak before<br>dBTP", ""), ("true peak after<br>dBTP", ""), ("ceiling<br>dBTP", ""),
                    ("gain<br>dB", ""), ("limiter<br>dB", ""), ("delivery", "name")]
    else:
        columns += [("loudness<br>LUFS", ""), ("true peak<br>dBTP", "")]
    head = "<tr>" + "".join(f'<th class="{c}">{label}</th>' if c else f"<th>{label}</th>"
                            for label, c in columns) + "</tr>"
    out = ['<table class="files" id="files">', head]
    for entry in ordered:
        status = str(entry.get("status") or "unknown")
        loud, before, after = _loudness_of(entry)
        met = loud.get("met")
        target, tol = loud.get("target_lufs"), loud.get("tolerance_lu")
        ceiling, peak_after = loud.get("ceiling_dbtp"), after.get("true_peak_dbtp")
        lufs_after = after.get("integrated_lufs")
        peak_off = _is_number(ceiling) and _is_number(peak_after) and peak_after > ceiling + 1e-6
        lufs_off = (met is False and _is_number(target) and _is_number(lufs_after)
                    and abs(lufs_after - target) > (tol or 0.0) + 1e-9)
        cells = [
            f'<td class="name file">{_esc(entry.get("source"))}</td>',
            f'<td class="name">{_esc(entry.get("room"))}</td>',
            f'<td class="name"><span class="tag {_esc(status)}">{_esc(status)}</span></td>',
        ]
        if stage:
            if status == "failed":
                delivery = '<span class="tag failed">failed</span>'
            elif met is True:
                delivery = '<span class="tag met">met</span>'
            elif met is False:
                delivery = '<span class="tag missed">missed</span>'
            else:
                delivery = '<span class="tag none">no target</span>'
            target_text = _num(target, 1) + (f" \u00b1{tol:g}" if _is_number(tol) and _is_number(target) else "")
            cells += [
                f"<td>{_esc(_num(before.get('integrated_lufs'), 1))}</td>",
                f"<td{_OFF if lufs_off else ''}>{_esc(_num(lufs_after, 1))}</td>",
                f"<td>{_esc(target_text)}</td>",
                f"<td>{_esc(_num(before.get('true_peak_dbtp'), 1))}</td>",
                f"<td{_OFF if peak_off else ''}>{_esc(_num(peak_after, 1))}</td>",
                f"<td>{_esc(_num(ceiling, 1))}</td>",
                f"<td>{_esc(_signed(loud.get('gain_db'), 1))}</td>",
                f"<td>{_esc(_num(loud.get('limiter_reduction_db'), 1))}</td>",
                f'<td class="name">{delivery}</td>',
            ]
        else:
            cells += [f"<td>{_esc(_num(lufs_after, 1))}</td>", f"<td>{_esc(_num(peak_after, 1))}</td>"]
        cls = ' class="failed"' if status == "failed" else ""
        out.append(f'<tr{cls} data-status="{_esc(status)}">' + "".join(cells) + "</tr>")
        details = []
        if status == "failed":
            details.append(("error", str(entry.get("error") or "no error message recorded")))
        if after.get("reason"):
            details.append(("loudness", str(after["reason"])))
        if _is_number(loud.get("shortfall_lu")) and loud["shortfall_lu"] > 0:
            details.append(("loudness", f"{loud['shortfall_lu']:.1f} LU short of the target "
                                        f"(the gain was lowered to keep the ceiling)"))
        for note in entry.get("notes") or []:
            details.append(("note", str(note)))
        for kind, text in details:
            fail = " failed" if kind == "error" else ""
            out.append(f'<tr class="detail{fail}" data-status="{_esc(status)}"><td colspan="{len(columns)}">'
                       f"{_esc(kind)}: {_esc(text)}</td></tr>")
    out.append("</table>")
    return "\n".join(out)


def _footer(manifest):
    versions = manifest.get("versions") or {}
    job = manifest.get("job") or {}
    libraries = ", ".join(f"{_esc(k)} {_esc(v)}" for k, v in versions.items() if k != "render")
    lines = [
        f"render {_esc(versions.get('render', '?'))} (room engine {_esc(manifest.get('engine_version', '?'))}); "
        f"manifest schema {_esc(manifest.get('schema_version'))}; created {_esc(manifest.get('created_utc', '?'))}",
        f"job file {_esc(PurePosixPath(str(job.get('path') or '?').replace(os.sep, '/')).name)}, "
        f"sha256 <code>{_esc(job.get('sha256', '?'))}</code>",
    ]
    if libraries:
        lines.append(f"computed with {libraries}")
    if manifest.get("merged_from"):
        lines.append("merged from " + ", ".join(_esc(n) for n in manifest["merged_from"]))
    if isinstance(manifest.get("shard"), dict):
        lines.append(f"shard {_esc(manifest['shard'].get('k'))} of {_esc(manifest['shard'].get('n'))}")
    return "<footer>" + "<br>".join(lines) + "</footer>"


def _page(manifest, room_figures, loudness_png):
    name = (manifest.get("job") or {}).get("name") or "job"
    sources = manifest.get("sources") or []
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en">',
        "<head>",
        '<meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>render report: {_esc(name)}</title>",
        f"<style>{_CSS}</style>",
        "</head>",
        "<body>",
        "<main>",
        f"<h1>Render report: {_esc(name)}</h1>",
        f'<p class="sub">Created {_esc(manifest.get("created_utc", "?"))} · {len(sources)} '
        f'file{"s" if len(sources) != 1 else ""} · look before you listen</p>',
        _summary(manifest),
        "<h2>Files</h2>",
    ]
    if sources:
        parts.append(f'<figure><img src="{_data_uri(loudness_png)}" alt="Loudness and true peak per file, '
                     f'failures first"><figcaption>Hollow: before the loudness stage; filled: the delivered mix '
                     f'(brick when the target was missed). Failures first.</figcaption></figure>')
        parts.append(_files_table(sources))
    else:
        parts.append('<p class="sub">The manifest lists no files.</p>')
    parts.append("<h2>Rooms</h2>")
    rooms = manifest.get("rooms") or []
    if not rooms:
        parts.append('<p class="sub">The manifest lists no room responses.</p>')
    for entry, figure in zip(rooms, room_figures):
        parts.append(_room_section(entry, figure))
    parts += ["</main>", _footer(manifest), "</body>", "</html>", ""]
    return "\n".join(parts)


# --------------------------------------------------------------------------- entry points


def write_report(out_dir):
    """Draw the figures of an output folder and write them and ``report.html``.

    Parameters
    ----------
    out_dir : str or os.PathLike
        A job's output folder, holding ``manifest.json`` and ``rooms/``.

    Returns
    -------
    pathlib.Path
        The page, ``out_dir/report.html``.  Figures are in ``out_dir/report/``
        (``room-<response>.png`` per room response, ``loudness.png``); figures
        of an earlier report that no longer apply are removed.

    Raises
    ------
    OutputError
        No readable manifest (or only shard manifests: merge them first);
        matplotlib missing; a file cannot be written.  A room response that
        cannot be read or measured does not stop the report: its section says why.
    """
    from .audio_io import read_all
    from .plots import loudness_figure_png, response_figure_png

    out_dir = Path(out_dir)
    manifest = _load_manifest(out_dir)
    figures_dir = out_dir / FIGURES_DIR
    written, taken, room_figures = [], set(), []
    for entry in manifest.get("rooms") or []:
        name = entry.get("name") or "room"
        try:
            ir, rate = read_all(out_dir / str(entry.get("path")))
            targets = entry.get("t30_target_s")
            png = response_figure_png(ir, rate_hz=float(rate), title=f"Room {name}",
                                      targets=targets or None, bands_hz=entry.get("bands_hz") if targets else None)
        except OutputError:
            raise  # matplotlib missing: nothing can be drawn
        except RenderError as e:
            room_figures.append((None, str(e)))
            continue
        file_name = _figure_name(entry, taken)
        written.append(_write_atomic(figures_dir / file_name, png))
        room_figures.append((png, None))
    loudness_png = loudness_figure_png(manifest.get("sources") or [])
    written.append(_write_atomic(figures_dir / "loudness.png", loudness_png))
    for old in figures_dir.glob("room-*.png"):
        if old not in written:
            try:
                old.unlink()
            except OSError:
                pass
    page = _page(manifest, room_figures, loudness_png)
    return _write_atomic(out_dir / REPORT_NAME, page.encode("utf-8"))


def analyze_plot(path_in, path_png):
    """The figure of ``render analyze FILE --plot OUT.png``: any impulse response, no targets.

    Parameters
    ----------
    path_in : str or os.PathLike
        An impulse response (ours or measured), any format libsndfile reads.
    path_png : str or os.PathLike
        Where to write the PNG.

    Returns
    -------
    pathlib.Path
        ``path_png``.

    Raises
    ------
    AudioInputError
        ``path_in`` cannot be read.
    AnalysisError, ParameterError
        The response cannot be measured (e.g. all zeros, rate below 1 kHz).
    OutputError
        matplotlib missing, or ``path_png`` cannot be written.
    """
    from .audio_io import read_all
    from .plots import response_figure_png

    ir, rate = read_all(path_in)
    png = response_figure_png(ir, rate_hz=float(rate), title=Path(path_in).name)
    return _write_atomic(Path(path_png), png)
