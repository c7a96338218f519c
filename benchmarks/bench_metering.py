"""Benchmark: loudness metering plus true peak against the convolution they sit beside.

Goal (issue "Delivery-ready output"): metering + true peak <= 40 % of the
convolution's time for a stereo 48 kHz file with a 2.5 s tail.  Prints the
figures of this run; asserts nothing.

    python benchmarks/bench_metering.py [--minutes 2]

With ``--before-after [REV]`` it instead compares the per-sample kernels of
render.loudness, render.truepeak and render.dither with the versions committed
at REV (default 547ac99, the last version before the speed-up, loaded from ``git show`` into private modules), in one
process: 60 s of 48 kHz stereo noise in blocks of 400 000 frames, old and new
run alternately, medians of the repeats.  It also checks that the results
agree (loudness to 1e-12 relative, true peak and dither bit for bit).

    python benchmarks/bench_metering.py --before-after [547ac99] [--repeats 5]
"""

import argparse
import dataclasses
import resource
import statistics
import subprocess
import sys
import time
import types
from pathlib import Path

import numpy as np
from scipy import signal as sps

from render import convolve, dither, loudness, truepeak
from render.room import Room
from render.synthesis import synthesize

RATE_HZ = 48000
ROOT = Path(__file__).resolve().parents[1]


def convolution_share(args):
    rate = RATE_HZ
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


# --------------------------------------------------------------------------- before / after


def load_reference(module, rev):
    """``render/<module>.py`` as committed at ``rev``, as a private module (None if git cannot show it)."""
    try:
        source = subprocess.run(["git", "show", f"{rev}:render/{module}.py"], cwd=ROOT, capture_output=True,
                                text=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError) as e:
        print(f"cannot load render/{module}.py at {rev}: {e}", file=sys.stderr)
        return None
    mod = types.ModuleType(f"render._reference_{module}")
    mod.__package__ = "render"  # its relative imports resolve to the working tree's modules
    mod.__file__ = f"{rev}:render/{module}.py"
    sys.modules[mod.__name__] = mod  # dataclasses look their module up
    exec(compile(source, mod.__file__, "exec"), mod.__dict__)
    return mod


def run_loudness(mod, blocks):
    state = mod.meter_init(rate_hz=RATE_HZ, channels=blocks[0].shape[1])
    for b in blocks:
        state = mod.meter_update(b, state)
    return mod.meter_result(state), state.hop_energies()


def run_truepeak(mod, blocks):
    state = mod.truepeak_init(rate_hz=RATE_HZ, channels=blocks[0].shape[1])
    for b in blocks:
        state = mod.truepeak_update(b, state)
    return dataclasses.astuple(mod.truepeak_result(state)), state.peak.tobytes(), state.sample_peak.tobytes()


def run_dither(mod, blocks, keep=False):
    """Two stems (as the renderer's dry and wet), each with its own seed; the outputs if ``keep``."""
    states = [mod.dither_init(np.random.SeedSequence([7, stem]), channels=blocks[0].shape[1]) for stem in (0, 1)]
    outputs = []
    for b in blocks:
        for i, state in enumerate(states):
            y, states[i] = mod.dither_block(b, state, subtype="PCM_24")
            if keep:
                outputs.append(y)
    return outputs, [(s.frames, s.clipped_samples, s.bit_generator_state) for s in states]


def dither_agreement(ref, blocks):
    """Bit-identical outputs and states? (An untimed run of each, so that the comparison costs no time.)"""
    (ya, sa), (yb, sb) = run_dither(ref, blocks, keep=True), run_dither(dither, blocks, keep=True)
    same = sa == sb and all(a.tobytes() == b.tobytes() for a, b in zip(ya, yb)) and len(ya) == len(yb)
    return "bit-identical" if same else "DIFFERENT"


def _minor_faults():
    return resource.getrusage(resource.RUSAGE_SELF).ru_minflt


def alternate(runs, repeats):
    """Run each ``(label, function)`` in turn, ``repeats`` rounds.

    Returns per label the median wall and CPU seconds and the median count of
    minor page faults per run (fresh large temporaries cost page faults, whose
    number depends on the allocator's state, so it explains much of the spread).
    """
    wall = {label: [] for label, _ in runs}
    cpu = {label: [] for label, _ in runs}
    faults = {label: [] for label, _ in runs}
    results = {}
    for _ in range(repeats):
        for label, fn in runs:
            f, w, c = _minor_faults(), time.perf_counter(), time.process_time()
            results[label] = fn()
            wall[label].append(time.perf_counter() - w)
            cpu[label].append(time.process_time() - c)
            faults[label].append(_minor_faults() - f)
    return {label: tuple(statistics.median(v[label]) for v in (wall, cpu, faults)) for label in wall}, results


