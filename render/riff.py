"""A small RIFF/RF64 chunk layer: list chunks, read Broadcast WAV metadata, insert chunks.

soundfile (libsndfile) writes the audio; it cannot write a ``bext`` or an
``iXML`` chunk.  This module adds them afterwards, byte by byte, without
touching the samples.

Layout (RIFF, "Multimedia Programming Interface and Data Specifications 1.0",
1991): a 12-byte header ``'RIFF' <size u32> 'WAVE'``, then chunks
``<id 4 bytes> <size u32 little-endian> <payload>``, each followed by one zero
pad byte when its size is odd.  RF64 (EBU Tech 3306; ``'BW64'`` in ITU-R
BS.2088 has the same layout) writes ``0xFFFFFFFF`` in the 32-bit size fields
of the file and of ``data`` and puts the real 64-bit sizes in a ``ds64`` chunk
that comes first: ``riffSize u64, dataSize u64, sampleCount u64,
tableLength u32`` and then ``tableLength`` entries ``<id 4> <size u64>`` for
any other chunk larger than 4 GiB.

Reading policy.  Chunks are walked from byte 12 to the end of the *file*
(the RIFF size field is often stale in files from streaming writers), a tail
shorter than a chunk header is ignored, a missing pad byte after the last
chunk is tolerated, and a chunk that runs past the end of the file raises
:class:`ChunkError`.

Writing policy (:func:`insert_chunks`).  The file is rewritten to a
temporary file beside it, flushed (``os.fsync``) and renamed over the
original (``os.replace``), so a failure leaves the original untouched.  The
samples are copied in 1 MiB reads, so memory does not grow with the file.
A plain RIFF file that the new chunks would push past the 32-bit size limit
(4 GiB) is converted to RF64: a ``ds64`` chunk is put first and the 32-bit
fields of the file and of ``data`` are set to ``0xFFFFFFFF``, exactly as
libsndfile writes RF64.  (:class:`render.audio_io.BlockWriter` already
switches to RF64 1 MiB before the limit, so this conversion is a fallback.)
In RF64 output an odd-sized new chunk carries its zero pad byte inside its
declared size (see :func:`insert_chunks`: libsndfile's RF64 reader needs it).

>>> line = coding_history_line(rate_hz=48000, bits=24, channels=2, text="render 0.1.0")
>>> line
'A=PCM,F=48000,W=24,M=stereo,T=render 0.1.0\\r\\n'
>>> b = Bext(description="Scene 12 take 3", time_reference_samples=2**33 + 5, coding_history=line)
>>> Bext.from_bytes(b.to_bytes()) == b, len(b.to_bytes())
(True, 646)
"""

from __future__ import annotations

import math
import os
import secrets
import shutil
import struct
from dataclasses import dataclass
from typing import Optional, Tuple

from .audio_io import sync_folder
from .errors import AudioInputError, OutputError, ParameterError

__all__ = [
    "ChunkError",
    "ChunkInfo",
    "Bext",
    "Metadata",
    "read_chunks",
    "read_metadata",
    "insert_chunks",
    "coding_history_line",
    "BEXT_FIXED_BYTES",
    "LOUDNESS_NOT_SET",
]


class ChunkError(AudioInputError):
    """A RIFF/RF64 file's chunk structure is corrupt (e.g. a chunk runs past the end of the file)."""


#: Largest value a 32-bit RIFF size field can hold; RF64 writes it to mean "see ds64".
SIZE_FIELD_MAX = 0xFFFFFFFF
#: Largest RIFF size field (file size - 8) or chunk size :func:`insert_chunks` writes in a plain
#: RIFF file; beyond it the result becomes RF64.  (A module constant so tests can lower it.)
RIFF_MAX_BYTES = SIZE_FIELD_MAX
#: Bytes per read when copying chunk payloads (the samples): 1 MiB.
COPY_BYTES = 1 << 20
#: Largest bext or iXML payload :func:`read_metadata` loads (larger ones are reported and skipped).
METADATA_MAX_BYTES = 16 << 20

