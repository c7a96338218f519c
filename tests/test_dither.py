"""Specification of render.dither: TPDF dither and rounding to a PCM grid, seeded per file."""

from __future__ import annotations

import hashlib
import os
import pickle
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf
from scipy.signal import welch

from render.dither import dither_block, dither_init, dither_seed, lsb_for
from render.errors import ParameterError
from render.units import power_to_db

JOB = "3f" * 32
MAIN = Path(__file__).resolve().parents[1]


def fresh(channels=1, *, job=JOB, source="scene12/take3.wav", stem="wet"):
    return dither_init(dither_seed(job_sha256=job, source_key=source, stem=stem), channels=channels)


def dither_all(x, subtype="PCM_16", **seed):
    y, state = dither_block(x, fresh(x.shape[1], **seed), subtype=subtype)
    return y, state


def error_lsb(x, subtype="PCM_16"):
    """Total error (output - input) in LSB."""
    y, _ = dither_all(x, subtype)
    return (y - x)[:, 0] / lsb_for(subtype)


N = 1 << 18  # samples for the statistics: the variance estimate's spread is ~0.3 %


# --------------------------------------------------------------------------- seeds


def test_seed_is_the_documented_hash():
    # sha256(b"render.dither.v1" + for each field: 8-byte big-endian length + UTF-8 bytes)
    material = b"render.dither.v1"
    for text in (JOB, "scene12/take3.wav", "wet"):
        data = text.encode("utf-8")
        material += len(data).to_bytes(8, "big") + data
    expected = int.from_bytes(hashlib.sha256(material).digest(), "big")
    assert dither_seed(job_sha256=JOB, source_key="scene12/take3.wav", stem="wet").entropy == expected


def test_same_seed_gives_bit_identical_output(rng):
    x = rng.uniform(-0.5, 0.5, (5000, 2))
    a, _ = dither_all(x, "PCM_24")
    b, _ = dither_all(x, "PCM_24")
    assert np.array_equal(a, b)


@pytest.mark.parametrize("change", [dict(stem="dry"), dict(source="scene12/take4.wav"), dict(job="40" * 32)])
def test_another_file_gets_other_noise(change):
    x = np.full((4000, 1), 0.25 * lsb_for("PCM_16"))  # between grid points: the noise decides
    a, _ = dither_all(x)
    b, _ = dither_all(x, **change)
    assert np.mean(a != b) > 0.3


def test_seed_does_not_depend_on_the_process():
    # A fresh interpreter with another string-hash seed reproduces the same samples.
    code = (
        "import numpy as np, hashlib\n"
        "from render.dither import dither_seed, dither_init, dither_block\n"
        f"s = dither_init(dither_seed(job_sha256='{JOB}', source_key='a.wav', stem='wet'), channels=2)\n"
        "y, _ = dither_block(np.zeros((1000, 2)), s, subtype='PCM_16')\n"
        "print(hashlib.sha256(y.tobytes()).hexdigest())\n"
    )
    env = dict(os.environ, PYTHONHASHSEED="12345")
    out = subprocess.run([sys.executable, "-c", code], cwd=MAIN, env=env, capture_output=True, text=True, check=True)
    here, _ = dither_block(
        np.zeros((1000, 2)),
        dither_init(dither_seed(job_sha256=JOB, source_key="a.wav", stem="wet"), channels=2),
        subtype="PCM_16",
    )
    assert out.stdout.strip() == hashlib.sha256(here.tobytes()).hexdigest()


# --------------------------------------------------------------------------- streaming


@pytest.mark.parametrize("frames, block", [(300, 1), (20000, 7), (20000, 4801), (20000, 30000)])
def test_block_by_block_equals_one_pass_exactly(frames, block, rng):
    x = rng.uniform(-1.1, 1.1, (frames, 2))  # some clipping too
    one_pass, one_state = dither_all(x, "PCM_24")
    state = fresh(2)
    parts = []
    for start in range(0, frames, block):
        y, state = dither_block(x[start:start + block], state, subtype="PCM_24")
        parts.append(y)
    assert np.array_equal(np.concatenate(parts), one_pass)
    assert state.frames == frames and state.clipped_samples == one_state.clipped_samples


def _recorded_material():
    """Two tones with a little offset, some samples beyond full scale; 70 000 frames (several pieces)."""
    t = np.arange(70_000)[:, None]
    x = 0.9 * np.sin(2 * np.pi * np.array([997.0, 1999.0]) * t / 48000) + np.array([0.0, 3e-6])
    x[1000:1010] = [1.2, -1.3]
    x[50_000:50_005] = [-1.0, 1.0]
    return x


