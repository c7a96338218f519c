"""Audio file I/O: round trips, streamed reads, clear errors, and outputs that appear only when complete."""

from __future__ import annotations

import hashlib
import os
import re

import numpy as np
import pytest
import soundfile as sf

from render.audio_io import (
    RF64_MARGIN_BYTES,
    RIFF_LIMIT_BYTES,
    AudioInfo,
    BlockWriter,
    output_format,
    predicted_bytes,
    probe,
    read_all,
    read_blocks,
    sha256_file,
    write_response,
)
from render.errors import AudioInputError, OutputError, ParameterError

RATE_HZ = 48000
#: One least significant bit at full scale 1.0 (a B-bit PCM sample spans [-1, 1) in steps of 2^-(B-1)).
LSB = {"PCM_16": 2.0**-15, "PCM_24": 2.0**-23}

FORMATS = [("WAV", "PCM_16"), ("WAV", "PCM_24"), ("WAV", "FLOAT"), ("FLAC", "PCM_16"), ("FLAC", "PCM_24")]


def _noise(seed, frames, channels):
    return np.random.default_rng(seed).uniform(-1.0, 1.0, (frames, channels))


def _write(path, x, *, format, subtype, rate_hz=RATE_HZ, block_frames=333):
    with BlockWriter(path, rate_hz=rate_hz, channels=x.shape[1], format=format, subtype=subtype) as w:
        for start in range(0, len(x), block_frames):
            w.write(x[start : start + block_frames])
    return w


def _listing(folder):
    return sorted(p.name for p in folder.iterdir())


# ---------------------------------------------------------------- round trips


@pytest.mark.parametrize("format, subtype", FORMATS)
@pytest.mark.parametrize("channels", [1, 2, 6])
def test_round_trip_keeps_rate_channels_subtype_and_length(tmp_path, format, subtype, channels):
    path = tmp_path / f"x.{format.lower()}"
    x = _noise(channels, 2001, channels)  # odd length: a pad byte in 8-bit/24-bit mono WAV
    w = _write(path, x, format=format, subtype=subtype, rate_hz=44100)
    assert w.frames_written == 2001
    info = probe(path)
    expected = AudioInfo(path=str(path), frames=2001, rate_hz=44100, channels=channels, subtype=subtype, format=format)
    assert info == expected
    y, rate_hz = read_all(path)
    assert rate_hz == 44100 and y.shape == (2001, channels) and y.dtype == np.float64 and y.flags.c_contiguous
    if subtype == "FLOAT":
        np.testing.assert_array_equal(y, x.astype(np.float32))  # float32 samples stored as they are
    else:
        assert np.max(np.abs(y - x)) <= LSB[subtype]  # within 1 LSB of the written value


def test_pcm_24_round_trip_within_one_lsb_across_full_scale(tmp_path):
    x = np.concatenate([_noise(24, 20000, 2), [[1.0, -1.0], [0.999999, -0.999999], [0.0, 2.0**-23]]])
    for format in ("WAV", "FLAC"):
        path = tmp_path / f"x.{format.lower()}"
        _write(path, x, format=format, subtype="PCM_24")
        y, _ = read_all(path)
        assert np.max(np.abs(y - x)) <= 2.0**-23


@pytest.mark.parametrize("subtype", ["PCM_16", "PCM_24"])
def test_levels_beyond_full_scale_saturate_instead_of_wrapping(tmp_path, subtype):
    path = tmp_path / "hot.wav"
    _write(path, np.array([[1.5], [-1.5], [0.5]]), format="WAV", subtype=subtype)
    y, _ = read_all(path)
    np.testing.assert_allclose(y[:, 0], [1.0, -1.0, 0.5], rtol=0, atol=LSB[subtype])


def test_peak_and_frames_written(tmp_path):
    x = 0.5 * _noise(3, 1000, 2)
    x[617, 1] = -0.8125
    w = _write(tmp_path / "p.wav", x, format="WAV", subtype="FLOAT", block_frames=100)
    assert w.peak == 0.8125 and w.frames_written == 1000


