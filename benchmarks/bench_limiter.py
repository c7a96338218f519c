"""Benchmark: the true-peak limiter against a committed version of itself, in one process.

The baseline is ``render/limiter.py`` as committed at ``--baseline`` (default
``547ac99``, the last version before the speed-up), read with ``git show`` and loaded as a private module next to the
working tree's.  Both run on the same material, alternately, block by block
as the renderer feeds them (``limiter_update`` with ``--block-frames``, then
``limiter_flush``); the figures are the medians of ``--repeats`` runs of the
CPU time of this process (the code is single-threaded; a shared machine
disturbs CPU time less than wall time) and their ratio.  Also printed: the
largest difference between the two gain curves.  Asserts nothing.

Materials (invented, seeded):

* **speech-like**: Gaussian noise low-passed at 5 kHz (255-tap FIR), cut into
  syllable-like bursts at 1.7 Hz whose levels vary over 6 dB, independent per
  channel, raised so that ``--reduced-percent`` of the frames need a gain
  below 1 (peak envelope above the limiter's internal target);
* **speech-like with peaks**: the same bursts at a normal level (the loudest
  samples near -12 dBFS) plus a 2 ms decaying pulse every 2 s that goes 2 dB
  over the ceiling, as in ``render bench`` after EBU R128 normalisation: only
  the pulses need reduction, but the release keeps the gain below 1 almost
  everywhere;
* **clipped noise**: Gaussian noise at 0.8 rms clipped to full scale, so that
  most frames need reduction (heavy limiting).

    python benchmarks/bench_limiter.py [--seconds 60] [--repeats 7] [--baseline 547ac99]
"""

import argparse
import importlib.util
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.signal

from render import limiter
from render.units import db_to_gain

RATE_HZ = 48000
CEILING_DBTP = -1.0


def load_baseline(revision):
    """``render/limiter.py`` at ``revision`` as the module ``render._limiter_baseline``."""
    root = Path(__file__).resolve().parent.parent
    source = subprocess.run(["git", "show", f"{revision}:render/limiter.py"], cwd=root, check=True,
                            capture_output=True, text=True).stdout
    folder = tempfile.mkdtemp(prefix="bench_limiter_")
    path = Path(folder) / "limiter_baseline.py"
    path.write_text(source, encoding="utf-8")
    name = "render._limiter_baseline"  # inside the package, so its relative imports resolve
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


def speechlike(rng, frames, channels):
    """Syllable-like bursts of noise low-passed at 5 kHz, levels over 6 dB (unit-free; scaled later)."""
    fir = scipy.signal.firwin(255, 5000.0, fs=RATE_HZ, window=("kaiser", 8.6))
    noise = scipy.signal.lfilter(fir, 1.0, rng.standard_normal((frames + fir.size, channels)), axis=0)[fir.size:]
    t = np.arange(frames) / RATE_HZ
    syllable_hz = 1.7
    envelope = np.clip(3.0 * np.sin(2 * np.pi * syllable_hz * t - 0.5), 0.0, 1.0)
    levels = db_to_gain(rng.uniform(-6.0, 0.0, size=int(frames / RATE_HZ * syllable_hz) + 2))
    envelope *= levels[np.floor(t * syllable_hz).astype(int)]
    return noise * envelope[:, None]


def raise_to(x, percent):
    """``x`` scaled so that ``percent`` % of its frames have a peak envelope above the limiter's target."""
    target = db_to_gain(CEILING_DBTP - limiter.SAFETY_MARGIN_DB)
    envelope = limiter.peak_envelope(x, rate_hz=RATE_HZ)  # linear in the signal
    return np.ascontiguousarray(x * (target / np.quantile(envelope, 1.0 - percent / 100.0)))


def with_peaks(x):
    """``x`` at a normal level plus a decaying 2 ms pulse every 2 s, 2 dB over the ceiling."""
    x = x * (db_to_gain(-12.0) / np.max(np.abs(x)))
    pulse = db_to_gain(CEILING_DBTP + 2.0) * np.exp(-np.arange(96) / 19.2)
    for k, at in enumerate(range(int(0.37 * RATE_HZ), x.shape[0] - pulse.size, 2 * RATE_HZ)):
        x[at:at + pulse.size] += (pulse * (-1.0) ** k)[:, None]
    return np.ascontiguousarray(x)


def run(module, x, block_frames):
    state = module.limiter_init(rate_hz=RATE_HZ, channels=x.shape[1], ceiling_dbtp=CEILING_DBTP)
    gains = []
    for start in range(0, x.shape[0], block_frames):
        g, state = module.limiter_update(x[start:start + block_frames], state)
        gains.append(g)
    g, state = module.limiter_flush(state)
    gains.append(g)
    return np.concatenate(gains)


def compare(name, x, baseline, args):
    target = db_to_gain(CEILING_DBTP - limiter.SAFETY_MARGIN_DB)
    needing = 100.0 * np.mean(limiter.peak_envelope(x, rate_hz=RATE_HZ) > target)
    old_s, new_s = [], []
    old = new = None
    for _ in range(args.repeats):  # interleaved, so that the machine's load hits both alike
        t0 = time.process_time()
        old = run(baseline, x, args.block_frames)
        old_s.append(time.process_time() - t0)
        t0 = time.process_time()
        new = run(limiter, x, args.block_frames)
        new_s.append(time.process_time() - t0)
    o, n = statistics.median(old_s), statistics.median(new_s)
    print(f"{name}: {needing:.2f} % of frames need reduction, {100.0 * np.mean(new < 1.0):.1f} % have a gain < 1")
    print(f"  baseline {o:.3f} s, this tree {n:.3f} s (CPU) per {args.seconds:g} s of stereo 48 kHz: "
          f"{o / n:.2f}x faster; largest gain difference {float(np.max(np.abs(old - new))):.1e}")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--block-frames", type=int, default=200_000, help="frames per limiter_update call")
    parser.add_argument("--reduced-percent", type=float, default=2.0,
                        help="speech-like material: percent of frames that need reduction")
    parser.add_argument("--baseline", default="547ac99", help="git revision of the baseline limiter")
    args = parser.parse_args()
    baseline = load_baseline(args.baseline)
    frames = int(args.seconds * RATE_HZ)
    rng = np.random.default_rng(20261202)
    speech = speechlike(rng, frames, 2)
    compare("speech-like with peaks", with_peaks(speech), baseline, args)
    compare("speech-like", raise_to(speech, args.reduced_percent), baseline, args)
    compare("clipped noise", np.clip(0.8 * rng.standard_normal((frames, 2)), -1.0, 1.0), baseline, args)


if __name__ == "__main__":
    main()