#: Size of the fixed part of a bext chunk, before CodingHistory (EBU Tech 3285).
BEXT_FIXED_BYTES = 602
#: Stored value of a version-2 loudness field that is not set: 0x7FFF (EBU Tech 3285 v2, from
#: memory; a third-party reader quotes the same sentence of the specification).
LOUDNESS_NOT_SET = 0x7FFF

_RF64_FORMS = ("RF64", "BW64")
_FORMS = ("RIFF",) + _RF64_FORMS
#: Chunks that carry the file's structure; :func:`insert_chunks` will not replace them.
_STRUCTURAL_IDS = ("fmt ", "data", "ds64")
#: ds64 fixed part: riffSize, dataSize, sampleCount (u64 each), tableLength (u32).
_DS64_FIXED_BYTES = 28
_DS64_ENTRY_BYTES = 12


# --------------------------------------------------------------------------- chunk listing


@dataclass(frozen=True)
class ChunkInfo:
    """One chunk of a RIFF/RF64 WAVE file.

    Attributes
    ----------
    id : str
        The four-character chunk id, e.g. ``'fmt '``, ``'bext'``, ``'data'``.
    offset : int
        Byte offset of the chunk's header (its id) from the start of the file.
    size : int
        Payload size in bytes, without the 8-byte header and the pad byte;
        for RF64 the 64-bit size from ``ds64`` where the 32-bit field says
        ``0xFFFFFFFF``.
    """

    id: str
    offset: int
    size: int

    @property
    def payload_offset(self):
        """Byte offset of the first payload byte: ``offset + 8``."""
        return self.offset + 8


@dataclass(frozen=True)
class _Ds64:
    riff_size: int
    data_size: int
    sample_count: int
    table: Tuple[Tuple[str, int], ...]


@dataclass(frozen=True)
class _Layout:
    form: str  # 'RIFF', 'RF64' or 'BW64'
    file_size: int
    chunks: Tuple[ChunkInfo, ...]
    ds64: Optional[_Ds64]


def _read_exact(f, offset, size, path):
    f.seek(offset)
    data = f.read(size)
    if len(data) != size:
        raise ChunkError(f"{path}: expected {size} bytes at byte {offset}, the file has {len(data)}")
    return data


def _parse_ds64(payload, path):
    if len(payload) < _DS64_FIXED_BYTES:
        raise ChunkError(f"{path}: ds64 chunk is {len(payload)} bytes: expected at least {_DS64_FIXED_BYTES}")
    riff_size, data_size, sample_count, count = struct.unpack_from("<QQQI", payload, 0)
    if len(payload) < _DS64_FIXED_BYTES + _DS64_ENTRY_BYTES * count:
        raise ChunkError(
            f"{path}: ds64 chunk is {len(payload)} bytes: its table of {count} entries needs "
            f"{_DS64_FIXED_BYTES + _DS64_ENTRY_BYTES * count}"
        )
    table = []
    for i in range(count):
        cid, size = struct.unpack_from("<4sQ", payload, _DS64_FIXED_BYTES + _DS64_ENTRY_BYTES * i)
        table.append((cid.decode("latin-1"), size))
    return _Ds64(riff_size, data_size, sample_count, tuple(table))


