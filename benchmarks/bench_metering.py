"""Benchmark: loudness metering plus true peak against the convolution they sit beside.

Goal (issue "Delivery-ready output"): metering + true peak <= 40 % of the
convolution's time for a stereo 48 kHz file with a 2.5 s tail.  Prints the
figures of this run; asserts nothing.

    python benchmarks/bench_metering.py [--minutes 2]
"""

import argparse
import statistics
import time

import numpy as np

from render import convolve, loudness, truepeak
from render.room import Room
from render.synthesis import synthesize


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=2.0)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    rate = 48000
    ir = synthesize(Room(decay_s=2.5, size_m=(20.0, 14.0, 8.0)), rate_hz=rate, channels=2).ir
    kernel = convolve.prepare_kernel(ir * 0.1)
    frames = int(args.minutes * 60 * rate)
    rng = np.random.default_rng(4)
    gate = (np.sin(2 * np.pi * 3 * np.arange(frames) / rate) > -0.2).astype(float)
    x = rng.standard_normal((frames, 2)) * 0.05 * gate[:, None]
    blocks = [x[i:i + kernel.block_frames] for i in range(0, frames, kernel.block_frames)]
    conv_t, meter_t = [], []
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        state = convolve.initial_state(kernel, channels=2)
        outs = []
        for b in blocks:
            y, state = convolve.convolve_block(b, state, kernel=kernel)
            outs.append(y)
        outs.append(convolve.flush(state, kernel=kernel))
        conv_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        m = loudness.meter_init(rate_hz=rate, channels=2)
        p = truepeak.truepeak_init(rate_hz=rate, channels=2)
        for y in outs:
            m = loudness.meter_update(y, m)
            p = truepeak.truepeak_update(y, p)
        loudness.meter_result(m)
        truepeak.truepeak_result(p)
        meter_t.append(time.perf_counter() - t0)
    c, mt = statistics.median(conv_t), statistics.median(meter_t)
    print(f"{args.minutes:g} min stereo 48 kHz, 2.5 s room: convolution {c:.2f} s, loudness + true peak {mt:.2f} s "
          f"= {100 * mt / c:.0f} % of the convolution (goal <= 40 %)")


if __name__ == "__main__":
    main()
