"""Audio file input and output over soundfile (libsndfile).

Reading: :func:`probe` describes a file, :func:`read_blocks` streams it as
``(frames, channels)`` float64 blocks, :func:`read_all` loads a small file
(an impulse response) whole.  Every failure becomes an
:class:`~render.errors.AudioInputError` naming the path and libsndfile's reason.

Writing: :func:`output_format` turns a requested format and subtype into
exactly what soundfile is given (never its defaults), :func:`predicted_bytes`
sizes an output before it is written, and :class:`BlockWriter` writes blocks
to a temporary file beside the destination and moves it into place only when
complete, so a failed or interrupted render leaves no partial file behind.

>>> info = AudioInfo(path="a.wav", frames=96000, rate_hz=48000, channels=2, subtype="PCM_24", format="WAV")
>>> info.duration_s
2.0
>>> output_format(requested_format="wav", requested_subtype="same", source=info, predicted_bytes=10**6)
('WAV', 'PCM_24')
"""

from __future__ import annotations

import hashlib
import numbers
import os
import secrets
from dataclasses import dataclass

import numpy as np
import soundfile as sf

from .errors import AudioInputError, OutputError, ParameterError

__all__ = [
    "AudioInfo",
    "probe",
    "read_blocks",
    "read_all",
    "output_format",
    "predicted_bytes",
    "wav_container",
    "BlockWriter",
    "write_response",
    "sha256_file",
    "RIFF_LIMIT_BYTES",
    "RF64_MARGIN_BYTES",
    "REQUESTABLE_SUBTYPES",
]

#: Largest file a RIFF/WAVE header can describe: its size fields are 32-bit.
RIFF_LIMIT_BYTES = 2**32
#: Headroom below that limit before switching to RF64: covers the header
#: estimate and chunks a later step may add (our own choice, 1 MiB).
RF64_MARGIN_BYTES = 2**20

#: Bytes per sample of each uncompressed subtype.
_SAMPLE_BYTES = {"PCM_S8": 1, "PCM_U8": 1, "PCM_16": 2, "PCM_24": 3, "PCM_32": 4, "FLOAT": 4, "DOUBLE": 8}
#: Subtypes each output container takes (libsndfile: WAV and RF64 have no signed 8-bit, FLAC has no
#: 32-bit or floating-point samples).
_CONTAINER_SUBTYPES = {
    "WAV": ("PCM_U8", "PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"),
    "RF64": ("PCM_U8", "PCM_16", "PCM_24", "PCM_32", "FLOAT", "DOUBLE"),
    "FLAC": ("PCM_S8", "PCM_16", "PCM_24"),
}
#: Subtypes an output may ask for by name.
REQUESTABLE_SUBTYPES = ("PCM_16", "PCM_24", "FLOAT")
#: Sources whose samples float32 cannot hold exactly: read as float64.
_WIDE_SUBTYPES = ("FLOAT", "DOUBLE", "PCM_32")

_SOUNDFILE_ERRORS = (RuntimeError, OSError, getattr(sf, "SoundFileError", RuntimeError))


def _is_int(value):
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _is_whole(value):
    """An integer, or a float with no fractional part (48000.0)."""
    if _is_int(value):
        return True
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and float(value).is_integer()


def _reason(exc):
    """libsndfile's own words for a soundfile exception."""
    text = getattr(exc, "error_string", None) or str(exc) or type(exc).__name__
    return text.strip().rstrip(".")


@dataclass(frozen=True)
class AudioInfo:
    """What a sound file holds, as read from its header.

    Attributes
    ----------
    path : str
    frames : int
        Sample frames per channel, ``>= 0``.
    rate_hz : int
        Sample rate in Hz.
    channels : int
    subtype : str
        soundfile's sample-format name, e.g. ``'PCM_24'``, ``'FLOAT'``.
    format : str
        soundfile's container name, e.g. ``'WAV'``, ``'RF64'``, ``'FLAC'``.
    """

    path: str
    frames: int
    rate_hz: int
    channels: int
    subtype: str
    format: str

    @property
    def duration_s(self):
        """Length in seconds."""
        return self.frames / self.rate_hz


