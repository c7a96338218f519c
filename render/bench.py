"""``render bench``: the renderer against its own limit and against baselines, in one run.

Everything is measured on material generated here, in a temporary folder, and
every figure is the median of several repeats in the same run, so the ratios
compare like with like on whatever machine runs them:

1. **Limit**: the bare FFT work of the convolution plan (forward transforms,
   spectral products and inverse transforms at the kernel's ``fft_size``, for
   the plan's number of blocks; no metering) plus the bare I/O (soundfile
   reading the source and writing three stems of the output's length, no
   fsync).
2. **End to end**: ``render run --jobs 1 --quiet`` of a delivery job (EBU R128
   loudness, true peak, limiter, TPDF dither, three PCM_24 stems), in a fresh
   process: interpreter start, imports, planning, room synthesis, both passes,
   hashing and the manifest are all included.  The render alone
   (:func:`render.batch.run_plan`, after planning and synthesis) is also given,
   and so is the same run with the room's response read from the response
   cache (:mod:`render.response_cache`), as every run after the first finds it.
   Every child process gets a response cache of the bench's own
   (``RENDER_CACHE_DIR`` in the temporary folder), never the user's.
3. **Script baseline**: what a capable user writes with general libraries:
   ``soundfile.read`` of the whole file, ``scipy.signal.fftconvolve`` with the
   renderer's own response (read back from ``out/rooms/*.ir.wav``), pyloudnorm
   integrated loudness (``filter_class="DeMan"``), true peak from
   ``scipy.signal.resample_poly`` at 4×, one gain (the loudness target, lowered
   to keep the ceiling), three ``soundfile.write`` stems.  Its mix is compared
   with a DOUBLE render of ours at the same gain, without limiter or dither.
4. **Time-domain baseline**: the room's comb/allpass network run sample by
   sample with ``scipy.signal.lfilter`` on a short excerpt, scaled to the
   output's length (early reflections left out, which favours the baseline).
5. **Memory**: peak RSS (read in the worker process itself) of
   ``render run --jobs 1`` on a short and a long stereo file: ``minutes`` and
   ``6 · minutes`` below 10 minutes, 10 and 60 minutes from ``minutes >= 10``.
6. **Scaling**: :func:`render.batch.run_plan` with ``--jobs 1`` against
   ``--jobs N`` on a folder of short mono and stereo files (rendered in
   stereo), after planning once in one process.

Audio speeds are source seconds per wall second (× real time).  The goals of
:data:`GOALS` are printed beside the figures; ``script / ours`` and
``time-domain / ours`` divide by our end-to-end time (everything included), and
the same ratios against the render alone are given as well.

Only the standard library is imported at module level; the measurements
import what they need.  Child processes run this module with the same Python,
one thread per BLAS/OpenMP pool.  The script baseline holds whole files in
memory (several GB for an hour of stereo).
"""

from __future__ import annotations

import json
import math
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from .errors import OutputError, ParameterError, RenderError

__all__ = ["run_bench", "format_bench", "DEFAULT_MINUTES", "GOALS", "repeat_spread"]

#: Length of the main material when ``render bench`` is given no ``--minutes``: chosen so that
#: the whole run takes under two minutes on the project's 2-core build machine.
DEFAULT_MINUTES = 1.0
#: Sample rate (Hz) and sample format of the generated material.
RATE_HZ = 48000
SUBTYPE = "PCM_24"
#: The room of every measurement: a hall with a 2.5 s decay.
ROOM_DECAY_S = 2.5
ROOM_SIZE_M = (20.0, 14.0, 8.0)
#: Below ``MEMORY_FULL_MINUTES[0]`` minutes, the memory runs use ``minutes`` and this many times more.
LONG_FACTOR = 6
MEMORY_FULL_MINUTES = (10.0, 60.0)
#: Repeat spread ``(max - min) / median`` above which the machine is reported as noisy.
NOISY_SPREAD = 0.20
#: Longest excerpt of the time-domain baseline, s.
EXCERPT_MAX_S = 2.0

#: Goals printed beside the figures: name -> (comparison, threshold, text).
GOALS = {
    "end_to_end_over_limit": ("<=", 1.5, "end to end <= 1.5 x the limit"),
    "script_over_ours": (">=", 5.0, ">= 5x faster than the script baseline"),
    "max_diff_dbfs": ("<=", -100.0, "script mix equals ours within -100 dBFS before dither"),
    "time_domain_over_ours": (">=", 50.0, ">= 50x faster than the time-domain baseline"),
    "rss_long_over_short": ("<=", 1.10, "peak RSS of the long run within 10 % of the short"),
    "long_rss_mb": ("<=", 300.0, "peak RSS <= 300 MB"),
    "jobs_n_over_jobs_1": (">=", 1.7, "--jobs 2 on 2 cores >= 1.7x --jobs 1"),
}

# Level of the generated material: speech-like noise bursts around -30 LUFS with a short
# plosive-like peak every two seconds, so that EBU R128 normalisation raises the level and
# the true-peak limiter has work to do (our choice).
_NOISE_RMS = 0.03
_LOWPASS_HZ = 1000.0
_SYLLABLES_HZ = 4.0
_PHRASE_HZ = 0.3
_PEAK_LEVEL = 0.4
_PEAK_EVERY_S = 2.0
_PEAK_AT_S = 0.37
_PEAK_FRAMES = 96

_JOB = """\
[job]
output = "out"
[rooms.hall]
decay_s = {decay_s}
size_m = [{size}]
{loudness}{mix}
[[sources]]
files = ["in/*.wav"]
room = "hall"
"""

_CHILD = "import sys; from render.bench import _child_main; sys.exit(_child_main(sys.argv[1:]))"


def repeat_spread(values):
    """``(max - min) / median`` of repeated timings (0 for a single value).

    Parameters
    ----------
    values : sequence of float
        Positive durations, at least one.

    Returns
    -------
    float

    >>> round(repeat_spread([1.0, 1.1, 1.3]), 3)
    0.273
    >>> repeat_spread([2.0])
    0.0
    """
    values = list(values)
    if not values:
        raise ParameterError("values is empty: expected at least one timing")
    if len(values) == 1:
        return 0.0
    return (max(values) - min(values)) / statistics.median(values)


