"""The visual report: figures that decode and show something, a self-contained page, failures first."""

import base64
import builtins
import hashlib
import html.parser
import json
import math
import re
import shutil
import struct
import subprocess
import textwrap
import zlib

import numpy as np
import pytest
import soundfile as sf

from conftest import SMALL_ROOM, speechlike, write_audio
from render import __version__, plots
from render.analysis import analyze, decay_time_s, schroeder_decay_db
from render.cli import EXIT_PARTIAL, main
from render.errors import OutputError, ParameterError
from render.report_html import analyze_plot, write_report

RATE = 48000
# PNG file signature and chunk layout (ISO/IEC 15948, the PNG specification).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
PNG_CHANNELS = {0: 1, 2: 3, 3: 1, 4: 2, 6: 4}  # colour type -> samples per pixel

JOB = """
[job]
name = "report<check>"
output = "out"
""" + SMALL_ROOM + """
[rooms.booth]
decay_s = 0.2
size_m = [2.0, 1.8, 2.2]
distance_m = 0.6

[mix]
wet_db = -12

[loudness]
preset = "podcast-stereo"
over_ceiling = "lower"

[[sources]]
files = ["in/mono/*.wav"]
room = "box"

[[sources]]
files = ["in/stereo/*.wav"]
room = "booth"
"""


def _sine(frames, channels, amplitude):
    t = np.arange(frames) / RATE
    return np.repeat((amplitude * np.sin(2 * np.pi * 1000.0 * t))[:, None], channels, axis=1)


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    """One rendered batch: a file that meets the target, one that misses it, a name to escape, a corrupt file."""
    root = tmp_path_factory.mktemp("report")
    rng = np.random.default_rng(20261202)
    # A steady sine reaches -16 LUFS with peaks to spare: the target is met.
    write_audio(root / "in" / "mono" / "steady.wav", _sine(RATE, 1, 0.05), RATE, "PCM_24")
    # Quiet noise with loud clicks needs more gain than the -1 dBTP ceiling leaves ("lower"): missed.
    clicks = speechlike(rng, RATE, 1, level=0.005)
    clicks[::4800] = 0.9
    write_audio(root / "in" / "mono" / "x<i>&y.wav", clicks, RATE, "PCM_24")
    write_audio(root / "in" / "stereo" / "duo.wav", _sine(RATE, 2, 0.05), RATE, "PCM_24")
    (root / "in" / "mono" / "broken.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVEjunk" + bytes(100))
    job = root / "job.toml"
    job.write_text(textwrap.dedent(JOB), encoding="utf-8")
    assert main(["run", str(job), "--quiet", "--jobs", "1"]) == EXIT_PARTIAL  # the corrupt file failed
    out = root / "out"
    page = write_report(out)
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    return {"root": root, "out": out, "page": page, "manifest": manifest, "job": job}


# --------------------------------------------------------------------------- PNG checks


def png_facts(data):
    """(width, height) of a PNG after checking its structure with the standard library alone.

    Signature, every chunk's CRC-32, IHDR first and IEND last, and the
    decompressed IDAT stream holding exactly one filter byte plus one row of
    samples per line (PNG specification, non-interlaced).
    """
    assert data[:8] == PNG_SIGNATURE
    pos, chunks = 8, []
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        kind = data[pos + 4 : pos + 8]
        body = data[pos + 8 : pos + 8 + length]
        (crc,) = struct.unpack(">I", data[pos + 8 + length : pos + 12 + length])
        assert zlib.crc32(kind + body) & 0xFFFFFFFF == crc, kind
        chunks.append((kind, body))
        pos += 12 + length
    assert chunks[0][0] == b"IHDR" and chunks[-1][0] == b"IEND"
    width, height, depth, colour, _, _, interlace = struct.unpack(">IIBBBBB", chunks[0][1])
    assert interlace == 0
    raw = zlib.decompress(b"".join(body for kind, body in chunks if kind == b"IDAT"))
    row_bytes = math.ceil(width * PNG_CHANNELS[colour] * depth / 8)
    assert len(raw) == height * (1 + row_bytes)
    return width, height


