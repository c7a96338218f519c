"""Specification of render.riff: chunk listing, Broadcast WAV metadata, chunk insertion."""

from __future__ import annotations

import struct

import numpy as np
import pytest
import soundfile as sf

from render import riff
from render.errors import AudioInputError, ParameterError
from render.riff import (
    BEXT_FIXED_BYTES,
    Bext,
    ChunkError,
    coding_history_line,
    insert_chunks,
    read_chunks,
    read_metadata,
)

# 23:59:59 at 192 kHz, in samples since midnight: above 2**32, so both 32-bit halves are used
LATE_AT_192K = (23 * 3600 + 59 * 60 + 59) * 192000


def make_wav(path, rng, *, frames=1001, channels=2, fmt="WAV", subtype="PCM_24", rate_hz=48000):
    x = rng.uniform(-0.9, 0.9, (frames, channels))
    sf.write(str(path), x, rate_hz, subtype=subtype, format=fmt)
    audio, _ = sf.read(str(path), dtype="float64", always_2d=True)
    return audio


def sample_bext(time_reference=LATE_AT_192K):
    return Bext(
        description="Scene 12, take 3, boom",
        originator="render tests",
        originator_reference="REF-0001",
        origination_date="2026-12-01",
        origination_time="23:59:59",
        time_reference_samples=time_reference,
        umid=bytes(range(64)),
        loudness_value_lufs=-23.0,
        max_true_peak_level_dbtp=-1.0,
        coding_history=coding_history_line(rate_hz=192000, bits=24, channels=2, text="render 0.1.0"),
    )


def payload(path, chunk):
    with open(path, "rb") as f:
        f.seek(chunk.payload_offset)
        return f.read(chunk.size)


def by_id(path):
    chunks = read_chunks(path)
    return {c.id: c for c in chunks}, chunks


def hand_made_wav(extra_chunks, samples=(0, 1000, -1000, 32767, -32768)):
    """A 16-bit mono 48 kHz WAV built byte by byte, extra chunks before 'data' (RIFF layout)."""
    fmt = struct.pack("<HHIIHH", 1, 1, 48000, 96000, 2, 16)
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt
    for cid, data in extra_chunks:
        body += cid + struct.pack("<I", len(data)) + data + (b"\0" if len(data) & 1 else b"")
    pcm = struct.pack(f"<{len(samples)}h", *samples)
    body += b"data" + struct.pack("<I", len(pcm)) + pcm
    return b"RIFF" + struct.pack("<I", len(body)) + body


# --------------------------------------------------------------------------- insertion


@pytest.mark.parametrize("fmt", ["WAV", "RF64"])
@pytest.mark.parametrize("channels, frames", [(1, 1001), (2, 1000)])  # mono odd frames: odd data chunk
@pytest.mark.parametrize("time_reference", [0, LATE_AT_192K, 2**40 + 12345, 2**64 - 1])
def test_bext_and_ixml_round_trip(tmp_path, rng, fmt, channels, frames, time_reference):
    path = tmp_path / "take.wav"
    audio = make_wav(path, rng, frames=frames, channels=channels, fmt=fmt)
    before = sf.info(str(path))
    bext = sample_bext(time_reference)
    ixml = b"<?xml version=\"1.0\"?><BWFXML><IXML_VERSION>1.5</IXML_VERSION></BWFXML>"
    insert_chunks(path, [("bext", bext.to_bytes()), ("iXML", ixml)])

    # our reader: the same dataclass, the same payload bytes, the 64-bit time reference split
    # low word first (EBU Tech 3285)
    meta = read_metadata(path)
    assert meta.bext == bext and meta.ixml == ixml and meta.notes == ()
    chunks, order = by_id(path)
    stored = payload(path, chunks["bext"])
    assert stored.rstrip(b"\0") == bext.to_bytes().rstrip(b"\0")
    low, high = struct.unpack_from("<II", stored, 338)
    assert low + (high << 32) == time_reference
    assert Bext.from_bytes(stored).to_bytes() == bext.to_bytes()

    # placed before the audio, structure chunks first
    assert chunks["bext"].offset < chunks["iXML"].offset < chunks["data"].offset
    assert order[0].id == ("ds64" if fmt == "RF64" else "fmt ")

    # soundfile still reads the same audio, format, rate and subtype
    after = sf.info(str(path))
    assert (after.frames, after.samplerate, after.channels, after.subtype, after.format) == (
        before.frames, before.samplerate, before.channels, before.subtype, before.format)
    back, _ = sf.read(str(path), dtype="float64", always_2d=True)
    assert np.array_equal(back, audio)