def _check_readable(path):
    p = os.fspath(path)
    if not os.path.exists(p):
        raise AudioInputError(f"{p}: cannot open audio file: no such file")
    if os.path.isdir(p):
        raise AudioInputError(f"{p}: cannot open audio file: it is a folder")
    return p


def probe(path):
    """Describe a sound file without reading its samples.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    AudioInfo

    Raises
    ------
    AudioInputError
        The file is missing, unreadable, corrupt or in a format libsndfile
        does not read; the message gives the path and the reason.
    """
    p = _check_readable(path)
    try:
        info = sf.info(p)
    except _SOUNDFILE_ERRORS as exc:
        raise AudioInputError(f"{p}: cannot open audio file: {_reason(exc)}") from exc
    return AudioInfo(
        path=p,
        frames=int(info.frames),
        rate_hz=int(info.samplerate),
        channels=int(info.channels),
        subtype=str(info.subtype),
        format=str(info.format),
    )


def read_blocks(path, *, block_frames, dtype_read="float32"):
    """Stream a sound file as float64 blocks.

    The file is checked when this function is called (errors are raised
    here, not at the first ``next``); it is opened for reading on the first
    ``next`` and closed when the generator finishes or is closed.

    Parameters
    ----------
    path : str or os.PathLike
    block_frames : int
        Frames per block, ``>= 1``; the last block may be shorter.
    dtype_read : {'float32', 'float64'}
        Sample type asked of libsndfile, converted to float64 by numpy.
        float32 holds 8- to 24-bit PCM exactly and is the quicker path.
        Sources with FLOAT, DOUBLE or PCM_32 samples are always read as
        float64, so nothing is lost.

    Yields
    ------
    numpy.ndarray
        float64, shape ``(frames, channels)``, C-contiguous, a new array
        each time (never reused).

    Raises
    ------
    AudioInputError
        The file cannot be opened, a read fails part-way, or the file ends
        before the length its header declares.
    """
    if not (_is_int(block_frames) and block_frames >= 1):
        raise ParameterError(f"block_frames = {block_frames!r}: must be an integer >= 1")
    if dtype_read not in ("float32", "float64"):
        raise ParameterError(f"dtype_read = {dtype_read!r}: expected 'float32' or 'float64'")
    info = probe(path)
    dtype = "float64" if info.subtype in _WIDE_SUBTYPES else dtype_read
    return _blocks(info, int(block_frames), dtype)


def _blocks(info, block_frames, dtype):
    p = info.path
    try:
        f = sf.SoundFile(p)
    except _SOUNDFILE_ERRORS as exc:
        raise AudioInputError(f"{p}: cannot open audio file: {_reason(exc)}") from exc
    with f:
        frames = int(f.frames)
        pos = 0
        buf = np.empty((block_frames, f.channels), dtype=np.float32) if dtype == "float32" else None
        while pos < frames:
            try:
                if buf is not None:
                    data = f.read(out=buf)
                else:
                    data = f.read(block_frames, dtype="float64", always_2d=True)
            except _SOUNDFILE_ERRORS as exc:
                raise AudioInputError(f"{p}: read failed after frame {pos} of {frames}: {_reason(exc)}") from exc
            if len(data) == 0:
                raise AudioInputError(f"{p}: file ends at frame {pos}, its header declares {frames}")
            pos += len(data)
            yield np.array(data, dtype=np.float64, order="C")