# -- material --------------------------------------------------------------------------------


def _write_speechlike(path, *, seconds, channels, seed):
    """Speech-like noise bursts (invented material) with plosive-like peaks, written in pieces.

    Low-passed noise (one pole at 1 kHz) gated at 4 syllables per second, with
    pauses between phrases; every 2 s a 2 ms decaying pulse peaking at 0.4 (-8 dBFS).
    """
    import numpy as np
    import scipy.signal
    import soundfile as sf

    rng = np.random.default_rng(seed)
    frames = int(round(seconds * RATE_HZ))
    pole = math.exp(-2.0 * math.pi * _LOWPASS_HZ / RATE_HZ)
    norm = _NOISE_RMS * math.sqrt((1.0 + pole) / (1.0 - pole))  # unit variance after the pole
    zi = np.zeros((1, channels))
    pulse = _PEAK_LEVEL * np.exp(-np.arange(_PEAK_FRAMES) / (_PEAK_FRAMES / 5.0))
    piece = 10 * RATE_HZ
    with sf.SoundFile(str(path), "w", RATE_HZ, channels, SUBTYPE) as f:
        for start in range(0, frames, piece):
            n = min(piece, frames - start)
            t = (start + np.arange(n)) / RATE_HZ
            noise, zi = scipy.signal.lfilter([1.0 - pole], [1.0, -pole], rng.standard_normal((n, channels)),
                                             axis=0, zi=zi)
            envelope = np.sqrt(np.maximum(np.sin(2 * np.pi * _SYLLABLES_HZ * t), 0.0))
            envelope *= np.sin(2 * np.pi * _PHRASE_HZ * t) > -0.3
            x = noise * (norm * envelope)[:, None]
            k = max(0, math.ceil((start / RATE_HZ - _PEAK_AT_S) / _PEAK_EVERY_S))
            while (at := int(round((_PEAK_AT_S + k * _PEAK_EVERY_S) * RATE_HZ)) - start) < n:
                if at >= 0:
                    m = min(_PEAK_FRAMES, n - at)
                    x[at : at + m] += (pulse[:m] * (1.0 if k % 2 == 0 else -1.0))[:, None]
                k += 1
            f.write(np.clip(x, -0.99, 0.99))
    return frames


def _write_job(folder, *, stereo_out=False):
    """The delivery job (EBU R128, three stems); ``stereo_out`` renders mono sources in stereo."""
    folder.mkdir(parents=True, exist_ok=True)
    text = _JOB.format(
        decay_s=ROOM_DECAY_S,
        size=", ".join(repr(float(v)) for v in ROOM_SIZE_M),
        loudness='[loudness]\npreset = "ebu-r128"\n',
        mix="[mix]\nchannels = 2\n" if stereo_out else "",
    )
    (folder / "job.toml").write_text(text, encoding="utf-8")
    return folder / "job.toml"


def _room():
    from .room import Room

    return Room(name="hall", decay_s=ROOM_DECAY_S, size_m=ROOM_SIZE_M)


# -- child processes -------------------------------------------------------------------------


def _env(cache_dir):
    env = dict(os.environ)
    env["RENDER_CACHE_DIR"] = str(cache_dir)  # never the user's own response cache
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        env[name] = "1"  # one worker is one core
    root = str(Path(__file__).resolve().parents[1])
    env["PYTHONPATH"] = root + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def _spawn(*args, cache_dir):
    """Run this module's child with ``args`` and a response cache in ``cache_dir``.

    Returns (wall seconds, the JSON it printed last).
    """
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", _CHILD, *map(str, args)], capture_output=True, text=True,
                          env=_env(cache_dir))
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        tail = (proc.stderr.strip() or proc.stdout.strip())[-600:]
        raise RenderError(f"bench: child {args[0]} failed with exit code {proc.returncode}: {tail}")
    return wall, json.loads(proc.stdout.strip().splitlines()[-1])


def _child_main(argv):
    """Entry point of a child process (not for direct use): ``mode`` then its arguments."""
    mode, rest = argv[0], argv[1:]
    if mode == "run":
        facts = _child_run(rest[0], jobs=int(rest[1]))
    elif mode == "script":
        facts = _child_script(*rest)
    elif mode == "scale":
        facts = _child_scale(rest[0], jobs=int(rest[1]), repeats=int(rest[2]))
    elif mode == "compare":
        facts = _child_compare(rest[0], gain_db=float(rest[1]), rel=rest[2])
    else:
        print(f"bench: unknown child mode {mode!r}", file=sys.stderr)
        return 2
    print(json.dumps(facts))
    return 0


def _maxrss_kib():
    """``resource.getrusage`` peak RSS of this process, KiB."""
    import resource

    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss // 1024 if sys.platform == "darwin" else rss  # bytes on macOS, KiB elsewhere