def test_riff_sizes_are_rewritten(tmp_path, rng):
    path = tmp_path / "a.wav"
    make_wav(path, rng, frames=1001, channels=1)  # 3003-byte data chunk: odd
    insert_chunks(path, [("iXML", b"<BWFXML/>")])  # 9 bytes: odd
    data = path.read_bytes()
    assert struct.unpack_from("<I", data, 4)[0] == len(data) - 8  # RIFF size: file size - 8
    chunks, _ = by_id(path)
    ixml = chunks["iXML"]
    assert ixml.size == 9
    # RIFF rule: one zero pad byte after an odd chunk, not counted in its size
    assert data[ixml.payload_offset + 9] == 0
    assert chunks["data"].offset == ixml.payload_offset + 10
    assert len(data) == chunks["data"].payload_offset + 3003 + 1


def test_rf64_sizes_are_rewritten_and_odd_chunks_made_even(tmp_path, rng):
    path = tmp_path / "a.wav"
    make_wav(path, rng, frames=1001, channels=1, fmt="RF64")
    insert_chunks(path, [("iXML", b"<BWFXML/>")])
    data = path.read_bytes()
    assert data[:4] == b"RF64" and struct.unpack_from("<I", data, 4)[0] == 0xFFFFFFFF  # EBU Tech 3306
    riff_size, data_size, sample_count = struct.unpack_from("<QQQ", data, 20)
    chunks, _ = by_id(path)
    assert riff_size == len(data) - 8 and data_size == chunks["data"].size == 3003 and sample_count == 1001
    # in RF64 the pad byte is counted in the chunk (libsndfile's RF64 reader needs even chunks)
    assert chunks["iXML"].size == 10 and payload(path, chunks["iXML"]) == b"<BWFXML/>\0"
    assert read_metadata(path).ixml == b"<BWFXML/>"


def test_an_existing_chunk_is_replaced(tmp_path, rng):
    path = tmp_path / "a.wav"
    audio = make_wav(path, rng)
    insert_chunks(path, [("bext", Bext(description="first").to_bytes())])
    insert_chunks(path, [("bext", Bext(description="second").to_bytes()), ("iXML", b"<x/>")])
    ids = [c.id for c in read_chunks(path)]
    assert ids == ["fmt ", "bext", "iXML", "data"]
    assert read_metadata(path).bext.description == "second"
    assert np.array_equal(sf.read(str(path), always_2d=True)[0], audio)


def test_the_audio_is_copied_in_pieces(tmp_path, rng, monkeypatch):
    monkeypatch.setattr(riff, "COPY_BYTES", 7)  # many short reads, one not a whole frame
    path = tmp_path / "a.wav"
    audio = make_wav(path, rng, frames=999, channels=2)
    insert_chunks(path, [("bext", sample_bext().to_bytes())])
    assert np.array_equal(sf.read(str(path), dtype="float64", always_2d=True)[0], audio)


