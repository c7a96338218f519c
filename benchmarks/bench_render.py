"""Benchmark: the render of one source, against bare FFT work, and its peak memory.

Goals (issue "Batch renderer"): one worker renders a 4-minute stereo 48 kHz
24-bit file with a 2.5 s room and three stems at >= 150x real time end to
end; the convolution runs within 1.3x of bare scipy.fft transforms of the
same sizes; peak memory of a long file equals that of a short one
(<= 300 MB per worker).  Prints figures measured in this run; asserts nothing.

    python benchmarks/bench_render.py [--minutes 4] [--memory-minutes 10 60] [--repeats 3]
"""

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np
import scipy.fft
import soundfile as sf

JOB = """
[job]
output = "out"
[rooms.hall]
decay_s = 2.5
size_m = [20.0, 14.0, 8.0]
[[sources]]
files = ["in/in.wav"]
room = "hall"
"""


def make_source(path, minutes, *, rate=48000, channels=2, seed=1):
    """Speech-like noise bursts (invented material), written in pieces."""
    rng = np.random.default_rng(seed)
    frames = int(minutes * 60 * rate)
    with sf.SoundFile(str(path), "w", rate, channels, "PCM_24") as f:
        for start in range(0, frames, 10 * rate):
            n = min(10 * rate, frames - start)
            t = (start + np.arange(n)) / rate
            gate = (np.sin(2 * np.pi * 3.0 * t) > -0.2).astype(float)
            f.write(rng.standard_normal((n, channels)) * 0.05 * gate[:, None])
    return frames


RENDER_ONE = textwrap.dedent(
    """
    import json, resource, sys, time
    from render.job import load_job
    from render.plan import plan_job
    from render.renderer import render_task, kernel_for
    plan = plan_job(load_job(sys.argv[1]))
    task = plan.tasks[0]
    kernel_for(task)  # response synthesis is not part of the render's time
    t0 = time.perf_counter()
    render_task(task, output_dir=plan.job.output_dir)
    dt = time.perf_counter() - t0
    rss_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # before the extra measurements below
    k = kernel_for(task)
    import numpy as np
    from render import audio_io, convolve
    blocks = list(audio_io.read_blocks(task.source, block_frames=k.block_frames))
    t0 = time.perf_counter()
    state = convolve.initial_state(k, channels=task.info.channels)
    for b in blocks:
        _, state = convolve.convolve_block(b, state, kernel=k)
    convolve.flush(state, kernel=k)
    conv_s = time.perf_counter() - t0
    t0 = time.perf_counter()  # bare I/O: read the source, write three stems of the output's length
    writers = [audio_io.BlockWriter(str(plan.job.output_dir / f"io{i}.wav"), rate_hz=task.info.rate_hz,
               channels=task.channels_out, format=task.format, subtype=task.subtype) for i in range(3)]
    for b in audio_io.read_blocks(task.source, block_frames=k.block_frames):
        for w in writers:
            w.write(b)
    pad = np.zeros((task.frames_out - task.info.frames, task.channels_out))
    for w in writers:
        w.write(pad)
        w.commit()
    io_s = time.perf_counter() - t0
    print(json.dumps({"render_s": dt, "conv_s": conv_s, "io_s": io_s, "frames": task.info.frames, "rate": task.info.rate_hz,
                      "fft_size": k.fft_size, "block_frames": k.block_frames, "ir_frames": k.ir_frames,
                      "rss_kib": rss_kib}))
    """
)


def render_once(folder):
    out = subprocess.run([sys.executable, "-c", RENDER_ONE, str(folder / "job.toml")],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def bare_fft_s(fft_size, blocks, channels, repeats):
    x = np.random.default_rng(0).standard_normal((channels, fft_size))
    spec = scipy.fft.rfft(x, axis=-1, workers=1)
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        for _ in range(blocks):
            y = scipy.fft.rfft(x, axis=-1, workers=1)
            y *= spec
            scipy.fft.irfft(y, fft_size, axis=-1, workers=1)
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=4.0)
    parser.add_argument("--memory-minutes", type=float, nargs="*", default=[1.0, 10.0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "speed"
        (folder / "in").mkdir(parents=True)
        (folder / "job.toml").write_text(JOB)
        make_source(folder / "in" / "in.wav", args.minutes)
        runs = [render_once(folder) for _ in range(args.repeats)]
        r = runs[0]
        render_s = statistics.median(x["render_s"] for x in runs)
        audio_s = r["frames"] / r["rate"]
        blocks = -(-(r["frames"] + r["ir_frames"] - 1) // r["block_frames"])
        fft_s = bare_fft_s(r["fft_size"], blocks, 2, args.repeats)
        print(f"source: {args.minutes:g} min stereo 48 kHz PCM_24, room 2.5 s ({r['ir_frames']} frames), 3 stems")
        print(f"end to end: {render_s:.2f} s = {audio_s / render_s:.0f}x real time (goal >= 150x)")
        conv_s = statistics.median(x["conv_s"] for x in runs)
        io_s = statistics.median(x["io_s"] for x in runs)
        print(f"bare FFT work of the same plan (K = {r['fft_size']}, {blocks} blocks): {fft_s:.2f} s")
        print(f"convolution alone: {conv_s:.2f} s = {conv_s / fft_s:.2f} x bare FFT (goal <= 1.3)")
        print(f"bare I/O (read the source, write 3 stems): {io_s:.2f} s")
        limit = fft_s + io_s
        print(f"limit (bare FFT + bare I/O): {limit:.2f} s = {audio_s / limit:.0f}x real time; "
              f"end to end / limit = {render_s / limit:.2f}")
        for minutes in args.memory_minutes:
            mfolder = Path(tmp) / f"mem{minutes:g}"
            (mfolder / "in").mkdir(parents=True)
            (mfolder / "job.toml").write_text(JOB)
            make_source(mfolder / "in" / "in.wav", minutes)
            m = render_once(mfolder)
            print(f"peak RSS, {minutes:g} min stereo: {m['rss_kib'] / 1024:.0f} MB")
            for p in mfolder.rglob("*.wav"):
                p.unlink()


if __name__ == "__main__":
    main()