def _read_layout(f, path):
    f.seek(0, os.SEEK_END)
    file_size = f.tell()
    header = b""
    if file_size >= 12:
        f.seek(0)
        header = f.read(12)
    form = header[:4].decode("latin-1") if len(header) == 12 else ""
    if form not in _FORMS:
        shown = repr(header[:4]) if header else "an empty file"
        raise AudioInputError(
            f"{path}: not a RIFF/WAVE file: expected 'RIFF', 'RF64' or 'BW64' in the first 4 bytes, found {shown}"
        )
    if header[8:12] != b"WAVE":
        raise AudioInputError(f"{path}: a {form} file of form {header[8:12]!r}: expected 'WAVE'")

    chunks = []
    ds64 = None
    pos = 12
    while pos + 8 <= file_size:
        cid_raw, size = struct.unpack("<4sI", _read_exact(f, pos, 8, path))
        cid = cid_raw.decode("latin-1")
        if form in _RF64_FORMS:
            if not chunks:
                if cid != "ds64":
                    raise ChunkError(f"{path}: {form} file whose first chunk is {cid!r}: expected 'ds64'")
                ds64 = _parse_ds64(_read_exact(f, pos + 8, min(size, 1 << 16), path), path)
            elif size == SIZE_FIELD_MAX:
                if cid == "data":
                    size = ds64.data_size
                else:
                    sizes = [s for t, s in ds64.table if t == cid]
                    if not sizes:
                        raise ChunkError(
                            f"{path}: chunk {cid!r} at byte {pos} has size 0xFFFFFFFF and no entry in the ds64 table"
                        )
                    size = sizes[0]
        end = pos + 8 + size
        if end > file_size:
            raise ChunkError(
                f"{path}: chunk {cid!r} at byte {pos} declares {size} bytes but only {file_size - pos - 8} "
                "remain: the file is truncated or corrupt"
            )
        chunks.append(ChunkInfo(id=cid, offset=pos, size=size))
        pos = end + (size & 1)
    return _Layout(form=form, file_size=file_size, chunks=tuple(chunks), ds64=ds64)


def _open_for_reading(path):
    p = os.fspath(path)
    try:
        return p, open(p, "rb")
    except FileNotFoundError as exc:
        raise AudioInputError(f"{p}: cannot open: no such file") from exc
    except IsADirectoryError as exc:
        raise AudioInputError(f"{p}: cannot open: it is a folder") from exc
    except OSError as exc:
        raise AudioInputError(f"{p}: cannot open: {exc.strerror or exc}") from exc


def read_chunks(path):
    """List the chunks of a RIFF/WAVE or RF64/WAVE file, in file order.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    list of ChunkInfo
        Every chunk after the 12-byte header, ``ds64`` included for RF64.

    Raises
    ------
    AudioInputError
        The file cannot be opened, or is not RIFF/RF64 with form ``WAVE``.
    ChunkError
        A chunk runs past the end of the file, or an RF64 file lacks ``ds64``.
    """
    p, f = _open_for_reading(path)
    with f:
        try:
            return list(_read_layout(f, p).chunks)
        except OSError as exc:
            raise AudioInputError(f"{p}: cannot read: {exc.strerror or exc}") from exc


# --------------------------------------------------------------------------- bext


_TEXT_FIELDS = (
    ("description", 256),
    ("originator", 32),
    ("originator_reference", 32),
    ("origination_date", 10),
    ("origination_time", 8),
)
_LOUDNESS_FIELDS = (
    "loudness_value_lufs",
    "loudness_range_lu",
    "max_true_peak_level_dbtp",
    "max_momentary_loudness_lufs",
    "max_short_term_loudness_lufs",
)
#: Offsets in the fixed part (EBU Tech 3285): text 0..337, TimeReference 338, Version 346,
#: UMID 348, loudness 412 (5 x int16), reserved 422..601.
_TIME_REFERENCE_AT = 338
_UMID_AT = 348
_UMID_BYTES = 64
_LOUDNESS_AT = 412
_RESERVED_AT = 422
_RESERVED_BYTES = 180


def _text_bytes(name, value, width):
    if not isinstance(value, str):
        raise ParameterError(f"{name} is a {type(value).__name__}: expected a str of at most {width} characters")
    if "\0" in value:
        raise ParameterError(f"{name} = {value!r}: contains a NUL character, which ends a bext text field")
    try:
        data = value.encode("latin-1")
    except UnicodeEncodeError as exc:
        raise ParameterError(
            f"{name} = {value!r}: character {value[exc.start]!r} cannot be stored: bext text is ASCII (EBU Tech 3285)"
        ) from exc
    if len(data) > width:
        raise ParameterError(f"{name} is {len(data)} characters: expected at most {width}")
    return data


def _is_int(value):
    return isinstance(value, int) and not isinstance(value, bool)