# ---------------------------------------------------------------- streamed reads


@pytest.mark.parametrize(
    "format, subtype", [("WAV", "PCM_16"), ("WAV", "PCM_24"), ("FLAC", "PCM_24"), ("WAV", "PCM_32"), ("WAV", "FLOAT")]
)
@pytest.mark.parametrize("block_frames", [1, 7, 1000, 5000])
def test_read_blocks_concatenated_equals_read_all(tmp_path, format, subtype, block_frames):
    path = tmp_path / f"x.{format.lower()}"
    frames = 300 if block_frames == 1 else 2500
    sf.write(path, _noise(5, frames, 2), RATE_HZ, subtype=subtype, format=format)
    blocks = list(read_blocks(path, block_frames=block_frames))
    for b in blocks[:-1]:
        assert b.shape == (block_frames, 2)
    assert all(b.ndim == 2 and b.dtype == np.float64 and b.flags.c_contiguous for b in blocks)
    whole, _ = read_all(path)
    np.testing.assert_array_equal(np.concatenate(blocks), whole)


@pytest.mark.parametrize("subtype", ["DOUBLE", "PCM_32"])
def test_wide_sources_are_read_without_loss(tmp_path, subtype):
    path = tmp_path / "wide.wav"
    x = _noise(6, 1000, 1) * 0.9
    sf.write(path, x, RATE_HZ, subtype=subtype)
    y = np.concatenate(list(read_blocks(path, block_frames=64, dtype_read="float32")))
    np.testing.assert_array_equal(y, read_all(path)[0])
    through_float32, _ = sf.read(path, dtype="float32", always_2d=True)
    assert np.any(y != through_float32)  # float32 would have lost bits; these were read as float64
    if subtype == "DOUBLE":
        np.testing.assert_array_equal(y, x)
    else:
        assert np.max(np.abs(y - x)) <= 2.0**-31  # within 1 LSB of 32-bit PCM


def test_read_blocks_mono_is_two_dimensional(tmp_path):
    path = tmp_path / "mono.flac"
    sf.write(path, _noise(8, 100, 1)[:, 0], RATE_HZ, subtype="PCM_16")
    blocks = list(read_blocks(path, block_frames=30))
    assert [b.shape for b in blocks] == [(30, 1), (30, 1), (30, 1), (10, 1)]


# ---------------------------------------------------------------- input errors


def test_missing_file_names_the_path(tmp_path):
    path = tmp_path / "absent.wav"
    for call in (probe, read_all, lambda p: read_blocks(p, block_frames=100)):
        with pytest.raises(AudioInputError, match=re.escape(str(path)) + r": cannot open audio file: no such file"):
            call(path)


def test_corrupt_file_names_the_path_and_the_reason(tmp_path):
    path = tmp_path / "noise.wav"
    path.write_bytes(np.random.default_rng(0).bytes(4000))
    for call in (probe, read_all, lambda p: read_blocks(p, block_frames=100)):
        with pytest.raises(AudioInputError, match=re.escape(str(path)) + r": cannot open audio file: \S"):
            call(path)


def test_failure_part_way_through_is_an_audio_input_error(tmp_path):
    path = tmp_path / "cut.flac"
    sf.write(path, _noise(9, 20000, 2), RATE_HZ, subtype="PCM_16")
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])  # header intact, stream cut in the middle
    with pytest.raises(AudioInputError, match=re.escape(str(path)) + r": (read failed after frame|file ends at frame)"):
        for _ in read_blocks(path, block_frames=1000):
            pass


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"block_frames": 0}, r"block_frames = 0: must be an integer >= 1"),
        ({"block_frames": 10, "dtype_read": "int16"}, r"dtype_read = 'int16': expected 'float32' or 'float64'"),
    ],
)
def test_bad_read_arguments(tmp_path, kwargs, match):
    path = tmp_path / "ok.wav"
    sf.write(path, np.zeros((10, 1)), RATE_HZ, subtype="PCM_16")
    with pytest.raises(ParameterError, match=match):
        read_blocks(path, **kwargs)


