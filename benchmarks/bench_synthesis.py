"""Benchmark: synthesis plus calibration of room responses (one core): time and peak memory.

Goals (issue "Room engine" and the worker memory budget): a stereo room with a
2.5 s decay at 48 kHz in <= 1 s on one core, and synthesis peaking well below
the 300 MB of a render worker (aim: <= 150 MB of process RSS for that room).

Each room runs in a fresh process (peak RSS, ``ru_maxrss``, only grows within a
process): it imports render, records its RSS, then synthesises the room
``--repeats`` times (the in-process cache cleared before each).  Printed per
room: the first and the median time, the process RSS after the import and its
peak after the first synthesis, the peak of numpy's allocations during one synthesis
(tracemalloc, in a second fresh process: what the engine itself holds at once),
calibration passes, the largest band error and the response length.  No
assertion (machines are noisy).

    python benchmarks/bench_synthesis.py [--repeats N] [--rooms goal,parish-hall,...]
"""

import argparse
import json
import resource
import statistics
import subprocess
import sys
import time
import tracemalloc

GOAL = "goal"


def _room(name):
    from render.catalogue import CATALOGUE
    from render.room import Room

    if name == GOAL:
        return "goal: 2.5 s, 20x14x8 m", Room(name="goal", decay_s=2.5, size_m=(20.0, 14.0, 8.0))
    return name, CATALOGUE[name]


def _maxrss_mb():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def child(name, repeats, traced):
    """Measure one room in this (fresh) process; print one JSON line."""
    import render  # noqa: F401  (the RSS baseline includes the package's imports)
    from render.synthesis import clear_cache, synthesize

    rss_import = _maxrss_mb()
    label, room = _room(name)
    if traced:
        # numpy reports its allocations to tracemalloc: the peak of what the engine holds at once.
        tracemalloc.start()
        synthesize(room, rate_hz=48000, channels=2)
        print(json.dumps(dict(traced_peak_mb=tracemalloc.get_traced_memory()[1] / 2**20)))
        return
    times = []
    for _ in range(repeats):
        clear_cache()
        t0 = time.perf_counter()
        r = synthesize(room, rate_hz=48000, channels=2)
        times.append(time.perf_counter() - t0)
        if len(times) == 1:
            rss_first = _maxrss_mb()  # what `render run` sees: one synthesis per room in a process
    print(json.dumps(dict(
        label=label, decay_s=room.decay_mid_s, first_s=times[0], median_s=statistics.median(times),
        rss_import_mb=rss_import, rss_peak_mb=rss_first,
        passes=r.iterations, max_error_pct=r.max_error_pct, frames=r.ir.shape[0],
    )))


def _run_child(name, *options):
    out = subprocess.run(
        [sys.executable, __file__, "--child", name, *options], check=True, capture_output=True, text=True
    ).stdout
    return json.loads(out.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--rooms", help="comma-separated: 'goal' and/or catalogue names (default: all)")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--traced", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args.child, max(1, args.repeats), args.traced)
        return
    from render.catalogue import CATALOGUE

    names = args.rooms.split(",") if args.rooms else [GOAL] + sorted(CATALOGUE)
    print(f"{'room':28s} {'decay s':>7s} {'first s':>8s} {'median s':>9s} {'RSS import MB':>13s} "
          f"{'RSS peak MB':>11s} {'numpy peak MB':>13s} {'passes':>6s} {'max err %':>9s} {'frames':>8s}")
    for name in names:
        m = _run_child(name, "--repeats", str(args.repeats))  # time and RSS, without tracemalloc
        m.update(_run_child(name, "--traced"))  # a second fresh process for the allocation peak
        print(f"{m['label']:28s} {m['decay_s']:7.2f} {m['first_s']:8.3f} {m['median_s']:9.3f} "
              f"{m['rss_import_mb']:13.1f} {m['rss_peak_mb']:11.1f} {m['traced_peak_mb']:13.1f} "
              f"{m['passes']:6d} {m['max_error_pct']:9.2f} {m['frames']:8d}")


if __name__ == "__main__":
    main()