@dataclass(frozen=True)
class Bext:
    """The Broadcast WAV ``bext`` chunk (EBU Tech 3285, version 2).

    Text is ASCII per the specification.  Bytes outside ASCII found in a file
    are kept as the Latin-1 characters of the same code, so reading and
    writing back is byte-exact.

    Attributes
    ----------
    description : str
        At most 256 characters.
    originator : str
        At most 32 characters.
    originator_reference : str
        At most 32 characters.
    origination_date : str
        ``'yyyy-mm-dd'`` (10 characters) or empty; not checked further, so
        that files from other writers read back unchanged.
    origination_time : str
        ``'hh:mm:ss'`` (8 characters) or empty.
    time_reference_samples : int
        Samples since midnight of the first sample, ``0 <= value < 2**64``;
        stored as two little-endian 32-bit halves, low first.
    version : int
        ``0 .. 65535``; 2 for the loudness fields.
    umid : bytes
        Exactly 64 bytes (SMPTE 330M UMID, zeros when unknown).
    loudness_value_lufs, loudness_range_lu, max_true_peak_level_dbtp, \
max_momentary_loudness_lufs, max_short_term_loudness_lufs : float or None
        Version 2 only: stored as int16 hundredths (-23.00 LUFS is -2300),
        ``None`` when not set (stored as 0x7FFF).  Each must round to
        ``-32768 .. 32766`` hundredths.  With ``version < 2`` these bytes are
        reserved, so all five must be ``None``.
    coding_history : str
        Lines each ending in CR LF (see :func:`coding_history_line`), any length.

    Examples
    --------
    >>> b = Bext(loudness_value_lufs=-23.0, max_true_peak_level_dbtp=-1.0)
    >>> data = b.to_bytes()
    >>> int.from_bytes(data[412:414], "little", signed=True), data[414:416].hex()
    (-2300, 'ff7f')
    """

    description: str = ""
    originator: str = ""
    originator_reference: str = ""
    origination_date: str = ""
    origination_time: str = ""
    time_reference_samples: int = 0
    version: int = 2
    umid: bytes = bytes(_UMID_BYTES)
    loudness_value_lufs: Optional[float] = None
    loudness_range_lu: Optional[float] = None
    max_true_peak_level_dbtp: Optional[float] = None
    max_momentary_loudness_lufs: Optional[float] = None
    max_short_term_loudness_lufs: Optional[float] = None
    coding_history: str = ""

    def __post_init__(self):
        for name, width in _TEXT_FIELDS:
            _text_bytes(name, getattr(self, name), width)
        _text_bytes("coding_history", self.coding_history, math.inf)
        t = self.time_reference_samples
        if not (_is_int(t) and 0 <= t < 2**64):
            raise ParameterError(f"time_reference_samples = {t!r}: must be an integer in 0 .. 2**64 - 1")
        if not (_is_int(self.version) and 0 <= self.version <= 0xFFFF):
            raise ParameterError(f"version = {self.version!r}: must be an integer in 0 .. 65535")
        if not isinstance(self.umid, (bytes, bytearray)) or len(self.umid) != _UMID_BYTES:
            raise ParameterError(f"umid = {self.umid!r}: expected exactly {_UMID_BYTES} bytes")
        object.__setattr__(self, "umid", bytes(self.umid))
        for name in _LOUDNESS_FIELDS:
            value = getattr(self, name)
            if value is None:
                continue
            if self.version < 2:
                raise ParameterError(
                    f"{name} = {value!r} with version = {self.version}: loudness fields need version >= 2"
                )
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
                raise ParameterError(f"{name} = {value!r}: expected a finite number or None")
            if not -32768 <= round(value * 100) <= 32766:
                raise ParameterError(f"{name} = {value!r}: must lie within -327.68 .. 327.66")

    def to_bytes(self):
        """The chunk payload: 602 fixed bytes, then CodingHistory (no header, no pad byte)."""
        parts = [_text_bytes(name, getattr(self, name), width).ljust(width, b"\0") for name, width in _TEXT_FIELDS]
        t = self.time_reference_samples
        parts.append(struct.pack("<IIH", t & 0xFFFFFFFF, t >> 32, self.version))
        parts.append(self.umid)
        if self.version >= 2:
            stored = [LOUDNESS_NOT_SET if getattr(self, n) is None else round(getattr(self, n) * 100)
                      for n in _LOUDNESS_FIELDS]
            parts.append(struct.pack("<5h", *stored))
        else:
            parts.append(bytes(10))
        parts.append(bytes(_RESERVED_BYTES))
        parts.append(self.coding_history.encode("latin-1"))
        return b"".join(parts)

    @classmethod
    def from_bytes(cls, data):
        """Parse a bext payload; the inverse of :meth:`to_bytes`.

        Byte-exact for chunks that follow the specification: text fields
        NUL-padded after their text, reserved bytes zero (loudness bytes too
        when ``version < 2``), CodingHistory without trailing NULs.  Anything
        else is dropped; :func:`read_metadata` says what in its notes.

        Raises
        ------
        ChunkError
            ``data`` is shorter than 602 bytes.
        """
        return _parse_bext(bytes(data))[0]