def _peak_rss_kib():
    """Peak resident memory of this process's own address space, KiB.

    ``VmHWM`` of ``/proc/self/status`` where there is one, else :func:`_maxrss_kib`.
    On Linux ``ru_maxrss`` of a process started by :mod:`subprocess` is at
    least its parent's peak (exec keeps the high-water mark of the address
    space it replaces, and with vfork that is the parent's): measured here, a
    child of a parent holding 500 MB reported 526 MB of ru_maxrss and 11 MB
    of VmHWM.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        pass
    return _maxrss_kib()


def _child_run(job_path, *, jobs):
    """``render run JOB --jobs N --quiet`` in this process (as the command runs it: :func:`render.cli.entry`),
    timing run_plan and noting peak RSS."""
    from . import batch, cli

    facts = {}
    original = batch.run_plan

    def timed(plan, **kwargs):
        facts["plan_rss_kib"] = _peak_rss_kib()
        t0 = time.perf_counter()
        try:
            return original(plan, **kwargs)
        finally:
            facts["render_s"] = time.perf_counter() - t0

    batch.run_plan = timed  # the CLI imports run_plan when it runs, so it finds this one
    try:
        t0 = time.perf_counter()
        code = cli.entry(["run", str(job_path), "--jobs", str(jobs), "--quiet"])
        facts["main_s"] = time.perf_counter() - t0
    finally:
        batch.run_plan = original
    if code != 0:
        raise RenderError(f"bench: render run {job_path} exited with {code}")
    if "render_s" not in facts:
        raise RenderError("bench: render run did not go through render.batch.run_plan: cannot time the render")
    facts["rss_kib"] = _peak_rss_kib()
    facts["ru_maxrss_kib"] = _maxrss_kib()
    return facts


def _child_scale(job_path, *, jobs, repeats):
    """run_plan of one plan with --jobs 1 and --jobs N in turn (imports and synthesis once, before)."""
    from .batch import run_plan
    from .job import load_job
    from .plan import plan_job

    plan = plan_job(load_job(job_path))
    times = {"1": [], "n": []}
    for _ in range(repeats):
        for key, n in (("1", 1), ("n", jobs)):
            shutil.rmtree(plan.job.output_dir, ignore_errors=True)
            t0 = time.perf_counter()
            result = run_plan(plan, jobs=n, quiet=True)
            times[key].append(time.perf_counter() - t0)
            if result.failed or result.rendered != len(plan.tasks):
                raise RenderError(f"bench: --jobs {n}: {result.rendered} of {len(plan.tasks)} files rendered")
    return times


def _child_script(src, ir_path, out_dir, dump, wet_db, dry_db, target_lufs, ceiling_dbtp):
    """The script baseline (its imports included); then, timed apart, the unit-gain mix saved for the comparison."""
    t0 = time.perf_counter()
    import numpy as np
    import pyloudnorm
    import scipy.signal
    import soundfile as sf

    from .units import db_to_gain, gain_to_db

    x, rate_hz = sf.read(src, dtype="float64", always_2d=True)
    ir, _ = sf.read(ir_path, dtype="float64", always_2d=True)
    wet = scipy.signal.fftconvolve(x, ir * db_to_gain(float(wet_db)), axes=0)
    mix = wet.copy()
    mix[: x.shape[0]] += x * db_to_gain(float(dry_db))
    lufs = pyloudnorm.Meter(rate_hz, filter_class="DeMan").integrated_loudness(mix)
    peak = max(float(np.max(np.abs(scipy.signal.resample_poly(mix[:, c], 4, 1)))) for c in range(mix.shape[1]))
    peak_dbtp = gain_to_db(max(peak, float(np.max(np.abs(mix)))))
    gain_db = min(float(target_lufs) - lufs, float(ceiling_dbtp) - peak_dbtp)
    g = db_to_gain(gain_db)
    dry = np.zeros_like(wet)
    dry[: x.shape[0]] = x * db_to_gain(float(dry_db))
    for stem, y in (("mix", mix), ("wet", wet), ("dry", dry)):
        sf.write(str(Path(out_dir) / f"{stem}.wav"), y * g, rate_hz, subtype=SUBTYPE)
    script_s = time.perf_counter() - t0
    if dump != "-":
        np.save(dump, mix)
    dump_s = time.perf_counter() - t0 - script_s
    return {"script_s": script_s, "dump_s": dump_s, "lufs": float(lufs), "true_peak_dbtp": peak_dbtp,
            "gain_db": gain_db}


def _child_compare(job_path, *, gain_db, rel):
    """Our render of the job's first source, mix stem only, DOUBLE (no dither), fixed gain, no limiter."""
    import dataclasses

    from .audio_io import wav_container
    from .job import load_job
    from .plan import plan_job
    from .renderer import render_task

    plan = plan_job(load_job(job_path))
    task = plan.tasks[0]
    container = wav_container(frames=task.frames_out, channels=task.channels_out, subtype="DOUBLE")
    task = dataclasses.replace(task, subtype="DOUBLE", format=container, outputs=(("mix", rel),))
    facts = render_task(task, output_dir=plan.job.output_dir, gain_db=gain_db, limit=None)
    return {"path": str(plan.job.output_dir / rel), "frames": facts["stems"]["mix"]["frames"]}


# -- measurements in this process --------------------------------------------------------------


def _bare_fft_s(*, fft_size, blocks, channels, spectrum):
    """Forward transforms, spectral products and inverse transforms: the plan's FFT work."""
    import numpy as np
    import scipy.fft

    x = np.random.default_rng(0).standard_normal((channels, fft_size))
    t0 = time.perf_counter()
    for _ in range(blocks):
        y = scipy.fft.rfft(x, axis=-1, workers=1)
        if y.shape == spectrum.shape:
            np.multiply(y, spectrum, out=y)
        else:  # a mono source through a multichannel response
            y = y * spectrum
        scipy.fft.irfft(y, fft_size, axis=-1, workers=1)
    return time.perf_counter() - t0


def _bare_io_s(src, folder, *, block_frames, frames_out):
    """soundfile reading the source in blocks and writing three stems of ``frames_out`` frames."""
    import numpy as np
    import soundfile as sf

    folder.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    with sf.SoundFile(str(src)) as f:
        writers = [sf.SoundFile(str(folder / f"{i}.wav"), "w", f.samplerate, f.channels, SUBTYPE) for i in range(3)]
        written = 0
        for block in f.blocks(blocksize=block_frames, dtype="float64", always_2d=True):
            for w in writers:
                w.write(block)
            written += block.shape[0]
        while written < frames_out:
            pad = np.zeros((min(block_frames, frames_out - written), f.channels))
            for w in writers:
                w.write(pad)
            written += pad.shape[0]
        for w in writers:
            w.close()
    dt = time.perf_counter() - t0
    shutil.rmtree(folder)
    return dt