# ---------------------------------------------------------------- atomic output


def test_exception_inside_writer_leaves_no_file_and_no_temporary(tmp_path):
    final = tmp_path / "out.wav"
    with pytest.raises(KeyError):
        with BlockWriter(final, rate_hz=RATE_HZ, channels=2, format="WAV", subtype="PCM_24") as w:
            w.write(_noise(1, 500, 2))
            raise KeyError("stop")
    assert _listing(tmp_path) == []


def test_temporary_sits_beside_the_destination_until_commit(tmp_path):
    final = tmp_path / "out.flac"
    w = BlockWriter(final, rate_hz=RATE_HZ, channels=1, format="FLAC", subtype="PCM_16")
    w.write(_noise(2, 100, 1))
    (temp,) = _listing(tmp_path)
    assert re.fullmatch(r"\.out\.flac\.[0-9a-f]+\.part", temp)
    assert not final.exists()
    assert w.commit() == str(final)
    assert _listing(tmp_path) == ["out.flac"] and probe(final).frames == 100


def test_abort_keeps_an_existing_file_untouched(tmp_path):
    final = tmp_path / "out.wav"
    final.write_bytes(b"previous render")
    w = BlockWriter(final, rate_hz=RATE_HZ, channels=1, format="WAV", subtype="PCM_16")
    w.write(np.zeros((10, 1)))
    w.abort()
    w.abort()  # twice is harmless
    assert _listing(tmp_path) == ["out.wav"] and final.read_bytes() == b"previous render"
    with pytest.raises(OutputError, match=r"write after the file was aborted"):
        w.write(np.zeros((10, 1)))


def test_commit_replaces_an_existing_file(tmp_path):
    final = tmp_path / "out.wav"
    final.write_bytes(b"previous render")
    _write(final, np.zeros((10, 2)), format="WAV", subtype="PCM_16")
    assert probe(final).frames == 10 and _listing(tmp_path) == ["out.wav"]


@pytest.mark.parametrize("durable, syncs", [(True, 2), (False, 0)])
def test_durable_writers_flush_file_and_folder_scratch_writers_do_not(tmp_path, monkeypatch, durable, syncs):
    # A stem is flushed (the file, then its folder) before it counts as written; a scratch file is
    # not, but it still appears only complete, by rename (our design).
    calls = []
    real_fsync = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: (calls.append(fd), real_fsync(fd))[1])
    final = tmp_path / "out.wav"
    with BlockWriter(final, rate_hz=RATE_HZ, channels=1, format="WAV", subtype="DOUBLE", durable=durable) as w:
        w.write(np.full((10, 1), 0.5))
        assert not final.exists()
    assert len(calls) == (syncs if os.name == "posix" else min(syncs, 1))
    assert _listing(tmp_path) == ["out.wav"] and sf.read(str(final))[0].tolist() == [0.5] * 10


@pytest.mark.skipif(os.name != "posix", reason="POSIX permission bits")
def test_final_file_has_ordinary_permissions(tmp_path):
    umask = os.umask(0o022)
    os.umask(umask)
    final = tmp_path / "out.wav"
    _write(final, np.zeros((10, 1)), format="WAV", subtype="PCM_16")
    assert final.stat().st_mode & 0o777 == 0o666 & ~umask