def _parse_bext(data):
    """(Bext, notes) from a payload; raises ChunkError if it is shorter than the fixed part."""
    if len(data) < BEXT_FIXED_BYTES:
        raise ChunkError(f"bext chunk is {len(data)} bytes: expected at least {BEXT_FIXED_BYTES}")
    notes = []
    values = {}
    pos = 0

    def text(raw, name):
        head, _, rest = raw.partition(b"\0")
        if rest.strip(b"\0"):
            notes.append(f"bext {name} has bytes after its terminating NUL: dropped")
        return head.decode("latin-1")

    for name, width in _TEXT_FIELDS:
        values[name] = text(data[pos:pos + width], name)
        pos += width
    low, high, version = struct.unpack_from("<IIH", data, _TIME_REFERENCE_AT)
    values["time_reference_samples"] = low | (high << 32)
    values["version"] = version
    values["umid"] = data[_UMID_AT:_UMID_AT + _UMID_BYTES]
    stored = struct.unpack_from("<5h", data, _LOUDNESS_AT)
    if version >= 2:
        for name, value in zip(_LOUDNESS_FIELDS, stored):
            values[name] = None if value == LOUDNESS_NOT_SET else value / 100
        if version > 2:
            notes.append(f"bext version {version}: newer than 2, read as version 2")
    elif any(stored):
        notes.append(f"bext version {version} has non-zero bytes where version 2 keeps loudness: ignored")
    if any(data[_RESERVED_AT:BEXT_FIXED_BYTES]):
        notes.append("bext reserved bytes are not all zero: ignored")
    history = data[BEXT_FIXED_BYTES:]
    values["coding_history"] = text(history, "coding_history") if b"\0" in history else history.decode("latin-1")
    return Bext(**values), tuple(notes)


# --------------------------------------------------------------------------- metadata


@dataclass(frozen=True)
class Metadata:
    """Broadcast WAV metadata of one file.

    Attributes
    ----------
    bext : Bext or None
        ``None`` when the file has no usable ``bext`` chunk.
    ixml : bytes or None
        The ``iXML`` payload with trailing NUL padding removed, not parsed;
        ``None`` when absent or unusable.
    notes : tuple of str
        What was wrong with the metadata and what was done about it.
    """

    bext: Optional[Bext]
    ixml: Optional[bytes]
    notes: Tuple[str, ...]


def _looks_like_xml(data):
    body = data[3:] if data.startswith(b"\xef\xbb\xbf") else data
    return body.lstrip(b" \t\r\n").startswith(b"<")


