"""Benchmark: throughput of --jobs 1, --jobs 2 and a 2-worker local Dask cluster on a folder.

Goals (issue "Beyond one machine"): on >= 40 short files, --jobs 2 on 2 cores
>= 1.7x the throughput of --jobs 1; a 2-worker LocalCluster within 15 % of the
process pool.  Prints figures measured in this run; asserts nothing.

    python benchmarks/bench_farm.py [--files 40] [--seconds 6]
"""

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

JOB = """
[job]
output = "out"
[rooms.room]
base = "home-office"
[[sources]]
files = ["in/*.wav"]
room = "room"
"""


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=40)
    parser.add_argument("--seconds", type=float, default=6.0)
    args = parser.parse_args()
    rng = np.random.default_rng(2)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        (root / "in").mkdir()
        for i in range(args.files):
            n = int(args.seconds * 48000)
            gate = (np.sin(2 * np.pi * 3 * np.arange(n) / 48000) > 0).astype(float)
            sf.write(str(root / "in" / f"f{i:03d}.wav"), rng.standard_normal((n, 2)) * 0.05 * gate[:, None],
                     48000, subtype="PCM_24")
        (root / "job.toml").write_text(JOB)
        audio_s = args.files * args.seconds
        results = {}
        for label, extra in (("--jobs 1", ["--jobs", "1"]), ("--jobs 2", ["--jobs", "2"]),
                             ("local Dask, 2 workers", ["--jobs", "2", "--scheduler", "local"])):
            shutil.rmtree(root / "out", ignore_errors=True)
            t0 = time.perf_counter()
            proc = subprocess.run([sys.executable, "-m", "render", "run", str(root / "job.toml"), "--quiet", *extra],
                                  capture_output=True, text=True)
            dt = time.perf_counter() - t0
            if proc.returncode != 0:
                print(f"{label}: failed ({proc.stderr.strip()[-200:]})")
                continue
            results[label] = dt
            print(f"{label:24s} {dt:7.2f} s  {audio_s / dt:6.1f}x real time")
        if "--jobs 1" in results and "--jobs 2" in results:
            print(f"--jobs 2 / --jobs 1 throughput: {results['--jobs 1'] / results['--jobs 2']:.2f} (goal >= 1.7)")
        if "--jobs 2" in results and "local Dask, 2 workers" in results:
            print(f"Dask / process pool time: {results['local Dask, 2 workers'] / results['--jobs 2']:.2f} "
                  "(goal <= 1.15)")


if __name__ == "__main__":
    main()