def _network_filters(room, *, rate_hz, channels):
    """(b, a) of every comb and allpass of the room's network, as render.synthesis designs it."""
    import numpy as np

    from . import network

    # The seed and arguments render.synthesis gives network.design_network (the same delays).
    rng = np.random.default_rng([room.seed, int(round(rate_hz)), channels, 0x5EED])
    design = network.design_network(
        rate_hz=rate_hz, channels=channels, mean_free_time_s=room.mean_free_path_m / room.speed_of_sound,
        decay_max_s=room.decay_max_s, diffusion=room.diffusion, spread=room.spread, rng=rng,
    )
    dc_s, nyquist_s = (float(v) for v in room.decay_at(np.array([0.0, rate_hz / 2.0])))
    nets = []
    for delays, signs, ap_delays in zip(design.comb_delays, design.comb_signs, design.allpass_delays):
        combs = []
        for k, sign in zip(delays, signs):
            p, g = network.one_pole_fit(k, rate_hz=rate_hz, decay_dc_s=dc_s, decay_nyquist_s=nyquist_s)
            if p >= 0.0:
                feedback, damping = g / (1.0 - p), p
            else:  # more decay at high frequencies than at DC: a plain comb of the same delay
                feedback, damping = network.loop_gain(k, rate_hz=rate_hz, decay_s=room.decay_mid_s), 0.0
            b, a = network.damped_comb_ba(k, feedback=feedback, damping=damping)
            combs.append((b, a, sign * math.sqrt(1.0 - feedback**2) / math.sqrt(len(delays))))
        allpasses = []
        for m in ap_delays:
            b = np.zeros(m + 1)
            b[0], b[m] = -design.allpass_gain, 1.0
            a = np.zeros(m + 1)
            a[0], a[m] = 1.0, -design.allpass_gain
            allpasses.append((b, a))
        nets.append((combs, allpasses))
    return nets, design.mix


def _time_domain_s(excerpt, *, nets, mix):
    """The comb/allpass network on ``excerpt`` (frames, channels) with scipy.signal.lfilter."""
    import numpy as np
    import scipy.signal

    t0 = time.perf_counter()
    out = np.zeros((excerpt.shape[0], mix.shape[0]))
    for c in range(mix.shape[0]):
        x = excerpt[:, c if excerpt.shape[1] > 1 else 0]
        for j, (combs, allpasses) in enumerate(nets):
            if mix[c, j] == 0.0:
                continue
            y = np.zeros_like(x)
            for b, a, weight in combs:
                y += weight * scipy.signal.lfilter(b, a, x)
            for b, a in allpasses:
                y = scipy.signal.lfilter(b, a, y)
            out[:, c] += mix[c, j] * y
    return time.perf_counter() - t0


# -- the run ---------------------------------------------------------------------------------


def _machine():
    import numpy
    import scipy

    cpu = None
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as f:
            for line in f:
                if line.lower().startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    try:
        import soundfile

        sf_version = soundfile.__version__
    except (ImportError, AttributeError):
        sf_version = None
    return {
        "platform": platform.platform(),
        "machine": platform.machine(),
        "cpu_model": cpu or platform.processor() or None,
        "cores": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "soundfile": sf_version,
        "load_average_start": list(os.getloadavg()) if hasattr(os, "getloadavg") else None,
    }


def _ratio(name, value):
    op, threshold, text = GOALS[name]
    met = value <= threshold if op == "<=" else value >= threshold
    return {"value": value, "goal": f"{op} {threshold:g}", "text": text, "met": bool(met)}


class _Log:
    def __init__(self, quiet):
        self.quiet = quiet
        self.t0 = time.perf_counter()

    def __call__(self, message):
        if not self.quiet:
            print(f"bench [{time.perf_counter() - self.t0:6.1f} s]: {message}", file=sys.stderr, flush=True)


def run_bench(*, minutes, json_path=None, jobs=None, quiet=False, repeats=3):
    """Measure the renderer against its limit and the baselines (see the module docstring).

    Parameters
    ----------
    minutes : float
        Length of the main stereo material in minutes, > 0 (it also sizes the
        memory runs, the time-domain excerpt and the scaling folder).
    json_path : str or Path, optional
        Where to write the results as JSON (UTF-8).
    jobs : int, optional
        N of the ``--jobs 1`` vs ``--jobs N`` scaling run, >= 1; default
        ``os.cpu_count()``.
    quiet : bool
        No progress lines on stderr.
    repeats : int
        Repeats of each timed figure, >= 1 (default 3; the long memory run is
        made once).  Fewer only to keep tests short.

    Returns
    -------
    dict
        ``machine``, ``settings``, ``figures`` (section -> name -> number:
        durations in s, speeds in × real time, memory in MB of 10**6 bytes;
        names ending in ``_db``, ``_dbfs``, ``_dbtp``, ``_lufs`` or ``_lu``
        are levels and may be negative or zero, every other figure is
        positive), ``ratios`` (name -> ``value``, ``goal``, ``text``,
        ``met``: True, False, or None where no goal applies), ``details``
        (the repeats, plan sizes, what each figure includes), ``spreads``,
        ``warnings`` (list of str) and ``run_s``.

    Raises
    ------
    ParameterError
        An argument out of range (before any work).
    OutputError
        ``json_path`` lies in a folder that does not exist (checked before any
        work) or cannot be written.
    RenderError
        A measured run failed.
    """
    if isinstance(minutes, bool) or not isinstance(minutes, (int, float)) or not math.isfinite(minutes) \
            or minutes <= 0:
        raise ParameterError(f"minutes = {minutes!r}: must be a number > 0")
    cores = os.cpu_count() or 1
    n_jobs = cores if jobs is None else jobs
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, int) or n_jobs < 1:
        raise ParameterError(f"jobs = {jobs!r}: must be an integer >= 1")
    if isinstance(repeats, bool) or not isinstance(repeats, int) or repeats < 1:
        raise ParameterError(f"repeats = {repeats!r}: must be an integer >= 1")
    if json_path is not None and not Path(json_path).resolve().parent.is_dir():
        raise OutputError(f"json_path = {str(json_path)!r}: its folder does not exist")
    minutes = float(minutes)
    log = _Log(quiet)
    started = time.perf_counter()
    machine = _machine()
    with tempfile.TemporaryDirectory(prefix="render-bench-") as tmp:
        results = _measure(Path(tmp), minutes=minutes, n_jobs=n_jobs, repeats=repeats, log=log)
    results["machine"] = machine
    results["machine"]["load_average_end"] = list(os.getloadavg()) if hasattr(os, "getloadavg") else None
    results["run_s"] = time.perf_counter() - started
    if json_path is not None:
        try:
            Path(json_path).write_text(json.dumps(results, indent=2) + "\n", encoding="utf-8")
        except OSError as e:
            raise OutputError(f"json_path = {str(json_path)!r}: cannot write the results ({e.strerror or e})") from None
    log(f"done in {results['run_s']:.1f} s")
    return results