def assert_not_blank(data, min_colours=50):
    import io

    import matplotlib.image

    pixels = matplotlib.image.imread(io.BytesIO(data), format="png")
    flat = pixels.reshape(-1, pixels.shape[-1])
    assert float(np.var(flat)) > 0
    rgba = np.zeros((flat.shape[0], 4), dtype=np.uint8)
    rgba[:, : flat.shape[1]] = np.round(flat * 255)
    assert len(np.unique(rgba.view(np.uint32))) > min_colours  # one 32-bit number per colour


# --------------------------------------------------------------------------- HTML checks


class Page(html.parser.HTMLParser):
    """Collects tags, attributes, text and the status of each file row; checks that tags nest."""

    VOID = {"meta", "img", "br", "hr", "link", "input", "source", "col", "wbr"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.tags, self.refs, self.text, self.rows, self.problems = [], [], [], [], [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        self.refs += [attrs[k] for k in ("src", "href") if k in attrs]
        if tag == "tr" and "data-status" in attrs and "detail" not in (attrs.get("class") or ""):
            self.rows.append(attrs["data-status"])
        if tag not in self.VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if tag in self.VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


def parse(text):
    page = Page()
    page.feed(text)
    page.close()
    assert page.problems == [] and page.stack == []
    return page


def plain(page):
    return re.sub(r"\s+", " ", " ".join(page.text))


# --------------------------------------------------------------------------- the batch report


def test_the_batch_has_every_kind_of_row(rendered):
    # The job above must give a failure, a missed target and a met one, or the ordering tests say nothing.
    kinds = {(e["status"], (e.get("loudness") or {}).get("met")) for e in rendered["manifest"]["sources"]}
    assert ("failed", None) in kinds and ("rendered", False) in kinds and ("rendered", True) in kinds


@pytest.mark.parametrize("name, size", [("room-box.png", (1600, 1200)), ("room-booth.png", (1600, 1200)),
                                        ("loudness.png", None)])
def test_each_figure_is_a_valid_png_of_its_size_and_not_blank(rendered, name, size):
    data = (rendered["out"] / "report" / name).read_bytes()
    width, height = png_facts(data)
    if size is None:
        assert width == 1600 and height >= 400  # four rows of files, a title and a legend
    else:
        assert (width, height) == size  # the size asked for in the brief
    assert_not_blank(data)


def test_the_page_embeds_exactly_the_written_figures(rendered):
    text = rendered["page"].read_text(encoding="utf-8")
    page = parse(text)
    embedded = [base64.b64decode(ref.split(",", 1)[1]) for ref in page.refs if ref.startswith("data:image/png")]
    written = [p.read_bytes() for p in sorted((rendered["out"] / "report").glob("*.png"))]
    assert sorted(embedded) == sorted(written)
    assert len(written) == len(rendered["manifest"]["rooms"]) + 1


def test_the_page_is_self_contained(rendered):
    text = rendered["page"].read_text(encoding="utf-8")
    page = parse(text)
    assert page.refs and all(ref.startswith("data:image/png;base64,") for ref in page.refs)
    assert not {"script", "link", "iframe", "object", "embed", "base"} & set(page.tags)
    for scheme in ("http://", "https://", "file://", "url("):  # no link out of the page, even in text
        assert scheme not in text
    assert str(rendered["root"]) not in " ".join(page.refs)


def test_the_page_names_every_room_and_file(rendered):
    text = plain(parse(rendered["page"].read_text(encoding="utf-8")))
    for room in rendered["manifest"]["rooms"]:
        assert room["name"] in text
    for entry in rendered["manifest"]["sources"]:
        assert entry["source"] in text
    assert "report<check>" in text  # the job's name in the title


def test_text_from_the_manifest_is_escaped(rendered):
    text = rendered["page"].read_text(encoding="utf-8")
    assert "x&lt;i&gt;&amp;y.wav" in text and "report&lt;check&gt;" in text
    assert "<i>" not in text and "<check>" not in text
    assert "i" not in parse(text).tags and "check" not in parse(text).tags


def test_failed_files_come_first_then_missed_targets(rendered):
    page = parse(rendered["page"].read_text(encoding="utf-8"))
    by_source = {e["source"]: e for e in rendered["manifest"]["sources"]}
    assert sorted(page.rows) == sorted(e["status"] for e in by_source.values())
    assert page.rows[0] == "failed" and "failed" not in page.rows[1:]
    # Among the rendered rows, "missed" before "met", read from the delivery column's tags.
    text = rendered["page"].read_text(encoding="utf-8")
    table = text[text.index('id="files"'):]
    tags = re.findall(r'<span class="tag (met|missed|failed)">', table)
    delivery = [t for t in tags if t != "failed"]
    assert delivery == sorted(delivery, key=["missed", "met"].index) and set(delivery) == {"missed", "met"}
    # The failed file's error message is on the page, under its row.
    error = next(e["error"] for e in by_source.values() if e["status"] == "failed")
    assert error and error in plain(page)
    assert text.index("broken.wav") < text.index("steady.wav")


def test_summary_counts_the_batch(rendered):
    text = plain(parse(rendered["page"].read_text(encoding="utf-8")))
    # Built above: three readable files and one corrupt; steady.wav and duo.wav meet, x<i>&y.wav misses.
    assert "3 rendered" in text and "0 skipped" in text and "1 failed" in text
    assert "2 delivery targets met" in text and "1 missed" in text


def test_room_tables_give_the_derived_values(rendered):
    text = plain(parse(rendered["page"].read_text(encoding="utf-8")))
    box = text[text.index("box ·"):]
    assert "18.0 m³" in box  # V = 3.0 · 2.5 · 2.4 m
    assert "0.48 m" in box  # r_c = 0.057 · √(V / T) = 0.057 · √(18 / 0.25) (diffuse-field theory, from memory)
    assert "236 Hz" in box  # f_S = 2000 · √(T / V) = 2000 · √(0.25 / 18) (Schroeder, JASA 1996)
    for room in rendered["manifest"]["rooms"]:
        for target, measured in zip(room["t30_target_s"], room["t30_measured_s"]):
            assert f"{target:.3f} s" in text and f"{measured:.3f} s" in text


def test_the_footer_gives_the_manifests_facts(rendered):
    text = plain(parse(rendered["page"].read_text(encoding="utf-8")))
    footer = text[text.index(f"render {__version__}"):]
    assert hashlib.sha256(rendered["job"].read_bytes()).hexdigest() in footer  # the job file's own hash
    assert rendered["manifest"]["created_utc"] in footer
    assert str(rendered["root"]) not in footer  # the job file by name only


def test_a_missing_response_is_reported_and_stale_figures_go(rendered, tmp_path):
    out = tmp_path / "out"
    shutil.copytree(rendered["out"], out)
    booth = next(r for r in rendered["manifest"]["rooms"] if r["name"] == "booth")
    (out / booth["path"]).unlink()
    (out / "report" / "room-gone.png").write_bytes(b"old")
    page = write_report(out)
    text = plain(parse(page.read_text(encoding="utf-8")))
    assert "No figure" in text and "no such file" in text
    assert sorted(p.name for p in (out / "report").glob("*.png")) == ["loudness.png", "room-box.png"]
    assert not list(out.glob(".report.html.*.part"))  # the temporary file was renamed into place


@pytest.mark.parametrize(
    "files, match",
    [({}, r"no manifest to report on \(render the job first"),
     ({"manifest.shard-1-of-2.json": "{}"}, r"render merge"),
     ({"manifest.json": "{not json"}, r"unreadable, or not a manifest of schema version 1")],
)
def test_a_folder_without_a_readable_manifest_is_refused(tmp_path, files, match):
    for name, text in files.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    with pytest.raises(OutputError, match=match):
        write_report(tmp_path)
    assert not (tmp_path / "report.html").exists()


# --------------------------------------------------------------------------- a headless browser


BROWSER = shutil.which("chromium") or shutil.which("chromium-browser")  # never downloaded by the tests


@pytest.mark.skipif(BROWSER is None, reason="no chromium or chromium-browser on PATH")
def test_a_headless_browser_renders_the_page(rendered, tmp_path):
    shot = tmp_path / "shot.png"
    subprocess.run(
        [BROWSER, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", "--hide-scrollbars",
         f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1280,2000",
         rendered["page"].resolve().as_uri()],
        stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, timeout=180, check=False,
    )
    assert shot.is_file()
    data = shot.read_bytes()
    assert png_facts(data) == (1280, 2000)
    assert_not_blank(data)


# --------------------------------------------------------------------------- the figures alone


def decaying_noise(rng, *, decay_s, frames, channels):
    t = np.arange(frames) / RATE
    return rng.standard_normal((frames, channels)) * np.exp(-3.0 * np.log(10.0) * t / decay_s)[:, None]


@pytest.mark.parametrize("channels, rate", [(1, 48000), (4, 44100)])
def test_analyze_plot_draws_any_response(tmp_path, rng, channels, rate):
    path = tmp_path / "measured.wav"
    sf.write(str(path), decaying_noise(rng, decay_s=0.4, frames=rate, channels=channels) * 0.3, rate,
             subtype="FLOAT")
    out = analyze_plot(path, tmp_path / "plot" / "measured.png")
    data = out.read_bytes()
    assert png_facts(data) == (1600, 1200)
    assert_not_blank(data)


def test_targets_must_match_the_bands(rng):
    ir = decaying_noise(rng, decay_s=0.3, frames=12000, channels=1)
    with pytest.raises(ParameterError, match=r"targets has 2 values for 7 bands"):
        plots.response_figure_png(ir, rate_hz=RATE, title="t", targets=[0.3, 0.3])


def _entries(n):
    return [{"source": f"in/f{i:03d}.wav", "group": 0, "status": "rendered",
             "loudness": {"target_lufs": -16.0, "tolerance_lu": 1.0, "ceiling_dbtp": -1.0, "met": True,
                          "before": {"integrated_lufs": -20.0 - i % 5, "true_peak_dbtp": -6.0},
                          "after": {"integrated_lufs": -16.0, "true_peak_dbtp": -1.5}}} for i in range(n)]


@pytest.mark.parametrize("fewer, more", [(1, 3), (3, 12)])
def test_the_loudness_figure_grows_with_the_files(fewer, more):
    small, large = (png_facts(plots.loudness_figure_png(_entries(n))) for n in (fewer, more))
    assert small[0] == large[0] == 1600 and large[1] > small[1]


def test_the_loudness_figure_stops_growing_at_its_row_limit(monkeypatch):
    monkeypatch.setattr(plots, "LOUDNESS_MAX_ROWS", 4)  # a small limit keeps the test quick
    at_limit, over = (png_facts(plots.loudness_figure_png(_entries(n))) for n in (4, 9))
    assert over == at_limit


@pytest.mark.parametrize(
    "statuses, expected",
    [
        ([("a", "rendered", True), ("b", "failed", None), ("c", "rendered", False)], ["b", "c", "a"]),
        ([("a", "skipped", None), ("b", "rendered", False), ("c", "rendered", False)], ["b", "c", "a"]),
        ([("a", "failed", None), ("b", "failed", None), ("c", "rendered", None)], ["a", "b", "c"]),
    ],
)
def test_order_for_review_puts_failures_then_misses_first(statuses, expected):
    entries = [{"source": s, "status": st, "loudness": {"met": met}} for s, st, met in statuses]
    assert [e["source"] for e in plots.order_for_review(entries)] == expected


@pytest.mark.parametrize("decay_s", [0.3, 1.2, 2.5])
def test_the_t30_line_of_an_exact_exponential(decay_s):
    curve = -60.0 * np.arange(int(decay_s * RATE)) / RATE / decay_s  # falls 60 dB in decay_s
    slope, intercept = plots.decay_fit_line(curve, rate_hz=RATE)
    assert abs(-60.0 / slope - decay_s) < 1e-9 and abs(intercept) < 1e-9
    # The same frames as the analysis module's ISO 3382-1 fit (our analysis as the reference).
    assert abs(-60.0 / slope - decay_time_s(curve, rate_hz=RATE, start_db=-5.0, stop_db=-35.0)) < 1e-9


@pytest.mark.parametrize("room", ["box", "booth"])
def test_the_drawn_t30_line_is_the_analysed_t30(rendered, room):
    entry = next(r for r in rendered["manifest"]["rooms"] if r["name"] == room)
    ir, rate = sf.read(str(rendered["out"] / entry["path"]), dtype="float64", always_2d=True)
    result = analyze(ir, rate_hz=rate)
    for c in range(ir.shape[1]):
        curve = schroeder_decay_db(ir[result.onset_frame :, c : c + 1])[:, 0]
        slope, _ = plots.decay_fit_line(curve, rate_hz=rate)
        # Our ISO 3382-1 analysis as the reference: the line drawn is the one it measures.
        assert abs(-60.0 / slope - result.channels[c].broadband.t30_s) < 1e-9


@pytest.mark.parametrize("lowest_db", [-20.0, -34.9])
def test_no_t30_line_when_the_curve_stops_above_minus_35_db(lowest_db):
    curve = np.linspace(0.0, lowest_db, 4800)
    curve = np.append(curve, np.full(100, np.nan))  # cut at the noise floor
    assert plots.decay_fit_line(curve, rate_hz=RATE) is None


@pytest.mark.parametrize("delay", [0, 17, 400])
def test_the_magnitude_of_a_delayed_impulse_is_flat(delay):
    ir = np.zeros((1000, 1))
    ir[delay, 0] = 1.0
    freqs, level = plots.smoothed_magnitude_db(ir, rate_hz=RATE)
    assert freqs[0] == 20.0 and freqs[-1] == RATE / 2
    assert np.max(np.abs(level)) < 1e-9  # |e^{-jωd}| = 1 at every frequency


@pytest.mark.parametrize("f_hz", [100.0, 500.0, 1000.0])
def test_the_magnitude_of_a_two_tap_sum(f_hz):
    ir = np.array([[1.0], [1.0]])  # |H(f)| = 2 |cos(π f / fs)| (the DTFT of two unit taps)
    freqs, level = plots.smoothed_magnitude_db(ir, rate_hz=RATE)
    k = int(np.argmin(np.abs(freqs - f_hz)))
    expected = 20.0 * np.log10(2.0 * np.cos(np.pi * freqs[k] / RATE))
    assert abs(level[k, 0] - expected) < 0.01


# --------------------------------------------------------------------------- without matplotlib


@pytest.fixture
def no_matplotlib(monkeypatch):
    real_import = builtins.__import__

    def refuse(name, *args, **kwargs):
        if name == "matplotlib" or name.startswith("matplotlib."):
            raise ImportError(f"No module named {name!r}")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", refuse)


@pytest.mark.parametrize("draw", ["response", "loudness", "report"])
def test_missing_matplotlib_gives_the_install_hint(no_matplotlib, rendered, rng, draw):
    with pytest.raises(OutputError, match=re.escape("plots need matplotlib: pip install 'render[plots]'")):
        if draw == "response":
            plots.response_figure_png(decaying_noise(rng, decay_s=0.3, frames=9600, channels=1), rate_hz=RATE,
                                      title="t")
        elif draw == "loudness":
            plots.loudness_figure_png(_entries(2))
        else:
            write_report(rendered["out"])
