"""The render of a source and the batch: alignment, null test, formats, failures, resume, memory."""

import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest
import scipy.signal
import soundfile as sf

from conftest import SMALL_ROOM, speechlike, write_audio
from render.cli import EXIT_JOB, EXIT_OK, EXIT_PARTIAL, main
from render.errors import JobError
from render.job import load_job
from render.plan import plan_job
from render.renderer import whole_size_for
from render.synthesis import synthesize
from render.units import db_to_gain


def job_text(files, *, extra="", room_block=SMALL_ROOM, group=""):
    return f"""
[job]
output = "out"
{extra}
{room_block}
[mix]
wet_db = -6

[[sources]]
files = {json.dumps(files)}
room = "box"
{group}
"""


def render(job_path, *args):
    return main(["run", str(job_path), "--quiet", "--jobs", "1", *args])


@pytest.mark.parametrize("frames, whole", [(9000, True), (200_000, False)])
def test_stems_align_null_and_match_scipy(tmp_path, make_job, frames, whole):
    # A short source is convolved in one transform, a longer one streamed: both match the reference.
    rate = 48000
    src = np.zeros((frames, 1))
    src[1234, 0] = 0.5  # an impulse at a known sample
    src[3000:3100, 0] = np.hanning(100) * 0.25
    src[-50:, 0] = 0.125  # and a step at the very end
    write_audio(tmp_path / "in" / "a.wav", src, rate, "DOUBLE")
    job = make_job(job_text(["in/*.wav"]))
    assert (whole_size_for(plan_job(load_job(job)).tasks[0]) is not None) == whole
    assert render(job) == EXIT_OK
    room = load_job(job).rooms["box"]
    ir = synthesize(room, rate_hz=float(rate), channels=1).ir
    out = {s: sf.read(str(tmp_path / "out" / f"a.{s}.wav"), always_2d=True)[0] for s in ("mix", "wet", "dry")}
    # Output length = input + tail exactly (tail = response frames - 1), every stem the same.
    assert {len(v) for v in out.values()} == {len(src) + ir.shape[0] - 1}
    # Sample alignment: the dry impulse stays at its sample; the wet response starts there.
    assert np.argmax(np.abs(out["dry"][:, 0])) == 1234
    assert np.max(np.abs(out["wet"][:1234])) < 1e-12  # nothing before the source's impulse but FFT rounding
    # The wet stem equals a one-pass convolution (scipy as the reference library), DOUBLE output.
    ref = scipy.signal.fftconvolve(src[:, 0], ir[:, 0] * db_to_gain(-6.0))
    assert np.max(np.abs(out["wet"][:, 0] - ref)) < 1e-9
    # Null test (common practice): dry + wet == mix, within 1e-12 for float output.
    assert np.max(np.abs(out["dry"] + out["wet"] - out["mix"])) < 1e-12


@pytest.mark.parametrize(
    "fmt, subtype, ext, channels",
    [
        ("WAV", "PCM_16", "wav", 1),
        ("WAV", "PCM_24", "wav", 2),
        ("WAV", "FLOAT", "wav", 6),
        ("FLAC", "PCM_16", "flac", 2),
        ("FLAC", "PCM_24", "flac", 1),
    ],
)
def test_rate_channels_and_subtype_are_kept(tmp_path, make_job, rng, fmt, subtype, ext, channels):
    rate = 44100 if subtype == "PCM_16" else 48000
    write_audio(tmp_path / "in" / f"s.{ext}", speechlike(rng, 6000, channels), rate, subtype, fmt)
    job = make_job(job_text([f"in/*.{ext}"], extra=f'format = "{ext}"'))
    assert render(job) == EXIT_OK
    for stem in ("mix", "wet", "dry"):
        info = sf.info(str(tmp_path / "out" / f"s.{stem}.{ext}"))
        assert (info.samplerate, info.channels, info.subtype, info.format) == (rate, channels, subtype, fmt)
    mix, dry, wet = (sf.read(str(tmp_path / "out" / f"s.{s}.{ext}"), dtype="float64", always_2d=True)[0]
                     for s in ("mix", "dry", "wet"))
    lsb = 2.0 ** -(15 if subtype == "PCM_16" else 23)
    tol = 2 * 2.0 ** -24 if subtype == "FLOAT" else lsb * 1.0001
    # Null test within one LSB for integer output, two float32 ulps for FLOAT (common practice)
    assert np.max(np.abs(dry + wet - mix)) <= tol