def _median(values):
    return float(statistics.median(values))


class _Run:
    """What the sections of one bench run share: settings, the material, repeat spreads, details."""

    def __init__(self, root, *, minutes, n_jobs, repeats, log):
        self.root, self.minutes, self.n_jobs, self.repeats, self.log = root, minutes, n_jobs, repeats, log
        self.seconds = minutes * 60.0
        self.spreads = {}
        self.details = {}
        # Set by _measure and the end-to-end section, read by the later sections.
        self.job = self.src = self.frames = None
        self.entry = self.ir_path = self.frames_out = self.ir_channels = self.e2e_rss = None
        self.caches = 0  # response cache folders handed out by cold_cache()

    @property
    def warm_cache(self):
        """The response cache the first end-to-end run filled (shared by the later runs)."""
        return self.root / "cache-0"

    def cold_cache(self):
        """A response cache folder no run has used yet (the first one becomes :attr:`warm_cache`)."""
        self.caches += 1
        return self.root / f"cache-{self.caches - 1}"

    def timed(self, label, values):
        """Note the spread of repeated timings under ``label``; return their median."""
        self.spreads[label] = repeat_spread(values)
        return _median(values)


def _measure(root, *, minutes, n_jobs, repeats, log):
    run = _Run(root, minutes=minutes, n_jobs=n_jobs, repeats=repeats, log=log)
    main = root / "main"
    (main / "in").mkdir(parents=True)
    run.job = _write_job(main)
    run.src = main / "in" / "speech.wav"
    log(f"writing {minutes:g} min of stereo material")
    run.frames = _write_speechlike(run.src, seconds=run.seconds, channels=2, seed=1)
    figures = {}
    figures["end_to_end"] = _section_end_to_end(run)  # first: its room file feeds the others
    figures["limit"] = _section_limit(run)
    figures["script"] = _section_script(run)
    figures["time_domain"] = _section_time_domain(run)
    figures["memory"] = _section_memory(run)
    figures["scaling"] = _section_scaling(run)
    return {
        "settings": {
            "minutes": minutes, "repeats": repeats, "jobs": n_jobs, "rate_hz": RATE_HZ, "subtype": SUBTYPE,
            "room": {"decay_s": ROOM_DECAY_S, "size_m": list(ROOM_SIZE_M)},
            "material": "speech-like noise bursts with a plosive-like peak every 2 s, generated here",
            "speed_unit": "source seconds per wall second (x real time)",
        },
        "figures": {k: figures[k] for k in ("limit", "end_to_end", "script", "time_domain", "memory", "scaling")},
        "ratios": _ratios(figures, n_jobs=n_jobs),
        "details": run.details,
        "spreads": run.spreads,
        "warnings": [
            f"noisy machine: {name} repeats spread {100 * s:.0f} % (max - min) / median, above "
            f"{100 * NOISY_SPREAD:.0f} %"
            for name, s in run.spreads.items()
            if s > NOISY_SPREAD
        ],
    }


def _section_end_to_end(run):
    """2. ``render run --jobs 1`` of the delivery job, ``repeats`` times, each in a fresh process."""
    out = run.job.parent / "out"
    runs = []
    for i in range(run.repeats):
        run.log(f"end to end {i + 1}/{run.repeats}, room synthesised (empty response cache)")
        shutil.rmtree(out, ignore_errors=True)
        runs.append(_spawn("run", run.job, 1, cache_dir=run.cold_cache()))
    warm = []
    for i in range(run.repeats):
        run.log(f"end to end {i + 1}/{run.repeats}, room from the response cache")
        shutil.rmtree(out, ignore_errors=True)
        warm.append(_spawn("run", run.job, 1, cache_dir=run.warm_cache))
    manifest = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    run.entry = manifest["sources"][0]
    run.ir_path = run.root / "hall.ir.wav"
    shutil.copyfile(out / manifest["rooms"][0]["path"], run.ir_path)
    run.frames_out = run.entry["stems"]["mix"]["frames"]
    run.e2e_rss = [(f["rss_kib"], f["plan_rss_kib"], f["ru_maxrss_kib"]) for _, f in runs]
    loud = run.entry["loudness"]
    wall_s = [w for w, _ in runs]
    render_s = [f["render_s"] for _, f in runs]
    run.details["end_to_end"] = {
        "includes": "render run --jobs 1 --quiet in a fresh process: interpreter start, imports, job, planning "
        "with room synthesis, measure pass, gain, render pass with limiter and dither, 3 PCM_24 stems with "
        "fsync, hashes, manifest",
        "render_includes": "run_plan after planning: both passes, metering, limiter, dither, writing, the room "
        "file, hashes, manifest (no synthesis)",
        "wall_s": wall_s, "render_s": render_s, "in_process_s": [f["main_s"] for _, f in runs],
        "warm_includes": "the same, with the room's response read from the response cache (filled by the "
        "first run above) instead of synthesised",
        "warm_wall_s": [w for w, _ in warm], "warm_render_s": [f["render_s"] for _, f in warm],
        "gain_db": loud["gain_db"], "limiter_reduction_db": loud["limiter_reduction_db"],
        "before": loud["before"], "after": loud["after"], "met": loud["met"],
        "frames": run.frames, "frames_out": run.frames_out,
    }
    wall, render = run.timed("end to end", wall_s), run.timed("render alone", render_s)
    warm_wall = run.timed("end to end, cached room", [w for w, _ in warm])
    return {
        "wall_s": wall,
        "x_realtime": run.seconds / wall,
        "render_s": render,
        "render_x_realtime": run.seconds / render,
        "plan_s": _median([f["main_s"] - f["render_s"] for _, f in runs]),
        "startup_s": _median([w - f["main_s"] for w, f in runs]),
        "warm_wall_s": warm_wall,
        "warm_x_realtime": run.seconds / warm_wall,
        "warm_plan_s": _median([f["main_s"] - f["render_s"] for _, f in warm]),
    }


