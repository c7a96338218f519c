"""Benchmark: synthesis plus calibration of room responses (one core).

Goal (issue "Room engine"): a stereo room with a 2.5 s decay at 48 kHz in
<= 1 s on one core.  Prints the median of several repeats per room and the
calibration passes; no assertion (machines are noisy).

    python benchmarks/bench_synthesis.py [--repeats N]
"""

import argparse
import statistics
import time

from render.catalogue import CATALOGUE
from render.room import Room
from render.synthesis import clear_cache, synthesize


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    cases = [("goal: 2.5 s, 20x14x8 m", Room(name="goal", decay_s=2.5, size_m=(20.0, 14.0, 8.0)))]
    cases += [(name, CATALOGUE[name]) for name in sorted(CATALOGUE)]
    print(f"{'room':28s} {'decay s':>7s} {'median s':>9s} {'passes':>6s} {'max err %':>9s} {'frames':>8s}")
    for label, room in cases:
        times = []
        for _ in range(args.repeats):
            clear_cache()
            t0 = time.perf_counter()
            r = synthesize(room, rate_hz=48000, channels=2)
            times.append(time.perf_counter() - t0)
        print(f"{label:28s} {room.decay_mid_s:7.2f} {statistics.median(times):9.3f} {r.iterations:6d} "
              f"{r.max_error_pct:9.2f} {r.ir.shape[0]:8d}")


if __name__ == "__main__":
    main()