@pytest.mark.parametrize("spare_bytes, form", [(0, b"RIFF"), (-1, b"RF64")])
def test_past_the_riff_limit_the_file_becomes_rf64(tmp_path, rng, monkeypatch, spare_bytes, form):
    bext = sample_bext()
    chunks = [("bext", bext.to_bytes()), ("iXML", b"<BWFXML/>")]
    path = tmp_path / "a.wav"
    audio = make_wav(path, rng, frames=600, channels=1, subtype="PCM_24")  # 1800 bytes of samples
    plain = tmp_path / "plain.wav"
    plain.write_bytes(path.read_bytes())
    insert_chunks(plain, chunks)
    riff_size = len(plain.read_bytes()) - 8
    # The 4 GiB limit, lowered so that this small file just fits, or just does not.
    monkeypatch.setattr(riff, "RIFF_MAX_BYTES", riff_size + spare_bytes)
    insert_chunks(path, chunks)
    data = path.read_bytes()
    assert data[:4] == form
    if form == b"RF64":
        big_riff_size, data_size, sample_count = struct.unpack_from("<QQQ", data, 20)  # EBU Tech 3306 ds64
        assert (big_riff_size, data_size, sample_count) == (len(data) - 8, 1800, 600)
        assert len(data) == riff_size + 8 + 36  # the ds64 chunk added
    info = sf.info(str(path))
    assert info.format == form.decode().replace("RIFF", "WAV") and info.subtype == "PCM_24" and info.frames == 600
    assert np.array_equal(sf.read(str(path), dtype="float64", always_2d=True)[0], audio)
    assert read_metadata(path).bext == bext


def test_no_temporary_file_is_left_and_a_refused_insert_changes_nothing(tmp_path, rng):
    path = tmp_path / "a.wav"
    make_wav(path, rng)
    insert_chunks(path, [("iXML", b"<x/>")])
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.wav"]
    original = path.read_bytes()
    truncated = tmp_path / "b.wav"
    truncated.write_bytes(original[:-100])  # the data chunk now runs past the end
    with pytest.raises(ChunkError, match=r"chunk 'data' at byte \d+ declares \d+ bytes but only \d+ remain"):
        insert_chunks(truncated, [("iXML", b"<y/>")])
    assert truncated.read_bytes() == original[:-100]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a.wav", "b.wav"]


@pytest.mark.parametrize("chunks, match", [
    ([("data", b"")], "chunk id 'data': the file's structure"),
    ([("fmt ", b"")], "chunk id 'fmt ': the file's structure"),
    ([("bex", b"")], "chunk id 'bex': expected 4 printable ASCII characters"),
    ([("iXML", b"a"), ("iXML", b"b")], "chunk id 'iXML' given twice"),
    ([("iXML", "text")], "chunk 'iXML' payload is a str: expected bytes"),
    ([("iXML",)], "expected an \\(id, bytes\\) pair"),
])
def test_bad_chunks_are_refused(tmp_path, rng, chunks, match):
    path = tmp_path / "a.wav"
    make_wav(path, rng)
    with pytest.raises(ParameterError, match=match):
        insert_chunks(path, chunks)


# --------------------------------------------------------------------------- reading


def test_a_file_without_metadata_has_none(tmp_path, rng):
    path = tmp_path / "a.wav"
    make_wav(path, rng)
    assert read_metadata(path) == riff.Metadata(bext=None, ixml=None, notes=())
    assert [c.id for c in read_chunks(path)] == ["fmt ", "data"]


def test_a_truncated_bext_gives_a_note_and_the_audio_still_reads(tmp_path):
    path = tmp_path / "short.wav"
    path.write_bytes(hand_made_wav([(b"bext", b"x" * 300), (b"iXML", b"<BWFXML/>")]))
    meta = read_metadata(path)
    assert meta.bext is None
    assert meta.notes == ("bext chunk is 300 bytes: expected at least 602",)
    assert meta.ixml == b"<BWFXML/>"  # the good chunk next to it is kept
    audio, _ = sf.read(str(path), dtype="int16")
    assert audio.tolist() == [0, 1000, -1000, 32767, -32768]