def read_all(path):
    """Read a whole (small) sound file, e.g. an impulse response.

    Returns
    -------
    samples : numpy.ndarray
        float64, shape ``(frames, channels)``, C-contiguous, read as float64.
    rate_hz : int

    Raises
    ------
    AudioInputError
        As :func:`read_blocks`.
    """
    info = probe(path)
    try:
        data, rate_hz = sf.read(info.path, dtype="float64", always_2d=True)
    except _SOUNDFILE_ERRORS as exc:
        raise AudioInputError(f"{info.path}: read failed: {_reason(exc)}") from exc
    if len(data) != info.frames:
        raise AudioInputError(f"{info.path}: read {len(data)} frames, its header declares {info.frames}")
    return np.ascontiguousarray(data), int(rate_hz)


def _eight_bit_for(container):
    return "PCM_S8" if container == "FLAC" else "PCM_U8"


def output_format(*, requested_format, requested_subtype, source, predicted_bytes):
    """The container and sample format to write, spelled as soundfile wants them.

    Parameters
    ----------
    requested_format : {'wav', 'flac'}
        Case-insensitive.  ``'wav'`` becomes ``'RF64'`` when the output would
        not fit a RIFF header: ``predicted_bytes > RIFF_LIMIT_BYTES -
        RF64_MARGIN_BYTES`` (4 GiB - 1 MiB).
    requested_subtype : {'same', 'PCM_16', 'PCM_24', 'FLOAT'}
        ``'same'`` keeps the source's subtype (8-bit PCM maps between WAV's
        unsigned and FLAC's signed form).  A subtype the container cannot
        hold is an error, never a silent substitute: FLAC has no
        floating-point or 32-bit samples, so ``'same'`` for such a source,
        or ``'FLOAT'``, with ``'flac'`` raises :class:`OutputError` asking
        for an explicit ``'PCM_24'`` / ``'PCM_16'`` or ``'wav'``.
    source : AudioInfo
        The input the output is rendered from.
    predicted_bytes : int
        Expected size of the output file (see :func:`predicted_bytes`), ``>= 0``.

    Returns
    -------
    format : str
        ``'WAV'``, ``'RF64'`` or ``'FLAC'``.
    subtype : str

    >>> src = AudioInfo(path="a.wav", frames=1, rate_hz=48000, channels=2, subtype="FLOAT", format="WAV")
    >>> output_format(requested_format="wav", requested_subtype="PCM_16", source=src, predicted_bytes=5 * 2**30)
    ('RF64', 'PCM_16')
    """
    if not isinstance(requested_format, str) or requested_format.lower() not in ("wav", "flac"):
        raise OutputError(f"format = {requested_format!r}: expected 'wav' or 'flac'")
    if not (_is_int(predicted_bytes) and predicted_bytes >= 0):
        raise OutputError(f"predicted_bytes = {predicted_bytes!r}: must be an integer >= 0")
    container = requested_format.upper()
    allowed = _CONTAINER_SUBTYPES[container]

    if isinstance(requested_subtype, str) and requested_subtype.lower() == "same":
        subtype = source.subtype
        if subtype in ("PCM_U8", "PCM_S8"):
            subtype = _eight_bit_for(container)
        if subtype not in allowed:
            raise OutputError(
                f"{source.path}: subtype = 'same' keeps the source's {subtype}, which {container} cannot store "
                f"(it takes {', '.join(allowed)}): set subtype to "
                + ("'PCM_24' or 'PCM_16', or format to 'wav'" if container == "FLAC"
                   else "'PCM_24', 'PCM_16' or 'FLOAT'")
            )
    elif isinstance(requested_subtype, str) and requested_subtype.upper() in REQUESTABLE_SUBTYPES:
        subtype = requested_subtype.upper()
        if subtype not in allowed:
            raise OutputError(
                f"subtype = {requested_subtype!r}: {container} has no floating-point samples: "
                "expected 'PCM_16' or 'PCM_24' with format 'flac', or format 'wav'"
            )
    else:
        raise OutputError(f"subtype = {requested_subtype!r}: expected 'same', 'PCM_16', 'PCM_24' or 'FLOAT'")

    if container == "WAV" and _needs_rf64(predicted_bytes):
        container = "RF64"
    return container, subtype