def test_mono_source_renders_stereo_when_asked(tmp_path, make_job, rng):
    write_audio(tmp_path / "in" / "m.wav", speechlike(rng, 5000, 1), 48000, "PCM_24")
    job = make_job(job_text(["in/*.wav"], group="channels = 2"))
    assert render(job) == EXIT_OK
    mix, _ = sf.read(str(tmp_path / "out" / "m.mix.wav"), always_2d=True)
    wet, _ = sf.read(str(tmp_path / "out" / "m.wet.wav"), always_2d=True)
    assert mix.shape[1] == 2
    # decorrelated tail: the two wet channels differ
    assert np.corrcoef(wet[:, 0], wet[:, 1])[0, 1] < 0.9


def test_cut_keeps_the_source_length_and_fades(tmp_path, make_job, rng):
    write_audio(tmp_path / "in" / "c.wav", speechlike(rng, 7000, 1), 48000, "FLOAT")
    job = make_job(job_text(["in/*.wav"], extra='tail = "cut"'))
    assert render(job) == EXIT_OK
    for stem in ("mix", "wet", "dry"):
        assert sf.info(str(tmp_path / "out" / f"c.{stem}.wav")).frames == 7000
    wet, _ = sf.read(str(tmp_path / "out" / "c.wet.wav"), always_2d=True)
    assert abs(wet[-1, 0]) < 1e-3 * np.max(np.abs(wet))


def test_one_corrupt_file_fails_alone_and_resume_renders_only_what_changed(tmp_path, make_job, rng):
    for name in ("a", "b", "c"):
        write_audio(tmp_path / "in" / f"{name}.wav", speechlike(rng, 4000, 1), 48000, "PCM_24")
    (tmp_path / "in" / "broken.wav").write_bytes(b"RIFF\x00\x00\x00\x00WAVEjunk" + bytes(100))
    job = make_job(job_text(["in/*.wav"]))
    assert render(job) == EXIT_PARTIAL
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    status = {e["source"]: e["status"] for e in manifest["sources"]}
    assert status == {"in/a.wav": "rendered", "in/b.wav": "rendered", "in/c.wav": "rendered", "in/broken.wav": "failed"}
    assert "broken.wav" in next(e["error"] for e in manifest["sources"] if e["status"] == "failed")

    (tmp_path / "in" / "broken.wav").unlink()
    write_audio(tmp_path / "in" / "b.wav", speechlike(rng, 4500, 1), 48000, "PCM_24")  # b changes
    assert render(job, "--resume") == EXIT_OK
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    status = {e["source"]: e["status"] for e in manifest["sources"]}
    assert status == {"in/a.wav": "skipped", "in/b.wav": "rendered", "in/c.wav": "skipped"}
    assert render(job, "--resume") == EXIT_OK
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert {e["status"] for e in manifest["sources"]} == {"skipped"}


def test_manifest_records_hashes_versions_and_rooms(tmp_path, make_job, rng):
    write_audio(tmp_path / "in" / "a.wav", speechlike(rng, 4000, 1), 48000, "PCM_24")
    job = make_job(job_text(["in/*.wav"]))
    assert render(job) == EXIT_OK
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    assert m["schema_version"] == 1 and len(m["job"]["sha256"]) == 64
    assert {"numpy", "scipy", "soundfile", "libsndfile", "render"} <= set(m["versions"])
    (entry,) = m["sources"]
    assert len(entry["input"]["sha256"]) == 64 and entry["input"]["frames"] == 4000
    assert set(entry["stems"]) == {"mix", "wet", "dry"}
    (room,) = m["rooms"]
    assert (tmp_path / "out" / room["path"]).is_file() and room["path"] == "rooms/box.ir.wav"
    assert max(abs(e) for e in room["t30_error_pct"]) < 3.0
    ir, rate = sf.read(str(tmp_path / "out" / room["path"]))
    assert sf.info(str(tmp_path / "out" / room["path"])).subtype == "FLOAT" and rate == 48000