def test_writer_errors(tmp_path):
    with pytest.raises(OutputError, match=r"folder .*missing does not exist"):
        BlockWriter(tmp_path / "missing" / "out.wav", rate_hz=RATE_HZ, channels=1, format="WAV", subtype="PCM_16")
    with pytest.raises(OutputError, match=r"format = 'FLAC', subtype = 'FLOAT': expected a pair from output_format"):
        BlockWriter(tmp_path / "out.flac", rate_hz=RATE_HZ, channels=1, format="FLAC", subtype="FLOAT")
    with BlockWriter(tmp_path / "out.wav", rate_hz=RATE_HZ, channels=2, format="WAV", subtype="FLOAT") as w:
        with pytest.raises(OutputError, match=r"block has shape \(10, 1\): expected \(frames, 2\)"):
            w.write(np.zeros((10, 1)))
        with pytest.raises(OutputError, match=r"block at frame 0 contains NaN or infinite samples"):
            w.write(np.full((10, 2), np.nan))
        w.write(np.zeros((4, 2)))
    assert probe(tmp_path / "out.wav").frames == 4
    assert _listing(tmp_path) == ["out.wav"]


def test_empty_flac_is_refused(tmp_path):
    with pytest.raises(OutputError, match=r"no frames written: a FLAC file needs at least 1 frame"):
        with BlockWriter(tmp_path / "e.flac", rate_hz=RATE_HZ, channels=1, format="FLAC", subtype="PCM_16"):
            pass
    assert _listing(tmp_path) == []


# ---------------------------------------------------------------- formats and sizes


def _source(subtype, format="WAV"):
    return AudioInfo(path="in.wav", frames=48000, rate_hz=RATE_HZ, channels=2, subtype=subtype, format=format)


@pytest.mark.parametrize(
    "fmt, sub, source_subtype, expected",
    [
        ("wav", "same", "PCM_24", ("WAV", "PCM_24")),
        ("wav", "same", "FLOAT", ("WAV", "FLOAT")),
        ("wav", "same", "DOUBLE", ("WAV", "DOUBLE")),
        ("flac", "same", "PCM_16", ("FLAC", "PCM_16")),
        ("flac", "same", "PCM_U8", ("FLAC", "PCM_S8")),
        ("WAV", "pcm_16", "FLOAT", ("WAV", "PCM_16")),
        ("flac", "PCM_24", "FLOAT", ("FLAC", "PCM_24")),
        ("wav", "FLOAT", "PCM_16", ("WAV", "FLOAT")),
    ],
)
def test_output_format_choices(fmt, sub, source_subtype, expected):
    source = _source(source_subtype)
    got = output_format(requested_format=fmt, requested_subtype=sub, source=source, predicted_bytes=1000)
    assert got == expected


def test_wav_becomes_rf64_above_the_riff_limit():
    src = _source("PCM_24")
    threshold = RIFF_LIMIT_BYTES - RF64_MARGIN_BYTES
    assert threshold < 2**32  # a RIFF header's size fields are 32-bit (RF64, EBU Tech 3306, lifts it; from memory)
    for size, expected in [(threshold, "WAV"), (threshold + 1, "RF64"), (2**32, "RF64"), (6 * 2**30, "RF64")]:
        got = output_format(requested_format="wav", requested_subtype="same", source=src, predicted_bytes=size)
        assert got == (expected, "PCM_24")
    # FLAC has no such limit
    got = output_format(requested_format="flac", requested_subtype="same", source=src, predicted_bytes=6 * 2**30)
    assert got == ("FLAC", "PCM_24")
    # Three hours of 8-channel 24-bit audio at 96 kHz: about 25 GB
    big = predicted_bytes(frames=3 * 3600 * 96000, channels=8, subtype="PCM_24", format="WAV")
    assert big > 3 * 3600 * 96000 * 8 * 3
    got = output_format(requested_format="wav", requested_subtype="same", source=src, predicted_bytes=big)
    assert got == ("RF64", "PCM_24")


