"""Benchmark: throughput of --jobs 1, --jobs 2 and a 2-worker local Dask cluster on a folder.

Goals (issue "Beyond one machine"): on >= 40 short files, --jobs 2 on 2 cores
>= 1.7x the throughput of --jobs 1; a 2-worker LocalCluster within 15 % of the
process pool.  Prints figures measured in this run; asserts nothing.

The machine may be shared, so the configurations run alternately for
``--rounds`` rounds (the order reversed every other round) and the ratios are
taken within a round; the median over the rounds is the figure to quote.

Each run is ``render run JOB --quiet ...`` in a fresh interpreter (through
``entry()`` of :mod:`render.cli` (what the command runs), with timestamps taken around the batch's
phases by wrapping a few of :mod:`render.batch`'s functions in that process;
nothing is added to the product).  Per phase, in seconds from launching
that process:

* ``plan``: imports, probing and planning done;
* ``rooms``: the rooms written (responses stored for the workers);
* ``exec``: the executor (process pool or cluster) constructed;
* ``first``: the first task starting on each worker (from the manifest's
  ``render_s`` and the stems' modification times);
* ``last``: the last task finished; ``collected``: its result received;
* ``shut``: the executor shut down; ``exit``: the render process gone (the
  time reported); ``eof``: its output pipes closed, which also waits for
  helper processes that inherited them (a Dask run's forkserver).

``busy`` is the sum of the tasks' ``render_s`` (compute inside the workers),
``per task`` its mean, ``idle`` the workers' time between ``exec`` and
``last`` not spent in a task.

    python benchmarks/bench_farm.py [--files 40] [--seconds 6] [--rounds 3] [--no-single]
"""

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

JOB = """
[job]
output = "out"
[rooms.room]
base = "home-office"
[[sources]]
files = ["in/*.wav"]
room = "room"
"""

CONFIGS = {
    "--jobs 1": ["--jobs", "1"],
    "--jobs 2": ["--jobs", "2"],
    "Dask, 2 workers": ["--jobs", "2", "--scheduler", "local"],
}


def _child(phases_path, argv):
    """Run ``render`` with argv in this process, timestamping the batch's phases into phases_path."""
    import render.batch as batch
    from render.cli import entry

    stamps = {}

    def mark(name):
        stamps.setdefault(name, time.time())

    def wrap(module, name, after):
        inner = getattr(module, name)

        def timed(*args, **kwargs):
            result = inner(*args, **kwargs)
            mark(after)
            return result

        setattr(module, name, timed)

    import render.plan as plan_module

    wrap(plan_module, "plan_job", "plan")
    wrap(batch, "_write_rooms", "rooms")
    make_executor = batch._executor

    def executor(*args, **kwargs):
        ex = make_executor(*args, **kwargs)
        mark("exec")
        if ex is not None:
            shutdown = ex.shutdown

            def timed_shutdown(*a, **k):
                try:
                    return shutdown(*a, **k)
                finally:
                    mark("shut")

            ex.shutdown = timed_shutdown
        return ex

    batch._executor = executor
    step = batch._Progress.step

    def timed_step(self, **kwargs):
        stamps["collected"] = time.time()
        return step(self, **kwargs)

    batch._Progress.step = timed_step
    try:
        code = entry(argv)
    finally:
        Path(phases_path).write_text(json.dumps(stamps))
    return code


def _timeline(out_dir):
    """(start, end) wall-clock times of every rendered task, from the manifest and the stems' mtimes."""
    manifest = json.loads((out_dir / "manifest.json").read_text())
    spans = []
    for e in manifest["sources"]:
        if e["status"] != "rendered" or e.get("render_s") is None:
            continue
        end = max(os.stat(out_dir / s["path"]).st_mtime for s in e["stems"].values())
        spans.append((end - e["render_s"], end))
    return sorted(spans)


def _lanes(spans, workers):
    """Assign task spans to ``workers`` lanes (a task starts on the lane that became free first)."""
    lanes = [[] for _ in range(workers)]
    for span in spans:
        free = min(range(workers), key=lambda k: lanes[k][-1][1] if lanes[k] else float("-inf"))
        lanes[free].append(span)
    return [lane for lane in lanes if lane]