#: Upper bound on a WAV/RF64 header before the samples, bytes: RIFF 12 + ds64 36 + fmt 48
#: (extensible) + fact 12 + data 8, plus a PEAK chunk of 16 + 8 per channel.
_WAV_HEADER_BYTES = 12 + 36 + 48 + 12 + 8 + 16
_WAV_HEADER_BYTES_PER_CHANNEL = 8
#: FLAC upper estimate: metadata blocks (marker, STREAMINFO, vendor comment, room for more), and
#: per coded frame a frame header and CRC (<= 18 bytes) plus <= 2 bytes per subframe, assuming
#: frames of 1024 samples (libsndfile's encoder uses larger ones, so this overestimates).
_FLAC_METADATA_BYTES = 4096
_FLAC_FRAME_SAMPLES = 1024
_FLAC_FRAME_BYTES = 18
_FLAC_SUBFRAME_BYTES = 2


def _needs_rf64(size_bytes):
    return size_bytes > RIFF_LIMIT_BYTES - RF64_MARGIN_BYTES


def wav_container(*, frames, channels, subtype):
    """``'WAV'``, or ``'RF64'`` when such a WAV file would not fit a RIFF header (as :func:`output_format`).

    For the files ``render`` writes for itself (responses, two-pass
    temporaries), whose subtype is fixed rather than requested.

    >>> wav_container(frames=48000, channels=2, subtype="DOUBLE")
    'WAV'
    >>> wav_container(frames=6 * 3600 * 48000, channels=2, subtype="DOUBLE")
    'RF64'
    """
    return "RF64" if _needs_rf64(predicted_bytes(frames=frames, channels=channels, subtype=subtype, format="WAV")) \
        else "WAV"