def test_process_pool_gives_the_same_bytes_as_one_process(tmp_path, make_job, rng):
    for name in ("a", "b", "c", "d"):
        write_audio(tmp_path / "in" / f"{name}.wav", speechlike(rng, 3000 + 500 * len(name), 2), 48000, "PCM_24")
    job = make_job(job_text(["in/*.wav"]))
    assert render(job) == EXIT_OK
    one = {e["source"]: e["stems"]["mix"]["sha256"] for e in json.loads((tmp_path / "out" / "manifest.json").read_text())["sources"]}
    assert main(["run", str(job), "--quiet", "--jobs", "2"]) == EXIT_OK
    two = {e["source"]: e["stems"]["mix"]["sha256"] for e in json.loads((tmp_path / "out" / "manifest.json").read_text())["sources"]}
    assert one == two


def test_golden_plan(tmp_path, make_job, rng):
    write_audio(tmp_path / "media" / "x" / "long.wav", speechlike(rng, 8000, 1), 48000, "PCM_24")
    write_audio(tmp_path / "media" / "x" / "deep" / "short.flac", speechlike(rng, 2000, 2), 48000, "PCM_16", "FLAC")
    job = make_job(job_text(["media/**/*.*"], extra='stems = ["mix", "wet"]\nname_pattern = "{room}/{dir}/{name}.{stem}"'))
    plan = plan_job(load_job(job))
    got = [(t.key, t.room_name, t.channels_out, t.subtype, t.format, [rel for _, rel in t.outputs]) for t in plan.tasks]
    # Longest first by (frames + tail) x channels: the short stereo file outweighs the long mono one.
    assert got == [
        ("media/x/deep/short.flac", "box", 2, "PCM_16", "WAV", ["box/x/deep/short.mix.wav", "box/x/deep/short.wet.wav"]),
        ("media/x/long.wav", "box", 1, "PCM_24", "WAV", ["box/x/long.mix.wav", "box/x/long.wet.wav"]),
    ]
    assert all(t.frames_out == t.info.frames + t.tail_frames for t in plan.tasks)


def test_glob_matching_nothing_and_colliding_outputs_are_job_errors(tmp_path, make_job, rng):
    job = make_job(job_text(["nothing/*.wav"]))
    with pytest.raises(JobError, match=r'sources\[0\]\.files\[0\] = "nothing/\*\.wav": matched no file'):
        plan_job(load_job(job))
    write_audio(tmp_path / "a" / "take.wav", speechlike(rng, 1000, 1), 48000, "PCM_24")
    write_audio(tmp_path / "b" / "take.wav", speechlike(rng, 1000, 1), 48000, "PCM_24")
    job = make_job(job_text(["a/*.wav", "b/*.wav"]))
    with pytest.raises(JobError, match=r"would both write \"take\.mix\.wav\""):
        plan_job(load_job(job))
    assert main(["check", str(job)]) == EXIT_JOB


MEMORY_SCRIPT = textwrap.dedent(
    """
    import resource, sys
    from render.job import load_job
    from render.plan import plan_job
    from render.renderer import render_task
    plan = plan_job(load_job(sys.argv[1]))
    render_task(plan.tasks[0], output_dir=plan.job.output_dir)
    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
    """
)