@pytest.mark.parametrize("subtype, sha256, clipped", [
    ("PCM_16", "4630d919d9bb1ce8803ade3f00e5e3b2b3326c6c5f8cddd7e83752f68df475ad", 24),
    ("PCM_24", "5d2d854077b279bbb4f1bbbb6248ab1d2e06a64fd17310cabb9fb79a08ad13dd", 24),
    ("PCM_U8", "9a33ad3db03bbd4858fd1feb6734443b27087d43d20e7eaa5ace9086cef9dc14", 24),
])
def test_output_bits_match_the_recorded_stream(subtype, sha256, clipped):
    # The output bits are part of reproducibility (our choice): values recorded from this
    # module as of commit 547ac99, before it processed blocks piece by piece.
    y, state = dither_all(_recorded_material(), subtype)
    assert hashlib.sha256(y.astype("<f8").tobytes()).hexdigest() == sha256
    assert state.clipped_samples == clipped


@pytest.mark.parametrize("layout", ["float32", "fortran", "strided"])
def test_other_input_layouts_give_the_same_output(layout, rng):
    x = rng.uniform(-1.05, 1.05, (40_000, 2)).astype(np.float32).astype(np.float64)
    y = {"float32": x.astype(np.float32), "fortran": np.asfortranarray(x),
         "strided": np.repeat(x, 2, axis=1)[:, ::2]}[layout]
    a, sa = dither_all(x, "PCM_24")
    b, sb = dither_all(y, "PCM_24")
    assert np.array_equal(a, b) and sa == sb and b.flags.c_contiguous


def test_state_survives_pickling(rng):
    x = rng.uniform(-0.5, 0.5, (2000, 2))
    _, state = dither_block(x[:1000], fresh(2), subtype="PCM_16")
    copy = pickle.loads(pickle.dumps(state))
    a, _ = dither_block(x[1000:], state, subtype="PCM_16")
    b, _ = dither_block(x[1000:], copy, subtype="PCM_16")
    assert np.array_equal(a, b)


# --------------------------------------------------------------------------- the grid


@pytest.mark.parametrize("subtype, lsb", [("PCM_16", 2.0**-15), ("PCM_24", 2.0**-23), ("PCM_32", 2.0**-31),
                                          ("PCM_U8", 2.0**-7), ("pcm_24", 2.0**-23)])
def test_output_is_on_the_grid_and_in_range(subtype, lsb, rng):
    x = rng.uniform(-1.2, 1.2, (20000, 1))
    y, _ = dither_all(x, subtype)
    levels = y / lsb
    assert np.array_equal(levels, np.round(levels))
    assert y.min() >= -1.0 and y.max() <= 1.0 - lsb
    assert y.dtype == np.float64 and y.flags.c_contiguous


@pytest.mark.parametrize("subtype, fmt", [("PCM_24", "WAV"), ("PCM_16", "WAV"), ("PCM_24", "FLAC"),
                                          ("PCM_U8", "WAV")])
def test_written_and_read_back_unchanged(subtype, fmt, tmp_path, rng):
    # libsndfile truncates float -> integer (observed); values already on the grid are stored exactly
    x = np.concatenate([rng.uniform(-1.05, 1.05, (5000, 2)), np.full((3, 2), 1.0), np.full((3, 2), -1.0)])
    y, _ = dither_all(x, subtype)
    path = tmp_path / f"out.{fmt.lower()}"
    sf.write(str(path), y, 48000, subtype=subtype, format=fmt)
    back, _ = sf.read(str(path), dtype="float64", always_2d=True)
    assert np.array_equal(back, y)


def test_clipped_samples_are_counted():
    lsb = lsb_for("PCM_16")
    always = np.array([1.0 + 2 * lsb, 1.5, -1.0 - 2 * lsb, -3.0])  # beyond reach of the ±1 LSB noise
    never = np.array([1.0 - 3 * lsb, -1.0 + 2 * lsb, 0.0, 0.5])
    x = np.tile(np.concatenate([always, never]), 500)[:, None]
    y, state = dither_all(x)
    assert state.clipped_samples == 500 * always.size
    assert set(np.unique(y[np.abs(x[:, 0]) > 1.0])) == {-1.0, 1.0 - lsb}
    _, state = dither_block(x, state, subtype="PCM_16")
    assert state.clipped_samples == 2 * 500 * always.size  # accumulated


def test_clipping_in_a_later_piece_is_counted_and_clipped():
    # Pieces whose levels stay on the grid skip the range check; one that leaves it must not.
    lsb = lsb_for("PCM_16")
    x = np.zeros((100_000, 2))
    x[90_000:90_100] = [1.5, -1.0 - 4 * lsb]
    y, state = dither_all(x)
    assert state.clipped_samples == 200
    assert set(np.unique(y[90_000:90_100, 0])) == {1.0 - lsb} and set(np.unique(y[90_000:90_100, 1])) == {-1.0}