def _section_limit(run):
    """1. Bare FFT work of one convolution pass, and bare I/O."""
    import numpy as np
    import scipy.fft
    import soundfile as sf

    from .convolve import choose_fft_size, whole_fft_size

    ir, _ = sf.read(str(run.ir_path), dtype="float64", always_2d=True)
    ir_frames, run.ir_channels = ir.shape
    # What the renderer chooses (render.renderer.whole_size_for): one transform for a short source,
    # else overlap-save at convolve.choose_fft_size.
    whole = whole_fft_size(ir_frames, input_frames=run.frames)
    fft_size = whole or choose_fft_size(ir_frames)
    block_frames = run.frames if whole else fft_size - ir_frames + 1
    blocks = 1 if whole else -(-(run.frames + ir_frames - 1) // block_frames)
    spectrum = scipy.fft.rfft(np.ascontiguousarray(ir.T), n=fft_size, axis=-1, workers=1)
    fft_s, io_s = [], []
    for i in range(run.repeats):
        run.log(f"limit {i + 1}/{run.repeats}: {blocks} transforms of {fft_size}, bare I/O")
        fft_s.append(_bare_fft_s(fft_size=fft_size, blocks=blocks, channels=2, spectrum=spectrum))
        io_s.append(_bare_io_s(run.src, run.root / "io", block_frames=block_frames, frames_out=run.frames_out))
    run.details["limit"] = {
        "includes": "scipy.fft rfft, product with the kernel spectrum and irfft at fft_size for every block of "
        "one convolution pass (2 channels, workers=1); soundfile reading the source in blocks and writing "
        "3 PCM_24 stems of the output's length (no fsync)",
        "fft_size": fft_size, "block_frames": block_frames, "blocks": blocks, "ir_frames": ir_frames,
        "fft_s": fft_s, "io_s": io_s,
    }
    fft, io = run.timed("bare FFT", fft_s), run.timed("bare I/O", io_s)
    return {"fft_s": fft, "io_s": io, "total_s": fft + io, "x_realtime": run.seconds / (fft + io)}


def _section_script(run):
    """3. The script baseline, and its mix against ours at the same gain."""
    import numpy as np
    import soundfile as sf

    from .units import db_to_gain, gain_to_db

    out = run.root / "script"
    out.mkdir()
    dump = run.root / "script_mix.npy"
    script = []
    for i in range(run.repeats):
        run.log(f"script baseline {i + 1}/{run.repeats}")
        wall, facts = _spawn("script", run.src, run.ir_path, out, dump if i == 0 else "-", run.entry["wet_db"],
                             run.entry["dry_db"], -23.0, -1.0, cache_dir=run.warm_cache)
        script.append((wall - facts["dump_s"], facts))
    shutil.rmtree(out)
    run.log("our DOUBLE render at the same gain, for the difference")
    loud = run.entry["loudness"]
    gain_db = float(loud["gain_db"])
    _, cmp = _spawn("compare", run.job, gain_db, "compare/speech.mix.wav", cache_dir=run.warm_cache)
    ours, _ = sf.read(cmp["path"], dtype="float64", always_2d=True)
    theirs = np.load(dump) * db_to_gain(gain_db)
    if ours.shape != theirs.shape:
        raise RenderError(f"bench: our mix has shape {ours.shape}, the script's {theirs.shape}: expected the same")
    max_abs = float(np.max(np.abs(ours - theirs)))
    del ours, theirs
    dump.unlink()
    script_s = [w for w, _ in script]
    first = script[0][1]
    run.details["script"] = {
        "includes": "a fresh process, like ours: interpreter start, imports (numpy, scipy.signal, soundfile, "
        "pyloudnorm), reading, convolution, loudness, true peak, gain, 3 PCM_24 stems written (no fsync); "
        "saving its mix for the comparison is not counted",
        "wall_s": script_s, "in_process_s": [f["script_s"] for _, f in script],
        "lufs": first["lufs"], "true_peak_dbtp": first["true_peak_dbtp"], "gain_db": first["gain_db"],
        "gain_rule": "target - integrated loudness, lowered so that true peak + gain <= ceiling (no limiter)",
        "compared": "the script's unit-gain mix times our gain against our render of the same job at that "
        "gain (DOUBLE, no limiter, no dither), every frame and channel of the output",
        "our_lufs_before_gain": loud["before"]["integrated_lufs"],
        "loudness_diff": "pyloudnorm against our meter on the unit-gain mix (ours as the manifest rounds it, "
        "to 4 decimals)",
    }
    wall = run.timed("script baseline", script_s)
    return {
        "wall_s": wall,
        "x_realtime": run.seconds / wall,
        "max_abs_diff": max_abs,
        "max_diff_dbfs": gain_to_db(max_abs),
        "loudness_diff_lu": abs(first["lufs"] - loud["before"]["integrated_lufs"]),
    }


def _section_time_domain(run):
    """4. The comb/allpass network with lfilter on an excerpt, scaled to the output's length."""
    import soundfile as sf

    excerpt_s = min(EXCERPT_MAX_S, run.seconds, max(0.25, run.minutes / 2.0))
    excerpt, _ = sf.read(str(run.src), frames=int(round(excerpt_s * RATE_HZ)), dtype="float64", always_2d=True)
    nets, mix = _network_filters(_room(), rate_hz=float(RATE_HZ), channels=run.ir_channels)
    td = []
    for i in range(run.repeats):
        run.log(f"time-domain baseline {i + 1}/{run.repeats} ({excerpt_s:g} s excerpt)")
        td.append(_time_domain_s(excerpt, nets=nets, mix=mix))
    scale = run.frames_out / excerpt.shape[0]
    run.details["time_domain"] = {
        "includes": "scipy.signal.lfilter of every comb (network.damped_comb_ba) and allpass of the room's "
        "network, per output channel and network; no early reflections, no I/O; scaled by output frames / "
        "excerpt frames",
        "excerpt_wall_s": td, "combs": sum(len(c) for c, _ in nets), "allpasses": sum(len(a) for _, a in nets),
        "networks": len(nets), "scale": scale,
    }
    wall = run.timed("time-domain baseline", td)
    return {
        "excerpt_s": excerpt.shape[0] / RATE_HZ,
        "excerpt_wall_s": wall,
        "scaled_s": wall * scale,
        "x_realtime": run.seconds / (wall * scale),
    }


def _section_memory(run):
    """5. Peak RSS of render run --jobs 1 on a short and a long stereo file (the main one reused)."""
    sizes = (run.minutes, LONG_FACTOR * run.minutes) if run.minutes < MEMORY_FULL_MINUTES[0] else MEMORY_FULL_MINUTES
    runs = {}
    for size in sizes:
        if size == run.minutes:
            runs[f"{size:g}"] = run.e2e_rss
            continue
        folder = run.root / f"mem{size:g}"
        (folder / "in").mkdir(parents=True)
        job = _write_job(folder)
        run.log(f"memory: writing {size:g} min of stereo material")
        _write_speechlike(folder / "in" / "speech.wav", seconds=size * 60.0, channels=2, seed=2)
        run.log(f"memory: render run of {size:g} min")
        _, facts = _spawn("run", job, 1, cache_dir=run.cold_cache())  # synthesis included: the peak
        runs[f"{size:g}"] = [(facts["rss_kib"], facts["plan_rss_kib"], facts["ru_maxrss_kib"])]
        shutil.rmtree(folder)
    run.details["memory"] = {
        "includes": "peak RSS of the render run --jobs 1 process (the worker): VmHWM of /proc/self/status "
        "(ru_maxrss where there is no /proc) after planning with synthesis (plan_rss) and at the end; "
        "MB = 10**6 bytes. ru_maxrss is recorded too: on Linux it also counts the bench process's own peak",
        "sizes_minutes": list(sizes),
        "runs_kib": {k: [{"rss": r, "plan_rss": p, "ru_maxrss": m} for r, p, m in v] for k, v in runs.items()},
        "rule": f"minutes and {LONG_FACTOR} x minutes below {MEMORY_FULL_MINUTES[0]:g} minutes, else "
        f"{MEMORY_FULL_MINUTES[0]:g} and {MEMORY_FULL_MINUTES[1]:g}",
    }
    short, long = (runs[f"{size:g}"] for size in sizes)
    mb = 1024 / 1e6  # from KiB
    return {
        "short_minutes": sizes[0],
        "long_minutes": sizes[1],
        "short_rss_mb": _median([r for r, _, _ in short]) * mb,
        "long_rss_mb": _median([r for r, _, _ in long]) * mb,
        "short_plan_rss_mb": _median([p for _, p, _ in short]) * mb,
        "long_plan_rss_mb": _median([p for _, p, _ in long]) * mb,
    }


def _section_scaling(run):
    """6. run_plan with --jobs 1 and --jobs N on a folder of short mono and stereo files."""
    farm = run.root / "farm"
    (farm / "in").mkdir(parents=True)
    job = _write_job(farm, stereo_out=True)  # one room synthesis, not two
    n_files = max(8, 4 * run.n_jobs)
    file_s = min(10.0, max(1.0, run.seconds / 16.0))
    for i in range(n_files):
        _write_speechlike(farm / "in" / f"take{i:02d}.wav", seconds=file_s, channels=1 + i % 2, seed=10 + i)
    audio_s = n_files * file_s
    run.log(f"scaling: --jobs 1 and --jobs {run.n_jobs} on {n_files} files, {run.repeats} times each")
    _, runs = _spawn("scale", job, run.n_jobs, run.repeats, cache_dir=run.warm_cache)
    run.details["scaling"] = {
        "includes": "run_plan (what render run does after planning: both passes of every file, the room file, "
        "the manifest) with --jobs 1 and --jobs N in turn, in one process that planned the job once; a pool "
        "of N forked workers for N > 1",
        "files": n_files, "file_s": file_s, "channels": "alternately mono and stereo sources, rendered in stereo",
        "jobs_1_s": runs["1"], "jobs_n_s": runs["n"],
    }
    one, many = run.timed("--jobs 1", runs["1"]), run.timed(f"--jobs {run.n_jobs}", runs["n"])
    return {
        "files": n_files,
        "audio_s": audio_s,
        "jobs": run.n_jobs,
        "jobs_1_s": one,
        "jobs_n_s": many,
        "jobs_1_x_realtime": audio_s / one,
        "jobs_n_x_realtime": audio_s / many,
    }


def _ratios(f, *, n_jobs):
    lim, e2e, scr, td, mem, sc = (f[k] for k in ("limit", "end_to_end", "script", "time_domain", "memory", "scaling"))

    def info(value, text):
        return {"value": value, "goal": None, "text": text, "met": None}

    ratios = {
        "end_to_end_over_limit": _ratio("end_to_end_over_limit", e2e["wall_s"] / lim["total_s"]),
        "render_over_limit": info(e2e["render_s"] / lim["total_s"], "render alone (no synthesis) / limit"),
        "end_to_end_warm_over_limit": info(e2e["warm_wall_s"] / lim["total_s"],
                                           "end to end with the room from the response cache / limit"),
        "script_over_ours": _ratio("script_over_ours", scr["wall_s"] / e2e["wall_s"]),
        "script_over_ours_warm": info(scr["wall_s"] / e2e["warm_wall_s"], "script / ours (cached room)"),
        "script_over_render": info(scr["wall_s"] / e2e["render_s"], "script / our render alone"),
        "max_diff_dbfs": _ratio("max_diff_dbfs", scr["max_diff_dbfs"]),
        "time_domain_over_ours": _ratio("time_domain_over_ours", td["scaled_s"] / e2e["wall_s"]),
        "time_domain_over_ours_warm": info(td["scaled_s"] / e2e["warm_wall_s"], "time-domain / ours (cached room)"),
        "time_domain_over_render": info(td["scaled_s"] / e2e["render_s"], "time-domain / our render alone"),
        "rss_long_over_short": _ratio("rss_long_over_short", mem["long_rss_mb"] / mem["short_rss_mb"]),
        "long_rss_mb": _ratio("long_rss_mb", mem["long_rss_mb"]),
        "jobs_n_over_jobs_1": _ratio("jobs_n_over_jobs_1", sc["jobs_1_s"] / sc["jobs_n_s"]),
    }
    if not (n_jobs == 2 and os.cpu_count() == 2):
        ratios["jobs_n_over_jobs_1"]["met"] = None  # the goal is stated for --jobs 2 on 2 cores
    return ratios


# -- report ----------------------------------------------------------------------------------


def _goal_text(ratio):
    if ratio["goal"] is None:
        return ""
    mark = {True: "met", False: "NOT met", None: "n/a here"}[ratio["met"]]
    return f"goal {ratio['goal']} ({mark})"


def _load_text(machine):
    start, end = machine.get("load_average_start"), machine.get("load_average_end")
    if not start or not end:
        return ""
    return f"; load average {start[0]:.2f} at the start, {end[0]:.2f} at the end"


def format_bench(results):
    """The results of :func:`run_bench` as a plain-text table.

    Parameters
    ----------
    results : dict
        As returned by :func:`run_bench` (or read back from its JSON).

    Returns
    -------
    str
        Lines without a trailing newline: the machine, one line per figure
        (seconds and × real time), the ratios with their goals, and any warnings.
    """
    m, s, f, r = results["machine"], results["settings"], results["figures"], results["ratios"]
    lim, e2e, scr, td, mem, sc = (f[k] for k in ("limit", "end_to_end", "script", "time_domain", "memory", "scaling"))
    lines = [
        f"render bench: {s['minutes']:g} min stereo {s['rate_hz'] // 1000} kHz {s['subtype']}, room "
        f"{s['room']['decay_s']:g} s decay, median of {s['repeats']} repeats; speed = {s['speed_unit']}",
        f"machine: {m['cpu_model']}, {m['cores']} cores, {m['platform']}; Python {m['python']}, numpy "
        f"{m['numpy']}, scipy {m['scipy']}" + _load_text(m),
        "",
        f"{'figure':58s} {'seconds':>9s} {'x real time':>12s}",
    ]

    def row(label, sec, speed=None):
        lines.append(f"{label:58s} {sec:9.2f} {'' if speed is None else f'{speed:12.1f}'}".rstrip())

    row("1. limit: bare FFT work + bare I/O", lim["total_s"], lim["x_realtime"])
    d = results["details"]["limit"]
    row(f"   bare FFT ({d['blocks']} x rfft/product/irfft of {d['fft_size']})", lim["fft_s"],
        s["minutes"] * 60 / lim["fft_s"])
    row("   bare I/O (read source, write 3 stems)", lim["io_s"], s["minutes"] * 60 / lim["io_s"])
    row("2. end to end: render run --jobs 1 (all included)", e2e["wall_s"], e2e["x_realtime"])
    row("   render alone (after planning and synthesis)", e2e["render_s"], e2e["render_x_realtime"])
    row("   job and planning with room synthesis", e2e["plan_s"])
    row("   interpreter start and imports", e2e["startup_s"])
    row("   end to end, room from the response cache", e2e["warm_wall_s"], e2e["warm_x_realtime"])
    row("3. script baseline (soundfile, fftconvolve, pyloudnorm)", scr["wall_s"], scr["x_realtime"])
    row(f"4. time-domain baseline (lfilter, {td['excerpt_s']:g} s excerpt scaled)", td["scaled_s"],
        td["x_realtime"])
    lines.append(f"5. peak RSS: {mem['short_minutes']:g} min {mem['short_rss_mb']:.0f} MB, {mem['long_minutes']:g} min "
                 f"{mem['long_rss_mb']:.0f} MB (after planning: {mem['short_plan_rss_mb']:.0f} / "
                 f"{mem['long_plan_rss_mb']:.0f} MB)")
    row(f"6. --jobs 1, {sc['files']:g} files of {sc['audio_s'] / sc['files']:g} s (after planning)", sc["jobs_1_s"],
        sc["jobs_1_x_realtime"])
    row(f"   --jobs {sc['jobs']:g}", sc["jobs_n_s"], sc["jobs_n_x_realtime"])
    lines += ["", f"{'ratio':44s} {'value':>10s}  goal"]
    labels = [
        ("end_to_end_over_limit", "end to end / limit", "{:.2f}"),
        ("render_over_limit", "render alone / limit", "{:.2f}"),
        ("end_to_end_warm_over_limit", "end to end, cached room / limit", "{:.2f}"),
        ("script_over_ours", "script / ours (end to end)", "{:.2f}"),
        ("script_over_ours_warm", "script / ours (end to end, cached room)", "{:.2f}"),
        ("script_over_render", "script / ours (render alone)", "{:.2f}"),
        ("max_diff_dbfs", "max |script mix - ours| before dither, dBFS", "{:.1f}"),
        ("time_domain_over_ours", "time-domain / ours (end to end)", "{:.1f}"),
        ("time_domain_over_ours_warm", "time-domain / ours (end to end, cached room)", "{:.1f}"),
        ("time_domain_over_render", "time-domain / ours (render alone)", "{:.1f}"),
        ("rss_long_over_short", f"RSS {mem['long_minutes']:g} min / {mem['short_minutes']:g} min", "{:.3f}"),
        ("long_rss_mb", f"RSS {mem['long_minutes']:g} min, MB", "{:.0f}"),
        ("jobs_n_over_jobs_1", f"--jobs {sc['jobs']:g} / --jobs 1 throughput", "{:.2f}"),
    ]
    for key, label, fmt in labels:
        lines.append(f"{label:44s} {fmt.format(r[key]['value']):>10s}  {_goal_text(r[key])}".rstrip())
    lines.append("")
    lines.append(f"run time {results['run_s']:.1f} s")
    for w in results["warnings"]:
        lines.append(f"warning: {w}")
    return "\n".join(lines)
