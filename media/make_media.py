"""Regenerate the demo audio under media/ from the text in this file.

Run from the repository root::

    /work/venv/bin/python media/make_media.py

Needs the ``espeak-ng`` command (Debian package ``espeak-ng``) and the Python
packages numpy, scipy and soundfile. Every output is rebuilt from scratch; the
only random choice (pause lengths in the podcast) comes from fixed seeds, so
two runs with the same espeak-ng, numpy, scipy and libsndfile give identical
files.

All text below is our own invention. The speech is synthetic.
"""

from __future__ import annotations

import math
import shutil
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import soundfile as sf
from scipy.ndimage import minimum_filter1d
from scipy.signal import resample_poly

MEDIA_DIR = Path(__file__).resolve().parent

# Processing targets.
OUT_RATE_HZ = 48_000
WILD_RATE_HZ = 44_100
LEAD_SILENCE_S = 0.150
TAIL_SILENCE_S = 0.300
TARGET_SPEECH_RMS_DBFS = -20.0
PEAK_CEILING_DBFS = -3.5  # a little under the -3 dBFS limit, room for rounding
TRIM_THRESHOLD_DB = -50.0  # relative to the loudest 5 ms frame
GATE_DB = -30.0  # frames this far under the loudest 20 ms frame are not "speech"
EDGE_FADE_S = 0.003
LIMIT_WINDOW_S = 0.010  # width of the look-ahead gain dip used to hold peaks down
PAN_AMOUNT = 0.3  # hosts at -0.3 (left) and +0.3 (right) on a -1..+1 scale


@dataclass(frozen=True)
class Voice:
    """espeak-ng settings for one speaker."""

    voice: str  # -v
    pitch: int  # -p, 0..99
    speed_wpm: int  # -s, words per minute


VOICES = {
    # The Lantern Street Tapes
    "mara": Voice("en-gb+f3", 58, 148),
    "venn": Voice("en-gb-x-rp+m3", 32, 138),
    "pell": Voice("en-gb-scotland+m7", 46, 162),
    # Night Shift Notes
    "juno": Voice("en-us+f4", 62, 165),
    "rafe": Voice("en-us+m2", 40, 155),
    # Slates for the farm folder
    "slate_a": Voice("en-us+m1", 50, 170),
    "slate_b": Voice("en-gb+f2", 55, 170),
}

# The Lantern Street Tapes, scene 12: the archive room above the pawnshop.
DRAMA_LINES = [
    ("sc12_line01_mara.wav", "mara", "The tape was still warm."),
    ("sc12_line02_venn.wav", "venn", "Tapes don't stay warm."),
    ("sc12_line03_mara.wav", "mara", "This one did. Listen."),
    ("sc12_line04_pell.wav", "pell", "I never touched it, I swear."),
    ("sc12_line05_venn.wav", "venn", "Then who rewound it?"),
    ("sc12_line06_mara.wav", "mara", "Someone who knew we'd come back."),
]
WILD_LINE = ("sc12_line07_wild_44k.wav", "pell", "Scene twelve, wild line.")

# Night Shift Notes: two hosts alternate, one sentence each turn.
PODCAST_EPISODES = [
    (
        "ep01.flac",
        101,
        [
            ("juno", "Welcome back to Night Shift Notes."),
            ("rafe", "Tonight, the bakery that opens at three."),
            ("juno", "They knead by lamplight."),
            ("rafe", "The first loaves go to the drivers."),
            ("juno", "See you next shift."),
        ],
    ),
    (
        "ep02.flac",
        102,
        [
            ("rafe", "Night Shift Notes, episode two."),
            ("juno", "We rode the last tram to the depot."),
            ("rafe", "The driver hums the same tune."),
            ("juno", "Nobody knows where it's from."),
            ("rafe", "Goodnight, and keep your lantern lit."),
        ],
    ),
]
PAUSE_RANGE_S = (0.50, 0.70)

# Short slates in two sub-folders, to show a recursive folder glob.
FARM_FILES = [
    ("batch_a/a01_door.flac", "slate_a", "Door, take one."),
    ("batch_a/a02_stairs.flac", "slate_a", "Footsteps on the stair."),
    ("batch_b/b01_kettle.flac", "slate_b", "The kettle clicks off."),
    ("batch_b/b02_radio.flac", "slate_b", "Radio, very faint."),
]

# Allowed durations, checked after building (seconds, inclusive).
DRAMA_RANGE_S = (1.5, 4.0)
PODCAST_RANGE_S = (12.0, 20.0)
FARM_RANGE_S = (1.0, 2.0)


def db_to_amp(db: float) -> float:
    return 10.0 ** (db / 20.0)


def amp_to_db(amp: float) -> float:
    return 20.0 * math.log10(amp) if amp > 0 else -math.inf