def test_an_ixml_that_is_not_xml_gives_a_note(tmp_path):
    path = tmp_path / "bad.wav"
    path.write_bytes(hand_made_wav([(b"iXML", b"\x00\x01binary")]))
    meta = read_metadata(path)
    assert meta.ixml is None
    assert meta.notes == ("iXML chunk starts with b'\\x00\\x01binary': expected XML ('<'), ignored",)


def test_two_bext_chunks_use_the_first(tmp_path):
    path = tmp_path / "two.wav"
    path.write_bytes(hand_made_wav([(b"bext", Bext(description="one").to_bytes()),
                                    (b"bext", Bext(description="two").to_bytes())]))
    meta = read_metadata(path)
    assert meta.bext.description == "one" and meta.notes == ("2 bext chunks: the first is used",)


@pytest.mark.parametrize("content, match", [
    (b"", "an empty file"),
    (b"fLaC\x00\x00\x00\x22" + bytes(40), r"found b'fLaC'"),
    (b"RIFF\x04\x00\x00\x00AVI ", r"form b'AVI ': expected 'WAVE'"),
])
def test_non_riff_input_raises(tmp_path, content, match):
    path = tmp_path / "x.wav"
    path.write_bytes(content)
    with pytest.raises(AudioInputError, match=match):
        read_chunks(path)
    with pytest.raises(AudioInputError, match=match):
        read_metadata(path)


def test_a_flac_file_is_not_riff(tmp_path, rng):
    path = tmp_path / "x.flac"
    make_wav(path, rng, fmt="FLAC")
    with pytest.raises(AudioInputError, match="not a RIFF/WAVE file"):
        read_chunks(path)


def test_a_missing_file_raises(tmp_path):
    with pytest.raises(AudioInputError, match="no such file"):
        read_chunks(tmp_path / "none.wav")


def test_a_chunk_running_past_the_end_is_corrupt(tmp_path):
    data = hand_made_wav([(b"bext", Bext().to_bytes())])
    path = tmp_path / "cut.wav"
    path.write_bytes(data[:400])  # inside the bext chunk
    with pytest.raises(ChunkError, match=r"chunk 'bext' at byte 36 declares 602 bytes but only 356 remain"):
        read_metadata(path)
    assert issubclass(ChunkError, AudioInputError)


# --------------------------------------------------------------------------- the bext layout


def spec_bext_bytes():
    """A version-2 bext payload packed field by field from EBU Tech 3285's layout."""
    text = lambda s, n: s.encode("ascii").ljust(n, b"\0")  # noqa: E731
    t = LATE_AT_192K
    return (
        text("Dialogue, reel 2", 256) + text("Field recorder", 32) + text("FR-77", 32)
        + text("2026-11-30", 10) + text("06:30:00", 8)
        + struct.pack("<IIH", t & 0xFFFFFFFF, t >> 32, 2) + bytes(range(100, 164))
        + struct.pack("<5h", -2300, 550, -100, 0x7FFF, -1800) + bytes(180)
        + b"A=PCM,F=192000,W=24,M=mono,T=recorder\r\n"
    )


def test_bext_fields_are_read_from_the_specified_offsets():
    data = spec_bext_bytes()
    b = Bext.from_bytes(data)
    assert (b.description, b.originator, b.originator_reference) == ("Dialogue, reel 2", "Field recorder", "FR-77")
    assert (b.origination_date, b.origination_time) == ("2026-11-30", "06:30:00")
    assert b.time_reference_samples == LATE_AT_192K and b.version == 2 and b.umid == bytes(range(100, 164))
    # version 2 loudness: int16 hundredths; 0x7FFF = not set (EBU Tech 3285 v2, from memory)
    assert (b.loudness_value_lufs, b.loudness_range_lu, b.max_true_peak_level_dbtp) == (-23.0, 5.5, -1.0)
    assert b.max_momentary_loudness_lufs is None and b.max_short_term_loudness_lufs == -18.0
    assert b.coding_history == "A=PCM,F=192000,W=24,M=mono,T=recorder\r\n"
    assert b.to_bytes() == data  # byte-exact
    assert len(data) - len(b.coding_history) == BEXT_FIXED_BYTES == 602