def test_finite_samples_beyond_the_float_range_are_clipped_not_refused():
    # 1e300 * 2**31 overflows to infinity, yet the sample is finite: clipped and counted.
    x = np.zeros((10, 1))
    x[3, 0], x[7, 0] = 1e300, -1e300
    with np.errstate(over="ignore"):  # numpy's warning about the overflow, as before
        y, state = dither_all(x, "PCM_32")
    assert state.clipped_samples == 2 and y[3, 0] == 1.0 - 2.0**-31 and y[7, 0] == -1.0


# --------------------------------------------------------------------------- statistics


def test_error_of_a_low_level_sine_has_zero_mean_and_a_quarter_lsb_squared():
    n = np.arange(N)
    x = (10 ** (-60 / 20) * np.sin(2 * np.pi * 997 * n / 48000))[:, None]  # -60 dBFS, ~33 LSB
    e = error_lsb(x)
    # TPDF: mean 0, variance LSB^2/12 (rounding) + LSB^2/6 (dither) = LSB^2/4 (Lipshitz et al. 1992)
    assert abs(e.mean()) < 0.005
    assert e.var() / 0.25 == pytest.approx(1.0, abs=0.02)
    # and uncorrelated with the signal
    assert abs(np.corrcoef(e, x[:, 0])[0, 1]) < 0.01


@pytest.mark.parametrize("offset_lsb", [0.0, 0.3, 0.5, 0.7])
def test_error_moments_do_not_depend_on_the_input(offset_lsb):
    # A DC value offset_lsb above a grid point.  With TPDF dither the error's mean and variance are
    # the same for every offset (Lipshitz et al. 1992); plain rectangular dither would give a
    # variance of offset * (1 - offset): 0, 0.21, 0.25, 0.21 (from the same analysis).
    lsb = lsb_for("PCM_16")
    x = np.full((N, 1), (1234 + offset_lsb) * lsb)
    e = error_lsb(x)
    assert abs(e.mean()) < 0.005
    assert e.var() / 0.25 == pytest.approx(1.0, abs=0.02)


def test_error_spectrum_is_flat():
    n = np.arange(N)
    x = (10 ** (-60 / 20) * np.sin(2 * np.pi * 997 * n / 48000))[:, None]
    e = error_lsb(x)
    freqs, psd = welch(e, fs=48000, nperseg=1024)  # scipy as the reference library
    bands = np.array_split(psd[1:-1], 16)  # 16 bands of 32 bins, DC and Nyquist bins left out
    levels = power_to_db(np.array([b.mean() for b in bands]))
    assert levels.max() - levels.min() < 1.0  # within ±0.5 dB of each other
    # white: the one-sided density is the variance spread over 0 .. 24 kHz
    assert np.mean(psd[1:-1]) * 24000 / e.var() == pytest.approx(1.0, abs=0.02)


# --------------------------------------------------------------------------- errors


@pytest.mark.parametrize("subtype, match", [
    ("FLOAT", "subtype = 'FLOAT': floating-point output takes no dither"),
    ("DOUBLE", "subtype = 'DOUBLE': floating-point output takes no dither"),
    ("PCM_20", "subtype = 'PCM_20': expected one of"),
])
def test_subtypes_without_a_grid_are_refused(subtype, match):
    with pytest.raises(ParameterError, match=match):
        dither_block(np.zeros((4, 1)), fresh(1), subtype=subtype)


@pytest.mark.parametrize("block, match", [
    (np.zeros((4, 2)), "block has 2 channels: expected 1"),
    (np.zeros(4), r"block\.ndim = 1"),
    (np.zeros((4, 1), dtype=np.int16), r"block\.dtype = int16"),
    (np.full((4, 1), np.inf), "NaN or infinite"),
])
def test_bad_blocks_are_refused(block, match):
    with pytest.raises(ParameterError, match=match):
        dither_block(block, fresh(1), subtype="PCM_16")


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("frame", [0, 40_000, 49_999])  # first piece, a later one, the last frame
def test_non_finite_samples_are_refused_in_any_piece(bad, frame):
    # The finiteness check runs only for pieces whose rounded levels leave the grid's range,
    # which a NaN or infinite sample always makes them do.
    x = np.zeros((50_000, 2))
    x[frame, 1] = bad
    with pytest.raises(ParameterError, match="block contains NaN or infinite samples"):
        dither_block(x, fresh(2), subtype="PCM_24")


def test_bad_seeds_are_refused():
    with pytest.raises(ParameterError, match="job_sha256 = 'abc': expected 64 hexadecimal digits"):
        dither_seed(job_sha256="abc", source_key="a", stem="b")
    with pytest.raises(ParameterError, match="stem is a int: expected a str"):
        dither_seed(job_sha256=JOB, source_key="a", stem=3)
    with pytest.raises(ParameterError, match="seed_sequence is a int"):
        dither_init(42, channels=1)
    with pytest.raises(ParameterError, match="channels = 0"):
        dither_init(np.random.SeedSequence(1), channels=0)