def espeak_version() -> str:
    if shutil.which("espeak-ng") is None:
        sys.exit("espeak-ng not found: install it (Debian: apt-get install espeak-ng)")
    out = subprocess.run(
        ["espeak-ng", "--version"], check=True, capture_output=True, text=True
    ).stdout
    return out.strip()


def speak(text: str, voice: Voice, workdir: Path) -> tuple[np.ndarray, int]:
    """Speak ``text`` with espeak-ng; return mono float64 samples and their rate."""
    wav = workdir / "line.wav"
    cmd = [
        "espeak-ng",
        "-v", voice.voice,
        "-p", str(voice.pitch),
        "-s", str(voice.speed_wpm),
        "-w", str(wav),
        text,
    ]
    subprocess.run(cmd, check=True, capture_output=True)
    data, rate_hz = sf.read(wav, dtype="float64", always_2d=True)
    return data[:, 0].copy(), rate_hz


def resample(x: np.ndarray, rate_in_hz: int, rate_out_hz: int) -> np.ndarray:
    if rate_in_hz == rate_out_hz:
        return x
    g = math.gcd(rate_in_hz, rate_out_hz)
    return resample_poly(x, rate_out_hz // g, rate_in_hz // g)


def trim(x: np.ndarray, rate_hz: int) -> np.ndarray:
    """Cut leading/trailing near-silence (5 ms frames under TRIM_THRESHOLD_DB)."""
    hop = int(round(0.005 * rate_hz))
    n_frames = int(math.ceil(len(x) / hop))
    padded = np.zeros(n_frames * hop)
    padded[: len(x)] = x
    frame_peak = np.abs(padded.reshape(n_frames, hop)).max(axis=1)
    active = np.flatnonzero(frame_peak > frame_peak.max() * db_to_amp(TRIM_THRESHOLD_DB))
    start = active[0] * hop
    stop = min(len(x), (active[-1] + 1) * hop)
    y = x[start:stop].copy()
    n_fade = int(round(EDGE_FADE_S * rate_hz))
    ramp = 0.5 - 0.5 * np.cos(np.linspace(0.0, math.pi, n_fade))
    y[:n_fade] *= ramp
    y[-n_fade:] *= ramp[::-1]
    return y


def pad(x: np.ndarray, rate_hz: int, lead_s: float, tail_s: float) -> np.ndarray:
    lead = np.zeros(int(round(lead_s * rate_hz)))
    tail = np.zeros(int(round(tail_s * rate_hz)))
    return np.concatenate([lead, x, tail])


def speech_rms(x: np.ndarray, rate_hz: int) -> float:
    """RMS over 20 ms frames within GATE_DB of the loudest frame.

    ``x`` is (frames,) or (frames, channels). Channel powers are summed (as the
    BS.1770 channel sum does for left/right), so a constant-power pan of a mono
    line keeps the figure the mono line had.
    """
    x2 = x.reshape(len(x), -1)
    hop = int(round(0.020 * rate_hz))
    n_frames = len(x2) // hop
    frames = x2[: n_frames * hop].reshape(n_frames, hop, x2.shape[1])
    power = (frames**2).mean(axis=1).sum(axis=1)
    keep = power > power.max() * 10.0 ** (GATE_DB / 10.0)
    return math.sqrt(power[keep].mean())


def hold_peaks(x: np.ndarray, rate_hz: int) -> np.ndarray:
    """Look-ahead peak limiting: no sample ends above PEAK_CEILING_DBFS.

    The gain each sample needs is min(1, ceiling / |x|) (the loudest channel
    decides for all channels). A running minimum over LIMIT_WINDOW_S followed
    by a moving average of the same width gives a smooth gain that is never
    above the needed gain at any sample, so the ceiling holds exactly.
    """
    x2 = x.reshape(len(x), -1)
    ceiling = db_to_amp(PEAK_CEILING_DBFS)
    level = np.abs(x2).max(axis=1)
    need = np.minimum(1.0, ceiling / np.maximum(level, 1e-12))
    width = 2 * int(round(LIMIT_WINDOW_S * rate_hz / 2)) + 1
    floor = minimum_filter1d(need, size=width, mode="nearest")
    padded = np.pad(floor, width // 2, mode="edge")
    gain = np.convolve(padded, np.ones(width) / width, mode="valid")
    return (x2 * gain[:, None]).reshape(x.shape)


def normalise(x: np.ndarray, rate_hz: int) -> np.ndarray:
    """Bring the speech RMS to TARGET_SPEECH_RMS_DBFS with peaks held under the ceiling.

    Limiting lowers the RMS a little, so gain and limiting alternate a few times.
    """
    for _ in range(4):
        x = x * (db_to_amp(TARGET_SPEECH_RMS_DBFS) / speech_rms(x, rate_hz))
        x = hold_peaks(x, rate_hz)
    return x


def pan(x: np.ndarray, position: float) -> np.ndarray:
    """Constant-power pan of mono ``x``; position -1 (left) .. +1 (right)."""
    theta = (position + 1.0) * math.pi / 4.0
    return np.stack([x * math.cos(theta), x * math.sin(theta)], axis=1)


def build_line(text: str, voice: Voice, rate_hz: int, workdir: Path) -> np.ndarray:
    raw, raw_rate_hz = speak(text, voice, workdir)
    y = trim(resample(raw, raw_rate_hz, rate_hz), rate_hz)
    return normalise(pad(y, rate_hz, LEAD_SILENCE_S, TAIL_SILENCE_S), rate_hz)


def build_episode(turns, seed: int, workdir: Path) -> np.ndarray:
    rng = np.random.default_rng(seed)
    hosts = sorted({who for who, _ in turns})
    positions = {hosts[0]: -PAN_AMOUNT, hosts[1]: +PAN_AMOUNT}  # juno left, rafe right
    pieces = [np.zeros((int(round(LEAD_SILENCE_S * OUT_RATE_HZ)), 2))]
    for i, (who, text) in enumerate(turns):
        raw, raw_rate_hz = speak(text, VOICES[who], workdir)
        y = trim(resample(raw, raw_rate_hz, OUT_RATE_HZ), OUT_RATE_HZ)
        y = normalise(y, OUT_RATE_HZ)  # each sentence to the same level first
        pieces.append(pan(y, positions[who]))
        if i < len(turns) - 1:
            pause_s = rng.uniform(*PAUSE_RANGE_S)
            pieces.append(np.zeros((int(round(pause_s * OUT_RATE_HZ)), 2)))
    pieces.append(np.zeros((int(round(TAIL_SILENCE_S * OUT_RATE_HZ)), 2)))
    return normalise(np.concatenate(pieces, axis=0), OUT_RATE_HZ)


def write(path: Path, x: np.ndarray, rate_hz: int, fmt: str, subtype: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    sf.write(path, x, rate_hz, format=fmt, subtype=subtype)


def check_duration(path: Path, x: np.ndarray, rate_hz: int, bounds) -> None:
    dur_s = len(x) / rate_hz
    if not bounds[0] <= dur_s <= bounds[1]:
        sys.exit(f"{path.name}: {dur_s:.2f} s, expected {bounds[0]}..{bounds[1]} s")


def summary(paths: list[Path]) -> None:
    print(f"{'file':42s} {'rate':>6s} {'ch':>2s} {'subtype':>7s} {'dur_s':>6s} "
          f"{'peak_dBFS':>9s} {'rms_dBFS':>8s} {'speech_dBFS':>11s} {'bytes':>8s}")
    for p in paths:
        info = sf.info(p)
        x, rate_hz = sf.read(p, dtype="float64", always_2d=True)
        rms = math.sqrt((x**2).mean())
        print(f"{str(p.relative_to(MEDIA_DIR)):42s} {rate_hz:6d} {x.shape[1]:2d} "
              f"{info.subtype:>7s} {len(x) / rate_hz:6.3f} {amp_to_db(np.abs(x).max()):9.2f} "
              f"{amp_to_db(rms):8.2f} {amp_to_db(speech_rms(x, rate_hz)):11.2f} "
              f"{p.stat().st_size:8d}")


def main() -> None:
    print(espeak_version())
    written: list[Path] = []
    with tempfile.TemporaryDirectory() as tmp:
        workdir = Path(tmp)

        for name, who, text in DRAMA_LINES:
            path = MEDIA_DIR / "drama" / name
            x = build_line(text, VOICES[who], OUT_RATE_HZ, workdir)
            check_duration(path, x, OUT_RATE_HZ, DRAMA_RANGE_S)
            write(path, x, OUT_RATE_HZ, "WAV", "PCM_24")
            written.append(path)

        name, who, text = WILD_LINE
        path = MEDIA_DIR / "drama" / name
        x = build_line(text, VOICES[who], WILD_RATE_HZ, workdir)
        check_duration(path, x, WILD_RATE_HZ, DRAMA_RANGE_S)
        write(path, x, WILD_RATE_HZ, "WAV", "PCM_16")
        written.append(path)

        for name, seed, turns in PODCAST_EPISODES:
            path = MEDIA_DIR / "podcast" / name
            x = build_episode(turns, seed, workdir)
            check_duration(path, x, OUT_RATE_HZ, PODCAST_RANGE_S)
            write(path, x, OUT_RATE_HZ, "FLAC", "PCM_24")  # FLAC keeps the folder small
            written.append(path)

        for name, who, text in FARM_FILES:
            path = MEDIA_DIR / "farm" / name
            x = build_line(text, VOICES[who], OUT_RATE_HZ, workdir)
            check_duration(path, x, OUT_RATE_HZ, FARM_RANGE_S)
            write(path, x, OUT_RATE_HZ, "FLAC", "PCM_16")
            written.append(path)

    summary(written)
    total = sum(p.stat().st_size for p in written)
    print(f"total {total} bytes in {len(written)} files")


if __name__ == "__main__":
    main()