def read_metadata(path):
    """Read the ``bext`` and ``iXML`` chunks of a WAV/RF64 file.

    A damaged ``bext`` or ``iXML`` chunk inside a file whose structure is
    sound does not raise: that chunk reads as ``None`` and a note says why,
    so the audio can still be rendered.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    Metadata

    Raises
    ------
    AudioInputError, ChunkError
        As :func:`read_chunks`: the file is not RIFF/RF64 WAVE or its chunk
        structure is corrupt.
    """
    p, f = _open_for_reading(path)
    notes = []
    found = {"bext": None, "iXML": None}
    with f:
        try:
            layout = _read_layout(f, p)
            for cid in found:
                matches = [c for c in layout.chunks if c.id == cid]
                if len(matches) > 1:
                    notes.append(f"{len(matches)} {cid} chunks: the first is used")
                if not matches:
                    continue
                chunk = matches[0]
                if chunk.size > METADATA_MAX_BYTES:
                    notes.append(f"{cid} chunk is {chunk.size} bytes: larger than {METADATA_MAX_BYTES}, ignored")
                    continue
                found[cid] = _read_exact(f, chunk.payload_offset, chunk.size, p)
        except OSError as exc:
            raise AudioInputError(f"{p}: cannot read: {exc.strerror or exc}") from exc

    bext = None
    if found["bext"] is not None:
        try:
            bext, bext_notes = _parse_bext(found["bext"])
            notes.extend(bext_notes)
        except ChunkError as exc:
            notes.append(str(exc))
        except ParameterError as exc:  # a stored value our dataclass rejects
            notes.append(f"bext chunk unusable: {exc}")
    ixml = None
    if found["iXML"] is not None:
        payload = found["iXML"].rstrip(b"\0")
        if not payload:
            notes.append("iXML chunk is empty: ignored")
        elif not _looks_like_xml(payload):
            notes.append(f"iXML chunk starts with {payload[:8]!r}: expected XML ('<'), ignored")
        else:
            ixml = payload
    return Metadata(bext=bext, ixml=ixml, notes=tuple(notes))


# --------------------------------------------------------------------------- insertion


def _check_new_chunks(chunks):
    checked = []
    seen = set()
    if not isinstance(chunks, (list, tuple)):
        raise ParameterError(f"chunks is a {type(chunks).__name__}: expected a list of (id, bytes) pairs")
    for item in chunks:
        if not (isinstance(item, tuple) and len(item) == 2):
            raise ParameterError(f"chunks item {item!r}: expected an (id, bytes) pair")
        cid, payload = item
        if not (isinstance(cid, str) and len(cid) == 4 and all(" " <= ch <= "~" for ch in cid)):
            raise ParameterError(f"chunk id {cid!r}: expected 4 printable ASCII characters, e.g. 'bext'")
        if cid in _STRUCTURAL_IDS:
            raise ParameterError(f"chunk id {cid!r}: the file's structure; expected a metadata chunk such as 'bext'")
        if cid in seen:
            raise ParameterError(f"chunk id {cid!r} given twice: expected each id once")
        if not isinstance(payload, (bytes, bytearray, memoryview)):
            raise ParameterError(f"chunk {cid!r} payload is a {type(payload).__name__}: expected bytes")
        payload = bytes(payload)
        if len(payload) >= SIZE_FIELD_MAX:
            raise ParameterError(f"chunk {cid!r} is {len(payload)} bytes: expected less than 4 GiB")
        seen.add(cid)
        checked.append((cid, payload))
    return checked


def _block_align(f, layout, path):
    fmt = [c for c in layout.chunks if c.id == "fmt "]
    if not fmt or fmt[0].size < 14:
        raise ChunkError(f"{path}: no usable 'fmt ' chunk: cannot count the sample frames for RF64")
    (align,) = struct.unpack("<H", _read_exact(f, fmt[0].payload_offset + 12, 2, path))
    if align == 0:
        raise ChunkError(f"{path}: 'fmt ' block align is 0: cannot count the sample frames for RF64")
    return align


def _copy_range(src, dst, offset, size):
    src.seek(offset)
    left = size
    while left:
        piece = src.read(min(COPY_BYTES, left))
        if not piece:
            raise OSError(f"unexpected end of file after {size - left} of {size} bytes")
        dst.write(piece)
        left -= len(piece)