def predicted_bytes(*, frames, channels, subtype, format):
    """Size of an output file before it is written, in bytes.

    WAV and RF64: an upper bound on the header plus the samples (with the
    pad byte of an odd-length data chunk).  FLAC: an upper estimate, the size
    of the samples stored uncompressed plus framing and metadata (noise
    barely compresses; music usually takes 50 to 70 % of it, common practice).

    Parameters
    ----------
    frames : int
        Frames per channel, ``>= 0``.
    channels : int
        ``>= 1``.
    subtype : str
        A PCM or float subtype (``'PCM_16'``, ``'FLOAT'``, ..., any case).
        Whether the container takes it is :func:`output_format`'s business;
        here a subtype FLAC cannot hold counts as 24-bit, so the estimate can
        be made before that check.
    format : {'WAV', 'RF64', 'FLAC'}
        Case-insensitive (``'wav'`` is sized as WAV; RF64's header is within
        the same bound).

    Returns
    -------
    int

    >>> predicted_bytes(frames=48000, channels=2, subtype="PCM_24", format="WAV") - 48000 * 2 * 3
    148
    """
    for name, value, low in (("frames", frames, 0), ("channels", channels, 1)):
        if not (_is_int(value) and value >= low):
            raise ParameterError(f"{name} = {value!r}: must be an integer >= {low}")
    container = format.upper() if isinstance(format, str) else format
    if container not in _CONTAINER_SUBTYPES:
        raise OutputError(f"format = {format!r}: expected 'WAV', 'RF64' or 'FLAC' (any case)")
    key = subtype.upper() if isinstance(subtype, str) else subtype
    if key not in _SAMPLE_BYTES:
        raise OutputError(
            f"subtype = {subtype!r}: no size known; expected one of {', '.join(_SAMPLE_BYTES)}"
        )
    if container == "FLAC":
        key = {"PCM_U8": "PCM_S8", "PCM_32": "PCM_24", "FLOAT": "PCM_24", "DOUBLE": "PCM_24"}.get(key, key)
    data = int(frames) * int(channels) * _SAMPLE_BYTES[key]
    if container in ("WAV", "RF64"):
        return _WAV_HEADER_BYTES + _WAV_HEADER_BYTES_PER_CHANNEL * int(channels) + data + (data & 1)
    coded_frames = -(-int(frames) // _FLAC_FRAME_SAMPLES)
    return _FLAC_METADATA_BYTES + data + coded_frames * (_FLAC_FRAME_BYTES + _FLAC_SUBFRAME_BYTES * int(channels))


class BlockWriter:
    """Write float64 blocks to a sound file that appears only when complete.

    Samples go to a temporary file in the destination folder, named
    ``.<final name>.<random>.part``.  :meth:`commit` (or leaving a ``with``
    block normally) closes it, flushes it to disk (``os.fsync``) and renames
    it over ``path`` in one step (``os.replace``: an existing file there is
    replaced).  :meth:`abort` (or leaving a ``with`` block by an exception,
    Ctrl-C included) deletes the temporary; nothing is left at ``path``.

    No gain or clipping is applied here: level is the caller's business.
    For PCM subtypes libsndfile converts the float samples (values beyond
    ±1 saturate at full scale).

    Parameters
    ----------
    path : str or os.PathLike
        Final file; its folder must exist.
    rate_hz : int
        Sample rate in Hz, ``>= 1`` (a float with no fractional part is accepted).
    channels : int
        ``>= 1``.
    format : {'WAV', 'RF64', 'FLAC'}
        As returned by :func:`output_format`.
    subtype : str
        As returned by :func:`output_format`; always passed to soundfile
        explicitly.
    tags : dict, optional
        libsndfile text tags (``title``, ``artist``, ...) to write; a tag the
        container cannot hold is left out.
    durable : bool
        Flush the file to disk before the rename (default).  False for
        scratch files that are made again when lost (the two-pass
        temporaries): the rename is still atomic, only the fsync is skipped.

    Attributes
    ----------
    frames_written : int
    peak : float
        Largest ``|sample|`` written so far (0.0 before any), linear.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> with BlockWriter(folder / "out.wav", rate_hz=48000, channels=1, format="WAV", subtype="PCM_24") as w:
    ...     w.write(np.full((100, 1), 0.25))
    >>> w.frames_written, w.peak, sorted(p.name for p in folder.iterdir())
    (100, 0.25, ['out.wav'])
    >>> import shutil; shutil.rmtree(folder)
    """

    def __init__(self, path, *, rate_hz, channels, format, subtype, tags=None, durable=True):
        self.path = os.fspath(path)
        self.durable = bool(durable)
        self.frames_written = 0
        self.peak = 0.0
        self._state = "closed"  # until opened: 'open', then 'committed' or 'aborted'
        self._sf = None
        self._fd = None
        self.temp_path = None
        if not (_is_whole(rate_hz) and rate_hz >= 1):
            raise OutputError(f"{self.path}: rate_hz = {rate_hz!r}: must be a whole number >= 1 Hz")
        if not (_is_int(channels) and channels >= 1):
            raise OutputError(f"{self.path}: channels = {channels!r}: must be an integer >= 1")
        container = format.upper() if isinstance(format, str) else format
        if container not in _CONTAINER_SUBTYPES or subtype not in _CONTAINER_SUBTYPES[container]:
            raise OutputError(
                f"{self.path}: format = {format!r}, subtype = {subtype!r}: expected a pair from output_format()"
            )
        self.format, self.subtype = container, subtype
        self.rate_hz, self.channels = int(rate_hz), int(channels)

        folder, name = os.path.split(os.path.abspath(self.path))
        if not name:
            raise OutputError(f"{self.path}: expected a file name, got a folder")
        if not os.path.isdir(folder):
            raise OutputError(f"{self.path}: folder {folder} does not exist")
        for _ in range(16):
            temp = os.path.join(folder, f".{name}.{secrets.token_hex(4)}.part")
            try:
                # 0o666 filtered by the umask, so the final file gets ordinary permissions.
                self._fd = os.open(temp, os.O_RDWR | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
            except FileExistsError:
                continue
            except OSError as exc:
                raise OutputError(f"{self.path}: cannot create a temporary file in {folder}: {exc.strerror}") from exc
            self.temp_path = temp
            break
        else:
            raise OutputError(f"{self.path}: cannot find a free temporary name in {folder}")
        try:
            self._open(tags)
        except BaseException:  # Ctrl-C too: no temporary is left behind
            self._discard()
            raise
        self._state = "open"

    def _open(self, tags):
        try:
            self._sf = sf.SoundFile(
                self._fd,
                mode="w",
                samplerate=self.rate_hz,
                channels=self.channels,
                subtype=self.subtype,
                format=self.format,
                closefd=False,
            )
        except _SOUNDFILE_ERRORS as exc:
            raise OutputError(
                f"{self.path}: cannot write {self.format} {self.subtype}, {self.channels} channels at "
                f"{self.rate_hz} Hz: {_reason(exc)}"
            ) from exc
        _no_peak_chunk(self._sf)
        for name, value in (tags or {}).items():
            try:
                setattr(self._sf, name, value)  # libsndfile's text tags (title, artist, comment, ...)
            except (_SOUNDFILE_ERRORS + (AttributeError, TypeError)):
                pass  # a container without that tag: nothing to keep it in

    # -- context manager -------------------------------------------------
    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            if self._state == "open":
                self.commit()
        else:
            self.abort()
        return False

    def __del__(self):
        # A writer dropped without commit() leaves no temporary file behind.
        try:
            if getattr(self, "_state", None) == "open":
                self.abort()
        except Exception:
            pass

    # -- writing ---------------------------------------------------------
    def write(self, block):
        """Append ``block``, float64 ``(frames, channels)``, values finite (any level)."""
        if self._state != "open":
            raise OutputError(f"{self.path}: write after the file was {self._state}")
        block = np.asarray(block)
        if block.ndim != 2 or block.shape[1] != self.channels:
            raise OutputError(f"{self.path}: block has shape {block.shape}: expected (frames, {self.channels})")
        if block.shape[0] == 0:
            return
        block = np.ascontiguousarray(block, dtype=np.float64)
        peak = max(float(block.max()), -float(block.min()))  # NaN propagates; no |x| temporary
        if not np.isfinite(peak):
            raise OutputError(
                f"{self.path}: block at frame {self.frames_written} contains NaN or infinite samples: "
                "expected finite values"
            )
        try:
            self._sf.write(block)
        except _SOUNDFILE_ERRORS as exc:
            raise OutputError(f"{self.path}: write failed at frame {self.frames_written}: {_reason(exc)}") from exc
        self.peak = max(self.peak, peak)
        self.frames_written += block.shape[0]

    def commit(self):
        """Finish the file and move it into place; returns the final path.

        Calling it again after success does nothing.  Any failure removes the
        temporary and raises :class:`OutputError`.
        """
        if self._state == "committed":
            return self.path
        if self._state != "open":
            raise OutputError(f"{self.path}: commit after the file was {self._state}")
        if self.format == "FLAC" and self.frames_written == 0:
            # libsndfile writes no FLAC stream at all for zero frames: the result would not be a FLAC file.
            self.abort()
            raise OutputError(f"{self.path}: no frames written: a FLAC file needs at least 1 frame")
        try:
            self._sf.close()
            self._sf = None
            if self.durable:
                os.fsync(self._fd)
            os.close(self._fd)
            self._fd = None
            os.replace(self.temp_path, self.path)
        except BaseException as exc:
            self._discard()
            self._state = "aborted"
            if isinstance(exc, (OSError, RuntimeError)):
                raise OutputError(f"{self.path}: cannot finish the file: {_reason(exc)}") from exc
            raise
        self._state = "committed"
        if self.durable:
            self._sync_folder()
        return self.path

    def abort(self):
        """Delete the temporary file; nothing appears at ``path``.  Safe to call twice, no-op after commit."""
        if self._state in ("committed", "aborted"):
            return
        self._discard()
        self._state = "aborted"

    def _discard(self):
        if self._sf is not None:
            try:
                self._sf.close()
            except Exception:
                pass
            self._sf = None
        if self._fd is not None:
            try:
                os.close(self._fd)
            except OSError:
                pass
            self._fd = None
        if self.temp_path is not None:
            try:
                os.unlink(self.temp_path)
            except FileNotFoundError:
                pass

    def _sync_folder(self):
        sync_folder(os.path.dirname(os.path.abspath(self.path)))


def write_response(path, ir, *, rate_hz):
    """Write an impulse response as a 32-bit float WAV (atomically, via :class:`BlockWriter`).

    Float keeps levels above full scale and needs no dither; 32 bits hold
    the response to about -150 dB re its peak.

    Parameters
    ----------
    path : str or os.PathLike
    ir : numpy.ndarray
        float64, shape ``(frames, channels)``, finite; frames ``>= 1``.
    rate_hz : int
        Sample rate in Hz (a float with no fractional part is accepted).

    Returns
    -------
    str
        The final path.
    """
    ir = np.asarray(ir)
    if ir.ndim != 2 or ir.shape[0] < 1 or ir.shape[1] < 1:
        raise OutputError(f"{os.fspath(path)}: ir has shape {ir.shape}: expected (frames, channels), frames >= 1")
    format = wav_container(frames=ir.shape[0], channels=ir.shape[1], subtype="FLOAT")
    with BlockWriter(path, rate_hz=rate_hz, channels=ir.shape[1], format=format, subtype="FLOAT") as w:
        w.write(ir)
    return w.path


def sync_folder(folder):
    """fsync a folder so that a rename into it is durable (POSIX); best effort elsewhere."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


#: libsndfile's command that turns off the PEAK chunk of float files (sndfile.h: SFC_SET_ADD_PEAK_CHUNK).
_SFC_SET_ADD_PEAK_CHUNK = 0x1050


def _no_peak_chunk(soundfile_obj):
    """Ask libsndfile not to write a PEAK chunk: it holds a time stamp, so the same render would
    give different bytes a second later.  Must run before the first frame is written."""
    try:
        soundfile_obj._check_if_closed()
        sf._snd.sf_command(soundfile_obj._file, _SFC_SET_ADD_PEAK_CHUNK, sf._ffi.NULL, 0)
    except (AttributeError, TypeError):  # another soundfile build: keep its default
        pass


def read_tags(path):
    """The text tags libsndfile exposes (title, artist, comment, date, ...), as a dict; {} on failure."""
    try:
        with sf.SoundFile(os.fspath(path)) as f:
            return dict(f.copy_metadata())
    except _SOUNDFILE_ERRORS:
        return {}


def sha256_file(path, *, chunk_bytes=1 << 20):
    """SHA-256 of a file's bytes, as 64 lowercase hex digits.

    Parameters
    ----------
    path : str or os.PathLike
    chunk_bytes : int
        Read size, bytes, ``>= 1``.

    Raises
    ------
    AudioInputError
        The file cannot be read.
    """
    if not (_is_int(chunk_bytes) and chunk_bytes >= 1):
        raise ParameterError(f"chunk_bytes = {chunk_bytes!r}: must be an integer >= 1")
    p = os.fspath(path)
    digest = hashlib.sha256()
    buf = bytearray(int(chunk_bytes))
    view = memoryview(buf)
    try:
        with open(p, "rb", buffering=0) as f:
            while True:
                n = f.readinto(buf)
                if not n:
                    break
                digest.update(view[:n])
    except OSError as exc:
        raise AudioInputError(f"{p}: cannot read for hashing: {exc.strerror or exc}") from exc
    return digest.hexdigest()