@pytest.mark.parametrize(
    "fmt, sub, source_subtype, match",
    [
        (
            "flac",
            "same",
            "FLOAT",
            r"in\.wav: subtype = 'same' keeps the source's FLOAT, which FLAC cannot store "
            r".*set subtype to 'PCM_24' or 'PCM_16', or format to 'wav'",
        ),
        ("flac", "same", "PCM_32", r"keeps the source's PCM_32, which FLAC cannot store"),
        ("flac", "FLOAT", "PCM_24", r"subtype = 'FLOAT': FLAC has no floating-point samples"),
        ("wav", "same", "VORBIS", r"keeps the source's VORBIS, which WAV cannot store"),
        ("mp3", "same", "PCM_24", r"format = 'mp3': expected 'wav' or 'flac'"),
        ("wav", "PCM_20", "PCM_24", r"subtype = 'PCM_20': expected 'same', 'PCM_16', 'PCM_24' or 'FLOAT'"),
    ],
)
def test_output_format_refuses_what_cannot_be_stored(fmt, sub, source_subtype, match):
    with pytest.raises(OutputError, match=match):
        output_format(requested_format=fmt, requested_subtype=sub, source=_source(source_subtype), predicted_bytes=1000)


@pytest.mark.parametrize("format, subtype", FORMATS + [("RF64", "PCM_24"), ("WAV", "DOUBLE")])
@pytest.mark.parametrize("channels, frames", [(1, 1), (1, 1001), (2, 1001), (6, 4097)])
def test_predicted_bytes_bounds_the_written_size(tmp_path, format, subtype, channels, frames):
    path = tmp_path / "s.bin"
    _write(path, _noise(frames, frames, channels), format=format, subtype=subtype)
    actual = path.stat().st_size
    predicted = predicted_bytes(frames=frames, channels=channels, subtype=subtype, format=format)
    assert predicted >= actual
    if format != "FLAC":
        # WAV/RF64: the samples exactly, plus a header bound of 132 + 8 per channel bytes
        assert predicted - actual <= 132 + 8 * channels


def test_predicted_bytes_sizes_before_the_container_check():
    # A float source sized for FLAC counts as 24-bit, so the planner can size first and let output_format refuse.
    as_flac = predicted_bytes(frames=1000, channels=2, subtype="FLOAT", format="flac")
    assert as_flac == predicted_bytes(frames=1000, channels=2, subtype="PCM_24", format="FLAC")
    with pytest.raises(OutputError, match=r"subtype = 'VORBIS': no size known"):
        predicted_bytes(frames=1000, channels=2, subtype="VORBIS", format="WAV")
    with pytest.raises(OutputError, match=r"format = 'mp3': expected 'WAV', 'RF64' or 'FLAC'"):
        predicted_bytes(frames=1000, channels=2, subtype="PCM_16", format="mp3")


@pytest.mark.parametrize("rate_hz", [48000, 48000.0])
def test_write_response_is_a_float_wav(tmp_path, rate_hz):
    ir = _noise(12, 777, 2) * 1.5  # levels above full scale survive in float
    path = tmp_path / "room.wav"
    assert write_response(path, ir, rate_hz=rate_hz) == str(path)
    info = probe(path)
    assert (info.format, info.subtype, info.rate_hz, info.channels, info.frames) == ("WAV", "FLOAT", 48000, 2, 777)
    np.testing.assert_array_equal(read_all(path)[0], ir.astype(np.float32))
    assert _listing(tmp_path) == ["room.wav"]
    with pytest.raises(OutputError, match=r"rate_hz = 44100.5: must be a whole number >= 1 Hz"):
        write_response(tmp_path / "bad.wav", ir, rate_hz=44100.5)
    assert _listing(tmp_path) == ["room.wav"]


def test_sha256_file_equals_hashlib_on_the_bytes(tmp_path):
    path = tmp_path / "h.wav"
    _write(path, _noise(4, 3000, 2), format="WAV", subtype="PCM_24")
    expected = hashlib.sha256(path.read_bytes()).hexdigest()  # hashlib as the reference
    for chunk_bytes in (1, 7, 4096, 1 << 20):
        assert sha256_file(path, chunk_bytes=chunk_bytes) == expected
    empty = tmp_path / "empty"
    empty.write_bytes(b"")
    assert sha256_file(empty) == hashlib.sha256(b"").hexdigest()
    with pytest.raises(AudioInputError, match=re.escape(str(tmp_path / "none")) + r": cannot read for hashing"):
        sha256_file(tmp_path / "none")