@pytest.mark.skipif(sys.platform != "linux", reason="ru_maxrss in KiB is Linux's convention")
def test_peak_memory_does_not_grow_with_length(tmp_path):
    rng = np.random.default_rng(5)
    rss = {}
    for label, seconds in (("short", 5), ("long", 180)):
        folder = tmp_path / label
        frames = seconds * 48000
        (folder / "in").mkdir(parents=True)
        with sf.SoundFile(str(folder / "in" / "in.wav"), "w", 48000, 2, "PCM_24") as f:
            for start in range(0, frames, 480000):
                n = min(480000, frames - start)
                f.write(rng.standard_normal((n, 2)) * 0.05)
        (folder / "job.toml").write_text(job_text(["in/in.wav"]))
        out = subprocess.run([sys.executable, "-c", MEMORY_SCRIPT, str(folder / "job.toml")],
                             capture_output=True, text=True, check=True, env={**os.environ})
        rss[label] = int(out.stdout.strip().splitlines()[-1])
    # Peak RSS for 3 minutes of stereo is within 10 % of that for 5 seconds (the criterion).
    assert rss["long"] <= 1.10 * rss["short"], rss


def _interrupt_run(tmp_path, ready):
    """Start ``render run`` on 8 files of 15 s, send SIGINT once ``ready(out)`` holds; returns (rc, stderr)."""
    import signal
    import time

    rng = np.random.default_rng(11)
    for i in range(8):
        write_audio(tmp_path / "in" / f"f{i}.wav", rng.standard_normal((48000 * 15, 2)) * 0.05, 48000, "PCM_24")
    room = '[rooms.box]\ndecay_s = 1.5\nsize_m = [8.0, 6.0, 3.0]\n'
    (tmp_path / "job.toml").write_text(job_text(["in/*.wav"], room_block=room))
    proc = subprocess.Popen([sys.executable, "-m", "render", "run", str(tmp_path / "job.toml"), "--jobs", "1"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out = tmp_path / "out"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not ready(out) and proc.poll() is None:
        time.sleep(0.01)
    assert proc.poll() is None, "the run ended before it could be interrupted"
    proc.send_signal(signal.SIGINT)
    _, err = proc.communicate(timeout=120)
    return proc.returncode, err


def _left_no_temporaries(out):
    assert not [p for p in out.rglob("*") if p.name.endswith(".part")]
    assert not (out / ".render.lock").exists()
    assert not (out / ".render-tmp").exists()
    assert not (out / ".render-responses").exists()


def _stems_match_manifest(out, manifest):
    listed = set()
    for entry in manifest["sources"]:  # what the manifest calls rendered is complete
        for stem in entry["stems"].values():
            assert sf.info(str(out / stem["path"])).frames == stem["frames"]
            listed.add(stem["path"])
    # and nothing it does not list is there
    assert {p.name for p in out.glob("*.wav")} == listed


@pytest.mark.skipif(sys.platform == "win32", reason="SIGINT to a child process is POSIX")
def test_ctrl_c_while_a_stem_is_written_leaves_no_partial_output(tmp_path):
    # A stem's temporary is ".f<i>.<stem>.wav.<random>.part" (the run's lock has a temporary of its own).
    rc, err = _interrupt_run(tmp_path, lambda out: bool(list(out.glob(".f*.wav.*.part"))))
    out = tmp_path / "out"
    assert rc == 130, err
    _left_no_temporaries(out)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["summary"]["interrupted"] is True
    assert manifest["summary"]["rendered"] + manifest["summary"]["not_run"] == 8
    _stems_match_manifest(out, manifest)


@pytest.mark.skipif(sys.platform == "win32", reason="SIGINT to a child process is POSIX")
def test_ctrl_c_before_rendering_claims_nothing(tmp_path):
    # SIGINT as soon as the run holds the folder's lock: most often while the room is synthesised.
    rc, err = _interrupt_run(tmp_path, lambda out: (out / ".render.lock").exists())
    out = tmp_path / "out"
    assert rc == 130, err
    _left_no_temporaries(out)
    if (out / "manifest.json").exists():  # the signal came after the first source had started
        manifest = json.loads((out / "manifest.json").read_text())
        assert manifest["summary"]["interrupted"] is True
        _stems_match_manifest(out, manifest)
    else:  # before: nothing rendered, nothing claimed
        assert not list(out.glob("*.wav"))


@pytest.mark.parametrize("ext, fmt", [("wav", "WAV"), ("flac", "FLAC")])
def test_text_tags_are_carried_over(tmp_path, make_job, rng, ext, fmt):
    (tmp_path / "in").mkdir()
    with sf.SoundFile(str(tmp_path / "in" / f"t.{ext}"), "w", 48000, 1, "PCM_24", format=fmt) as f:
        f.title, f.artist, f.comment = "Scene 12, line 3", "Mara", "ADR pass 2"
        f.write(speechlike(rng, 4000, 1))
    job = make_job(job_text([f"in/*.{ext}"], extra=f'format = "{ext}"'))
    assert render(job) == EXIT_OK
    for stem in ("mix", "wet", "dry"):
        with sf.SoundFile(str(tmp_path / "out" / f"t.{stem}.{ext}")) as f:
            tags = f.copy_metadata()
        assert (tags.get("title"), tags.get("artist"), tags.get("comment")) == ("Scene 12, line 3", "Mara", "ADR pass 2")


@pytest.mark.parametrize("cache", ["on", "off"])
def test_a_second_run_reads_the_room_from_the_response_cache(tmp_path, make_job, rng, monkeypatch, cache):
    # A second planning of the same job, in a process that has forgotten every response, reads the room
    # from the on-disk cache instead of synthesising it, and renders the same bytes (our design).
    from render import synthesis

    monkeypatch.setenv("RENDER_CACHE_DIR", str(tmp_path / "cache") if cache == "on" else "off")
    write_audio(tmp_path / "in" / "a.wav", speechlike(rng, 4000, 1), 48000, "PCM_24")
    job = make_job(job_text(["in/*.wav"]))
    synthesis.clear_cache()
    assert render(job) == EXIT_OK
    first = json.loads((tmp_path / "out" / "manifest.json").read_text())["sources"][0]["stems"]
    synthesis.clear_cache()
    calls = []
    real = synthesis._synthesize
    monkeypatch.setattr(synthesis, "_synthesize", lambda *a, **k: (calls.append(1), real(*a, **k))[1])
    assert render(job) == EXIT_OK  # without --resume every source is rendered again
    second = json.loads((tmp_path / "out" / "manifest.json").read_text())["sources"][0]["stems"]
    assert calls == ([] if cache == "on" else [1])
    assert {s: v["sha256"] for s, v in first.items()} == {s: v["sha256"] for s, v in second.items()}


def test_kernels_kept_per_process_stay_within_their_byte_budget(tmp_path, make_job, rng, monkeypatch):
    from render import renderer

    write_audio(tmp_path / "in" / "a.wav", speechlike(rng, 4000, 1), 48000, "PCM_24")
    task = plan_job(load_job(make_job(job_text(["in/*.wav"])))).tasks[0]
    monkeypatch.setattr(renderer, "_KERNELS", renderer.OrderedDict())
    first = renderer.kernel_for(task, fft_size=2**16)  # the room's response is 33 750 frames
    assert renderer.kernel_for(task, fft_size=2**16) is first  # a hit: the same prepared kernel
    monkeypatch.setattr(renderer, "_KERNEL_CACHE_BYTES", int(2.5 * first.nbytes))
    sizes = [2**16, 9 * 2**13, 10 * 2**13, 12 * 2**13]
    for size in sizes:
        renderer.kernel_for(task, fft_size=size)
    kept = list(renderer._KERNELS.values())
    assert sum(k.nbytes for k in kept) <= renderer._KERNEL_CACHE_BYTES
    assert kept[-1].fft_size == sizes[-1]  # the newest stays, the oldest went first
    monkeypatch.setattr(renderer, "_KERNEL_CACHE_BYTES", 1)
    assert renderer.kernel_for(task, fft_size=2**17).fft_size == 2**17
    assert len(renderer._KERNELS) == 1  # over budget on its own, yet kept: it is in use