def _run(root, label, extra):
    shutil.rmtree(root / "out", ignore_errors=True)
    phases_path = root / "phases.json"
    argv = ["run", str(root / "job.toml"), "--quiet", *extra]
    t0 = time.time()
    env = dict(os.environ, RENDER_CACHE_DIR=str(root / "response-cache"))  # not the user's cache
    proc = subprocess.Popen([sys.executable, __file__, "--child", str(phases_path), *argv],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    output, closed = {}, {}

    def drain(name, stream):
        output[name] = stream.read()
        closed[name] = time.time()

    readers = [threading.Thread(target=drain, args=item) for item in (("out", proc.stdout), ("err", proc.stderr))]
    for r in readers:
        r.start()
    while proc.poll() is None:  # the render process's own exit, not its output's end
        time.sleep(0.002)
    t_exit = time.time()
    for r in readers:
        r.join()
    if proc.returncode != 0:
        print(f"{label}: failed ({output['err'].strip()[-300:]})")
        return None
    stamps = json.loads(phases_path.read_text())
    spans = _timeline(root / "out")
    workers = 1 if extra[1] == "1" else 2
    lanes = _lanes(spans, workers)
    busy = sum(b - a for a, b in spans)
    rel = {k: v - t0 for k, v in stamps.items()}
    rel["exit"] = t_exit - t0
    rel["eof"] = max(closed.values()) - t0
    rel["first"] = [lane[0][0] - t0 for lane in lanes]
    rel["last"] = max(b for _, b in spans) - t0
    rel["busy"] = busy
    rel["per_task"] = busy / len(spans)
    rel["idle"] = sum(lane[-1][1] - rel.get("exec", 0) - t0 - sum(b - a for a, b in lane) for lane in lanes)
    return rel


def _phase_line(p):
    first = "/".join(f"{v:.2f}" for v in p["first"])
    return (f"plan {p.get('plan', float('nan')):5.2f}  rooms {p.get('rooms', float('nan')):5.2f}  "
            f"exec {p.get('exec', float('nan')):5.2f}  first {first:11s}  last {p['last']:6.2f}  "
            f"collected {p.get('collected', float('nan')):6.2f}  shut {p.get('shut', float('nan')):6.2f}  "
            f"exit {p['exit']:6.2f}  eof {p['eof']:6.2f} | "
            f"busy {p['busy']:6.2f}  per task {p['per_task']:.3f}  idle {p['idle']:5.2f}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=40)
    parser.add_argument("--seconds", type=float, default=6.0)
    parser.add_argument("--rounds", type=int, default=3, help="alternating rounds (default 3)")
    parser.add_argument("--no-single", action="store_true", help="leave --jobs 1 out (pool against Dask only)")
    args = parser.parse_args()
    import numpy as np
    import soundfile as sf

    labels = [label for label in CONFIGS if not (args.no_single and label == "--jobs 1")]
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
        print(f"{args.files} files of {args.seconds:g} s, {args.rounds} round(s); load {os.getloadavg()[0]:.2f}")
        times = {label: [] for label in labels}
        ratios = {"pool": [], "dask": [], "dask_eof": []}
        for r in range(args.rounds):
            order = labels if r % 2 == 0 else labels[::-1]
            got = {}
            for label in order:
                p = _run(root, label, CONFIGS[label])
                if p is None:
                    continue
                got[label] = p
                times[label].append(p["exit"])
                print(f"round {r + 1} {label:16s} {p['exit']:6.2f} s {audio_s / p['exit']:6.1f}x rt | {_phase_line(p)}")
            if "--jobs 1" in got and "--jobs 2" in got:
                ratios["pool"].append(got["--jobs 1"]["exit"] / got["--jobs 2"]["exit"])
            if "--jobs 2" in got and "Dask, 2 workers" in got:
                ratios["dask"].append(got["Dask, 2 workers"]["exit"] / got["--jobs 2"]["exit"])
                ratios["dask_eof"].append(got["Dask, 2 workers"]["eof"] / got["--jobs 2"]["eof"])
            print(f"round {r + 1} load {os.getloadavg()[0]:.2f}")

        def figures(values):
            return f"median {statistics.median(values):.2f} ({', '.join(f'{v:.2f}' for v in values)})"

        for label in labels:
            if times[label]:
                print(f"{label:16s} time: {figures(times[label])} s")
        if ratios["pool"]:
            print(f"--jobs 2 / --jobs 1 throughput: {figures(ratios['pool'])} (goal >= 1.7)")
        if ratios["dask"]:
            print(f"Dask / process pool time: {figures(ratios['dask'])} (goal <= 1.15)")
            print(f"  the same, until the output pipes close: {figures(ratios['dask_eof'])}")

if __name__ == "__main__":
    if len(sys.argv) > 2 and sys.argv[1] == "--child":
        sys.exit(_child(sys.argv[2], sys.argv[3:]))
    main()