def insert_chunks(path, chunks):
    """Put metadata chunks before ``data`` in a WAV/RF64 file, atomically.

    Each given chunk replaces every existing chunk with the same id (wherever
    it was); the new chunks go, in the order given, directly before
    ``data``; every other chunk keeps its place and bytes.  Odd-sized chunks
    get their zero pad byte (RIFF rule, not counted in the chunk size).  In
    an RF64 result an odd new payload gets one zero byte *counted* in its
    size instead, because libsndfile's RF64 reader (1.2.2) does not skip pad
    bytes; for ``bext`` and ``iXML`` a trailing NUL is harmless and
    :func:`read_metadata` removes it.  The RIFF size (RF64: the ``ds64`` sizes) is
    rewritten.  A plain RIFF result larger than 4 GiB becomes RF64 (see the
    module notes).

    Parameters
    ----------
    path : str or os.PathLike
        A RIFF/RF64 WAVE file with one ``data`` chunk, e.g. from
        :class:`render.audio_io.BlockWriter`.
    chunks : list of (str, bytes)
        Chunk id (4 printable ASCII characters, not ``'fmt '``, ``'data'``
        or ``'ds64'``; each at most once) and payload (no header, no pad).

    Raises
    ------
    ParameterError
        A chunk id or payload is not acceptable.
    AudioInputError, ChunkError
        The file is not RIFF/RF64 WAVE, is corrupt, or has no single ``data`` chunk.
    OutputError
        The new file cannot be written or moved into place (the original is unchanged).
    """
    new = _check_new_chunks(chunks)
    replaced = {cid for cid, _ in new}
    p, src = _open_for_reading(path)
    with src:
        try:
            layout = _read_layout(src, p)
        except OSError as exc:
            raise AudioInputError(f"{p}: cannot read: {exc.strerror or exc}") from exc
        data_chunks = [i for i, c in enumerate(layout.chunks) if c.id == "data"]
        if len(data_chunks) != 1:
            raise ChunkError(f"{p}: {len(data_chunks)} 'data' chunks: expected exactly 1")
        at = data_chunks[0]
        data = layout.chunks[at]

        def keep(found):
            return [c for c in found if c.id not in replaced and c.id != "ds64"]

        # Parts in file order: a ChunkInfo is copied from the source, an (id, bytes) pair is written.
        parts = keep(layout.chunks[:at]) + new + [data] + keep(layout.chunks[at + 1:])

        def part_size(part):
            size = part.size if isinstance(part, ChunkInfo) else len(part[1])
            return size, 8 + size + (size & 1)

        body = 4 + sum(part_size(part)[1] for part in parts)  # 'WAVE' + chunks
        form = layout.form
        big = [(part.id, part.size) for part in parts
               if isinstance(part, ChunkInfo) and part.id != "data" and part.size >= SIZE_FIELD_MAX]
        if form == "RIFF" and (body > RIFF_MAX_BYTES or data.size > RIFF_MAX_BYTES or big):
            form = "RF64"
        if form in _RF64_FORMS:
            # libsndfile 1.2.2's RF64 reader does not step over pad bytes (seen here: an odd
            # chunk before 'data' makes the file unreadable), so in RF64 an odd payload gets
            # its zero byte inside the chunk.  The file size is the same either way.
            parts = [(p[0], p[1] + b"\0") if isinstance(p, tuple) and len(p[1]) & 1 else p for p in parts]
            body += 8 + _DS64_FIXED_BYTES + _DS64_ENTRY_BYTES * len(big)
            if layout.ds64 is not None:
                sample_count = layout.ds64.sample_count
            else:
                sample_count = data.size // _block_align(src, layout, p)

        folder, name = os.path.split(os.path.abspath(p))
        temp = None
        try:
            for _ in range(16):
                candidate = os.path.join(folder, f".{name}.{secrets.token_hex(4)}.part")
                try:
                    fd = os.open(candidate, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
                except FileExistsError:
                    continue
                temp = candidate
                break
            else:
                raise OutputError(f"{p}: cannot find a free temporary name in {folder}")
            with os.fdopen(fd, "wb") as dst:
                if form in _RF64_FORMS:
                    dst.write(struct.pack("<4sI4s", form.encode("ascii"), SIZE_FIELD_MAX, b"WAVE"))
                    dst.write(struct.pack("<4sI", b"ds64", _DS64_FIXED_BYTES + _DS64_ENTRY_BYTES * len(big)))
                    dst.write(struct.pack("<QQQI", body, data.size, sample_count, len(big)))
                    for cid, size in big:
                        dst.write(struct.pack("<4sQ", cid.encode("latin-1"), size))
                else:
                    dst.write(struct.pack("<4sI4s", b"RIFF", body, b"WAVE"))
                for part in parts:
                    size, _ = part_size(part)
                    if isinstance(part, ChunkInfo):
                        field = size
                        if form in _RF64_FORMS and (part.id == "data" or size >= SIZE_FIELD_MAX):
                            field = SIZE_FIELD_MAX
                        dst.write(struct.pack("<4sI", part.id.encode("latin-1"), field))
                        _copy_range(src, dst, part.payload_offset, size)
                    else:
                        dst.write(struct.pack("<4sI", part[0].encode("ascii"), size))
                        dst.write(part[1])
                    if size & 1:
                        dst.write(b"\0")
                dst.flush()
                os.fsync(dst.fileno())
            # Self-check before the rename: the new layout reads back with the same samples' size.
            with open(temp, "rb") as check:
                written = _read_layout(check, temp)
            got = [c for c in written.chunks if c.id == "data"]
            if len(got) != 1 or got[0].size != data.size or written.file_size != 8 + body:
                raise OutputError(f"{p}: the rewritten file does not read back as expected; original kept")
            shutil.copymode(p, temp)
            os.replace(temp, p)
            temp = None
        except OSError as exc:
            raise OutputError(f"{p}: cannot rewrite with new chunks: {exc.strerror or exc}") from exc
        finally:
            if temp is not None:
                try:
                    os.unlink(temp)
                except OSError:
                    pass
    sync_folder(folder)


# --------------------------------------------------------------------------- coding history


_MODES = {1: "mono", 2: "stereo"}


def _check_field_text(name, value, forbidden):
    if not isinstance(value, str):
        raise ParameterError(f"{name} is a {type(value).__name__}: expected a str")
    bad = [ch for ch in value if not (" " <= ch <= "~") or ch in forbidden]
    if bad:
        raise ParameterError(f"{name} = {value!r}: character {bad[0]!r} not allowed: expected printable ASCII")


def coding_history_line(*, algorithm="PCM", rate_hz, bits, channels, text):
    """One CodingHistory line in the style of EBU R98 (field letters from memory).

    ``A=`` coding algorithm, ``F=`` sample rate in Hz, ``W=`` word length in
    bits, ``M=`` mode (``mono`` for 1 channel, ``stereo`` for 2; R98 names no
    mode for more channels, so the field is left out), ``T=`` free text;
    fields joined by commas, the line ended by CR LF.

    Parameters
    ----------
    algorithm : str
        Printable ASCII without ``,`` or ``=``, not empty.
    rate_hz : int
        ``>= 1``.
    bits : int
        ``>= 1``.
    channels : int
        ``>= 1``.
    text : str
        Printable ASCII (no CR or LF); an empty text leaves ``T=`` out.

    Returns
    -------
    str

    >>> coding_history_line(rate_hz=44100, bits=16, channels=6, text="")
    'A=PCM,F=44100,W=16\\r\\n'
    """
    _check_field_text("algorithm", algorithm, ",=")
    if not algorithm:
        raise ParameterError("algorithm = '': expected a name such as 'PCM'")
    for name, value in (("rate_hz", rate_hz), ("bits", bits), ("channels", channels)):
        if not (_is_int(value) and value >= 1):
            raise ParameterError(f"{name} = {value!r}: must be an integer >= 1")
    _check_field_text("text", text, "")
    fields = [f"A={algorithm}", f"F={rate_hz}", f"W={bits}"]
    if channels in _MODES:
        fields.append(f"M={_MODES[channels]}")
    if text:
        fields.append(f"T={text}")
    return ",".join(fields) + "\r\n"