def report(name, times, note):
    (bw, bc, bf), (aw, ac, af) = times["before"], times["after"]
    print(f"{name:38s} before {1e3 * bw:7.1f} ms  after {1e3 * aw:7.1f} ms  x{bw / aw:4.2f} wall "
          f"(cpu {1e3 * bc:6.1f} -> {1e3 * ac:6.1f} ms, x{bc / ac:4.2f}; page faults {bf:.0f} -> {af:.0f})  {note}")


def loudness_agreement(before, after):
    (rb, hb), (ra, ha) = before, after
    worst = float(np.max(np.abs(ha - hb) / np.abs(hb))) if hb.size else 0.0
    for field in ("integrated_lufs", "momentary_max_lufs", "short_term_max_lufs", "loudness_range_lu"):
        vb, va = getattr(rb, field), getattr(ra, field)
        if (vb is None) != (va is None):
            return f"{field}: {vb} before, {va} after"
        if vb is not None:
            worst = max(worst, abs(va - vb) / abs(vb))
    status = "ok" if worst <= 1e-12 and hb.shape == ha.shape and rb.reason == ra.reason else "DIFFERENT"
    return f"{status}: max relative difference {worst:.1e}"


def sosfilt_layout(x, repeats):
    """sosfilt along axis 0 of (frames, channels) against a transposed contiguous copy filtered along -1."""
    sos = loudness.k_weighting_sos(rate_hz=RATE_HZ)
    zi0 = np.zeros((sos.shape[0], 2, x.shape[1]))
    zi1 = np.zeros((sos.shape[0], x.shape[1], 2))
    times, _ = alternate([
        ("axis 0", lambda: sps.sosfilt(sos, x, axis=0, zi=zi0)),
        ("copy, axis -1", lambda: sps.sosfilt(sos, np.ascontiguousarray(x.T), axis=-1, zi=zi1)),
    ], repeats)
    a, b = times["axis 0"][0], times["copy, axis -1"][0]
    print(f"{'sosfilt, one 400 000-frame block':38s} axis 0 of (frames, channels) {1e3 * a:6.1f} ms, "
          f"transposed contiguous copy + axis -1 {1e3 * b:6.1f} ms")


def before_after(args):
    refs = {name: load_reference(name, args.before_after) for name in ("loudness", "truepeak", "dither")}
    if None in refs.values():
        return 1
    frames = int(args.seconds * RATE_HZ)
    rng = np.random.default_rng(4)
    noise = rng.standard_normal((frames, 2)) * 0.1
    signals = {"noise": noise}
    if args.true_peak_signals:
        n = np.arange(frames)[:, None]
        signals["1 kHz tone, -3 dBFS"] = np.repeat(0.7 * np.sin(2 * np.pi * 1000.0 * n / RATE_HZ), 2, axis=1)
        signals["noise clipped at -6 dBFS"] = np.clip(rng.standard_normal((frames, 2)) * 0.3, -0.5, 0.5)
    cut = lambda x: [x[i:i + args.block_frames] for i in range(0, frames, args.block_frames)]  # noqa: E731
    blocks = cut(noise)
    print(f"{args.seconds:g} s of 48 kHz stereo in blocks of {args.block_frames} frames; before = render/*.py at "
          f"{args.before_after}, after = working tree; medians of {args.repeats} alternating runs")

    times, out = alternate([("before", lambda: run_loudness(refs["loudness"], blocks)),
                            ("after", lambda: run_loudness(loudness, blocks))], args.repeats)
    report("loudness.meter_update (noise)", times, loudness_agreement(out["before"], out["after"]))
    for name, x in signals.items():
        b = cut(x)
        times, out = alternate([("before", lambda: run_truepeak(refs["truepeak"], b)),
                                ("after", lambda: run_truepeak(truepeak, b))], args.repeats)
        report(f"truepeak.truepeak_update ({name})", times,
               "identical" if out["before"] == out["after"] else "DIFFERENT")
    agreement = dither_agreement(refs["dither"], blocks)
    times, _ = alternate([("before", lambda: run_dither(refs["dither"], blocks)),
                          ("after", lambda: run_dither(dither, blocks))], args.repeats)
    report("dither.dither_block (2 stems, PCM_24)", times, agreement)
    sosfilt_layout(blocks[0], args.repeats)
    return 0


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=2.0)
    parser.add_argument("--repeats", type=int, default=None, help="default 3, or 5 with --before-after")
    parser.add_argument("--before-after", nargs="?", const="547ac99", default=None, metavar="REV",
                        help="compare the metering kernels with those committed at REV (default 547ac99)")
    parser.add_argument("--seconds", type=float, default=60.0, help="signal length for --before-after")
    parser.add_argument("--block-frames", type=int, default=400_000, help="block size for --before-after")
    parser.add_argument("--true-peak-signals", action="store_true",
                        help="with --before-after, also time true peak on a tone and on clipped noise")
    args = parser.parse_args()
    if args.before_after is None:
        args.repeats = args.repeats or 3
        convolution_share(args)
        return 0
    args.repeats = args.repeats or 5
    return before_after(args)


if __name__ == "__main__":
    sys.exit(main())