def test_unset_loudness_is_stored_as_7fff():
    data = Bext(loudness_value_lufs=-23.0).to_bytes()
    assert struct.unpack_from("<5h", data, 412) == (-2300, 0x7FFF, 0x7FFF, 0x7FFF, 0x7FFF)
    assert data[422:602] == bytes(180)


def test_version_1_keeps_the_loudness_bytes_reserved():
    data = Bext(version=1).to_bytes()
    assert data[412:602] == bytes(190)
    with pytest.raises(ParameterError, match="loudness fields need version >= 2"):
        Bext(version=1, loudness_range_lu=3.0)


def test_non_ascii_bytes_round_trip_and_oddities_are_noted(tmp_path):
    data = bytearray(spec_bext_bytes())
    data[0:6] = "Café ".encode("latin-1") + b"\0"  # not ASCII, as some writers do
    data[8] = ord("z")  # a stray byte after the description's NUL
    data[500] = 1  # reserved byte not zero
    b = Bext.from_bytes(bytes(data))
    assert b.description == "Café "
    path = tmp_path / "odd.wav"
    path.write_bytes(hand_made_wav([(b"bext", bytes(data))]))
    meta = read_metadata(path)
    assert meta.bext == b
    assert meta.notes == ("bext description has bytes after its terminating NUL: dropped",
                          "bext reserved bytes are not all zero: ignored")


@pytest.mark.parametrize("kwargs, match", [
    (dict(description="x" * 257), "description is 257 characters: expected at most 256"),
    (dict(originator="\u2603"), "character '\u2603' cannot be stored"),
    (dict(origination_time="a\0b"), "contains a NUL character"),
    (dict(time_reference_samples=-1), r"time_reference_samples = -1: must be an integer in 0 \.\. 2\*\*64 - 1"),
    (dict(time_reference_samples=2**64), "time_reference_samples = 18446744073709551616"),
    (dict(umid=b"short"), "umid = b'short': expected exactly 64 bytes"),
    (dict(loudness_value_lufs=400.0), r"must lie within -327\.68 \.\. 327\.66"),
    (dict(max_true_peak_level_dbtp=float("nan")), "expected a finite number or None"),
    (dict(version=70000), r"version = 70000: must be an integer in 0 \.\. 65535"),
])
def test_bad_bext_fields_are_refused(kwargs, match):
    with pytest.raises(ParameterError, match=match):
        Bext(**kwargs)


# --------------------------------------------------------------------------- coding history


@pytest.mark.parametrize("channels, expected", [
    # EBU R98 field letters and modes (from memory)
    (2, "A=PCM,F=48000,W=24,M=stereo,T=render 0.1.0\r\n"),
    (1, "A=PCM,F=48000,W=24,M=mono,T=render 0.1.0\r\n"),
    (6, "A=PCM,F=48000,W=24,T=render 0.1.0\r\n"),  # R98 names no mode for 6 channels
])
def test_coding_history_line(channels, expected):
    assert coding_history_line(rate_hz=48000, bits=24, channels=channels, text="render 0.1.0") == expected


@pytest.mark.parametrize("kwargs, match", [
    (dict(text="two\r\nlines"), r"text = 'two\\r\\nlines': character '\\r' not allowed"),
    (dict(algorithm="P,CM"), "algorithm = 'P,CM': character ',' not allowed"),
    (dict(rate_hz=0), "rate_hz = 0: must be an integer >= 1"),
    (dict(bits=24.0), r"bits = 24\.0: must be an integer >= 1"),
])
def test_bad_coding_history_fields_are_refused(kwargs, match):
    settings = dict(rate_hz=48000, bits=24, channels=2, text="t")
    settings.update(kwargs)
    with pytest.raises(ParameterError, match=match):
        coding_history_line(**settings)
