"""A persistent, per-user cache of synthesised room responses (I/O around :mod:`render.synthesis`).

Synthesising and calibrating a room takes about a second at 48 kHz; a second
``render run`` of the same rooms reads each response from this cache instead.
:func:`cached_synthesize` is a drop-in for :func:`render.synthesis.synthesize`
(with its default settings) that looks in the in-process cache first, then on
disk, and synthesises only on a miss (storing the result for next time).

Where: :func:`cache_dir`: ``$RENDER_CACHE_DIR`` if set (``off`` or an empty
value turns the cache off), else ``$XDG_CACHE_HOME/render/responses``, else
``~/.cache/render/responses``.

What: one entry per response, named by a sha256 key of everything that shapes
it (:func:`cache_key`: the engine version, the room's fingerprint, the rate,
the channel count, the tail floor, the other synthesis settings, and the
numpy and scipy major.minor versions, whose arithmetic the samples depend on).
An entry is one file, ``<key>.response``: a first line naming the layout
(``render response cache entry 2``), a second line of JSON (the
:class:`~render.synthesis.Response`'s other fields, the samples' shape and
their sha256), then the samples as little-endian float64, frame by frame.
One file, so one rename publishes the samples and the metadata that vouches
for them together.

Safety:

* an entry is written under a unique temporary name in the cache folder
  (host, process and a random part; created with ``O_EXCL``) and renamed over
  the entry in one step (``os.replace``), so a reader sees an old entry or a
  new one, never half of one or parts of two, and any number of processes or
  machines may write the same entry at once (on shared storage too): the
  entry left is one writer's whole;
* a read takes the file once and uses it only if everything agrees (layout,
  key, shape, length, sha256 of the samples, room fingerprint, frame count);
  anything else (a truncated, damaged or mismatching entry) is a miss, is
  synthesised again and written over;
* the cache never raises: an unreadable entry is a miss, an unwritable folder
  only means nothing is stored, and errors in the arguments are the
  :class:`~render.errors.ParameterError` of :func:`render.synthesis.synthesize`.

Machines whose arithmetic differs in the last bits (another processor's
vector code in numpy or the BLAS) may share one folder: whichever entry was
written last is served to all of them, which keeps a farm's outputs alike.

Housekeeping: nothing is deleted on its own.  Entries are about the size of
the response (1-10 MB at 48 kHz); a hit sets the entry's modification time, so
:func:`prune` (``render cache``) can drop the entries not used for a while or
the least recently used ones beyond a size, and the folder may be removed at
any time.  Only regular files named as this module names them are ever
removed: entries, ``.part`` files a killed writer left behind (after an
hour), and the ``.npy`` and ``.json`` files of layout 1, which no key of this
version names.  A hit updates the time only where the reader may write the
entry: in a folder shared by several users, another user's hits do not count.

Example (a temporary cache folder):

>>> import os, shutil, tempfile
>>> from render.room import Room
>>> saved = os.environ.get("RENDER_CACHE_DIR")
>>> os.environ["RENDER_CACHE_DIR"] = folder = tempfile.mkdtemp()
>>> room = Room(decay_s=0.3, size_m=(4.0, 3.0, 2.5))
>>> r = cached_synthesize(room, rate_hz=16000, channels=1, tail_floor_db=-80.0)
>>> sorted(p.suffix for p in cache_dir().iterdir())
['.response']
>>> shutil.rmtree(folder)
>>> _ = os.environ.pop("RENDER_CACHE_DIR") if saved is None else os.environ.update(RENDER_CACHE_DIR=saved)
"""

from __future__ import annotations

import hashlib
import inspect
import json
import os
import dataclasses
import re
import secrets
import socket
import stat
import time
from pathlib import Path

import numpy as np
import scipy

from . import synthesis
from .errors import ParameterError

__all__ = ["cache_dir", "cache_key", "entry_path", "cached_synthesize", "cache_entries", "prune", "CacheEntry",
           "ENV_VAR", "FORMAT_VERSION"]

#: Environment variable naming the cache folder (``off`` or empty: no cache).
ENV_VAR = "RENDER_CACHE_DIR"
#: Layout of an entry; part of every key (1: a .npy and a .json file; 2: one file).
FORMAT_VERSION = 2
#: First line of an entry file.
_MAGIC = f"render response cache entry {FORMAT_VERSION}\n".encode("ascii")
#: Longest metadata line read (a 16-channel response's is about 10 kB).
_MAX_META_BYTES = 1 << 20

#: synthesize()'s settings that cached_synthesize leaves at their defaults (part of every key).
_DEFAULTS = {
    name: p.default
    for name, p in inspect.signature(synthesis.synthesize).parameters.items()
    if name in ("calibrate", "tolerance_pct", "max_iterations", "alias_db")
}


def _major_minor(version):
    return ".".join(str(version).split(".")[:2])


def cache_dir():
    """The folder of the response cache, or None when the cache is off.

    ``$RENDER_CACHE_DIR`` when set (``off`` in any case, or an empty value:
    None); else ``$XDG_CACHE_HOME/render/responses`` when that is an absolute
    path (the XDG Base Directory Specification ignores relative ones); else
    ``~/.cache/render/responses``; None when there is no home folder either.
    The folder need not exist (it is made on the first store).

    Returns
    -------
    pathlib.Path or None
    """
    value = os.environ.get(ENV_VAR)
    if value is not None:
        if value.strip().lower() in ("", "off"):
            return None
        return Path(value).expanduser()
    xdg = os.environ.get("XDG_CACHE_HOME", "")
    if xdg and os.path.isabs(xdg):
        return Path(xdg) / "render" / "responses"
    try:
        home = Path.home()
    except (RuntimeError, KeyError):  # no HOME and no password entry
        return None
    return home / ".cache" / "render" / "responses"


def _identity(room, rate_hz, channels, tail_floor_db):
    """Everything that shapes the response, as JSON-ready values (ParameterError for bad arguments)."""
    key = synthesis._validated_key(room, rate_hz=rate_hz, channels=channels, tail_floor_db=tail_floor_db, **_DEFAULTS)
    ident = {
        "format": FORMAT_VERSION,
        "synthesis": list(key),  # engine version, room fingerprint, rate, channels, floor, settings
        "numpy": _major_minor(np.__version__),
        "scipy": _major_minor(scipy.__version__),
    }
    return key, ident


def _digest(ident):
    return hashlib.sha256(json.dumps(ident, sort_keys=True).encode("utf-8")).hexdigest()


def cache_key(room, *, rate_hz, channels, tail_floor_db):
    """The sha256 (hex) that names a response's cache entry.

    Parameters
    ----------
    room : Room
    rate_hz : float
        Sample rate in Hz, 8000 to 384000.
    channels : int
        1 to 16.
    tail_floor_db : float
        -150 to -20 dB.

    Returns
    -------
    str
        64 hex digits.

    Raises
    ------
    ParameterError
        As :func:`render.synthesis.synthesize` does for the same arguments.
    """
    return _digest(_identity(room, rate_hz, channels, tail_floor_db)[1])


def entry_path(key, folder=None):
    """The file of an entry: ``<key>.response`` in ``folder`` (default :func:`cache_dir`).

    Returns
    -------
    pathlib.Path or None
        None when the cache is off.
    """
    folder = cache_dir() if folder is None else Path(folder)
    if folder is None:
        return None
    return folder / f"{key}.response"


def cached_synthesize(room, *, rate_hz, channels, tail_floor_db):
    """:func:`render.synthesis.synthesize` through the in-process and the on-disk cache.

    The in-process cache first (the same object as a second ``synthesize``
    call returns); then the entry in :func:`cache_dir`, read once and checked
    (see the module notes); then synthesis, whose response is stored.  A
    response found on disk joins the in-process cache, so a later
    ``synthesize`` of the same room in this process returns it too.  A
    response already in the in-process cache but not on disk is stored.

    Parameters
    ----------
    room : Room
    rate_hz : float
        Sample rate in Hz, 8000 to 384000.
    channels : int
        1 to 16.
    tail_floor_db : float
        -150 to -20 dB.

    Returns
    -------
    Response
        Equal to what ``synthesize(room, rate_hz=rate_hz, channels=channels,
        tail_floor_db=tail_floor_db)`` returns: the same fields, and the same
        samples bit for bit (float64, C-contiguous, read-only).

    Raises
    ------
    ParameterError
        As :func:`render.synthesis.synthesize`; never because of the cache.
    """
    key, ident = _identity(room, rate_hz, channels, tail_floor_db)
    folder = cache_dir()
    hit = synthesis._cache_get(key)
    if folder is None:
        return hit if hit is not None else _synthesize(room, rate_hz, channels, tail_floor_db)
    name = _digest(ident)
    if hit is not None:
        if not _exists(entry_path(name, folder)):
            _store(folder, name, ident, hit)
        return hit
    response = _load(folder, name, ident, key)
    if response is not None:
        _touch(entry_path(name, folder))
        synthesis._cache_put(key, response)
        return response
    response = _synthesize(room, rate_hz, channels, tail_floor_db)
    _store(folder, name, ident, response)
    return response


def _synthesize(room, rate_hz, channels, tail_floor_db):
    return synthesis.synthesize(room, rate_hz=rate_hz, channels=channels, tail_floor_db=tail_floor_db)


def _touch(path, when=None):
    """Mark an entry as used now, or at ``when`` (its modification time), for :func:`prune`; never raises."""
    try:
        os.utime(path, None if when is None else (when, when))
    except OSError:
        pass  # a read-only folder: the entry keeps its old time


def _exists(path):
    try:
        return path.is_file()
    except OSError:
        return False


# ----------------------------------------------------------------------------- reading


def _floats(values):
    return tuple(float(v) for v in values)


def _response_fields(response):
    """The Response's fields other than the samples, JSON-ready (floats round-trip exactly)."""
    return {
        "rate_hz": response.rate_hz,
        "tail_frames": response.tail_frames,
        "bands_hz": list(response.bands_hz),
        "target_s": list(response.target_s),
        "measured_s": list(response.measured_s),
        "error_pct": list(response.error_pct),
        "channel_error_pct": [list(row) for row in response.channel_error_pct],
        "iterations": response.iterations,
        "design_s": list(response.design_s),
        "reverberant_ratio_db": response.reverberant_ratio_db,
        "room_fingerprint": response.room_fingerprint,
    }


def _read_samples(f, shape, sha256):
    """The float64 samples that follow the metadata in an open entry, or None unless length and sha256 agree."""
    if os.fstat(f.fileno()).st_size != f.tell() + 8 * shape[0] * shape[1]:
        return None  # truncated, or longer than its metadata says
    ir = np.empty(shape, dtype="<f8")
    view = memoryview(ir).cast("B")
    done = 0
    while done < view.nbytes:
        count = f.readinto(view[done:])
        if not count:
            return None  # truncated while being read
        done += count
    if f.read(1):
        return None  # grew while being read
    if hashlib.sha256(view).hexdigest() != sha256:
        return None
    ir = ir.astype(np.float64, copy=False)  # native order (a no-op on little-endian machines)
    ir.setflags(write=False)
    return ir


def _load(folder, name, ident, key):
    """The Response of an entry, or None for a missing, unreadable or inconsistent one (never raises)."""
    try:
        with open(entry_path(name, folder), "rb") as f:
            if f.readline(len(_MAGIC) + 1) != _MAGIC:
                return None
            line = f.readline(_MAX_META_BYTES)
            if not line.endswith(b"\n"):
                return None  # truncated, or longer than any metadata
            meta = json.loads(line.decode("utf-8"))
            if meta.get("key") != name or meta.get("identity") != json.loads(json.dumps(ident)):
                return None
            fields = meta["response"]
            samples = meta["samples"]
            shape = tuple(int(v) for v in samples["shape"])
            fingerprint, rate_hz, channels = key[1], key[2], key[3]
            if (
                samples.get("dtype") != "<f8"
                or len(shape) != 2
                or shape[1] != channels
                or shape[0] < 1
                or int(fields["tail_frames"]) != shape[0] - 1
                or fields["room_fingerprint"] != fingerprint
                or float(fields["rate_hz"]) != rate_hz
                or len(fields["channel_error_pct"]) != channels
            ):
                return None
            ir = _read_samples(f, shape, str(samples["sha256"]))
        if ir is None:
            return None
        return synthesis.Response(
            ir=ir,
            rate_hz=float(fields["rate_hz"]),
            tail_frames=int(fields["tail_frames"]),
            bands_hz=_floats(fields["bands_hz"]),
            target_s=_floats(fields["target_s"]),
            measured_s=_floats(fields["measured_s"]),
            error_pct=_floats(fields["error_pct"]),
            channel_error_pct=tuple(_floats(row) for row in fields["channel_error_pct"]),
            iterations=int(fields["iterations"]),
            design_s=_floats(fields["design_s"]),
            reverberant_ratio_db=float(fields["reverberant_ratio_db"]),
            room_fingerprint=str(fields["room_fingerprint"]),
        )
    except Exception:  # noqa: BLE001 - any damage to an entry is a miss, by design
        return None


# ----------------------------------------------------------------------------- writing


def _write_atomic(path, write):
    """Write a file under a unique temporary name beside ``path``, then rename it over ``path``.

    The temporary name holds the host, the process and a random part, and is
    created with ``O_EXCL`` (no two writers share one, on shared storage
    too); permissions follow the umask.  No fsync: a cache entry lost or torn
    by a crash fails its checksum and is written again.
    """
    host = "".join(c if c.isalnum() else "-" for c in socket.gethostname())[:32] or "host"
    tmp = path.with_name(f".{path.name}.{host}.{os.getpid()}.{secrets.token_hex(6)}.part")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
    try:
        with os.fdopen(fd, "wb") as f:
            write(f)
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise


def _store(folder, name, ident, response):
    """Write an entry (layout line, metadata line, samples) in one rename; False if it cannot be."""
    ir = np.ascontiguousarray(response.ir, dtype="<f8")
    data = memoryview(ir).cast("B")
    meta = {
        "key": name,
        "identity": ident,
        "samples": {"shape": list(ir.shape), "dtype": "<f8", "sha256": hashlib.sha256(data).hexdigest()},
        "response": _response_fields(response),
    }
    # One line: json.dumps escapes newlines inside strings; NaN (an unmeasurable band) is written as NaN.
    head = _MAGIC + json.dumps(meta, separators=(",", ":")).encode("utf-8") + b"\n"

    def write(f):
        f.write(head)
        f.write(data)

    try:
        Path(folder).mkdir(parents=True, exist_ok=True)
        _write_atomic(entry_path(name, folder), write)
    except OSError:
        return False
    return True


# ----------------------------------------------------------------------------- housekeeping

#: File names this module writes, and nothing else is ever removed: entries, writers' temporaries, and
#: the two files of a layout-1 entry.
_ENTRY_NAME = re.compile(r"^[0-9a-f]{64}\.response$")
_PART_NAME = re.compile(r"^\.[0-9a-f]{64}\.(response|npy|json)\..+\.part$")
_OLD_LAYOUT_NAME = re.compile(r"^[0-9a-f]{64}\.(npy|json)$")
#: A ``.part`` file younger than this may belong to a writer still at work, s.
_PART_GRACE_S = 3600.0


@dataclasses.dataclass(frozen=True)
class CacheEntry:
    """One file of the cache folder that :func:`prune` may remove.

    Attributes
    ----------
    path : pathlib.Path
    size_bytes : int
    used : float
        Last use (a hit or the store), seconds since the epoch (the file's modification time).
    kind : str
        ``'entry'``, ``'part'`` (a writer's temporary) or ``'old-layout'``.
    """

    path: Path
    size_bytes: int
    used: float
    kind: str


def cache_entries(folder=None):
    """The files of the cache folder that belong to it, most recently used first.

    Parameters
    ----------
    folder : str or os.PathLike, optional
        Default :func:`cache_dir`.

    Returns
    -------
    list of CacheEntry
        Empty when the cache is off or the folder does not exist; other files
        in the folder are not listed.
    """
    folder = cache_dir() if folder is None else Path(folder)
    if folder is None:
        return []
    found = []
    try:
        names = os.listdir(folder)
    except OSError:
        return []
    for name in names:
        if _ENTRY_NAME.match(name):
            kind = "entry"
        elif _PART_NAME.match(name):
            kind = "part"
        elif _OLD_LAYOUT_NAME.match(name):
            kind = "old-layout"
        else:
            continue
        try:
            st = os.lstat(folder / name)
        except OSError:
            continue  # removed meanwhile
        if not stat.S_ISREG(st.st_mode):
            continue  # a folder or a link with such a name is not ours
        found.append(CacheEntry(path=folder / name, size_bytes=st.st_size, used=st.st_mtime, kind=kind))
    found.sort(key=lambda e: (-e.used, e.path.name))
    return found


def prune(folder=None, *, unused_days=None, max_bytes=None, everything=False, now=None):
    """Remove cache files: all of them, those unused for a while, or the oldest beyond a size.

    Entries go when ``everything``; or when not used for ``unused_days`` or
    more; or, least recently used first, while the entries left take more than
    ``max_bytes``.  Files of layout 1 follow the same rules (a machine not yet
    upgraded may still use them).  ``.part`` files go once they are an hour
    old (younger ones may belong to a writer at work) and do not count towards
    ``max_bytes``.  A last use in the future (a clock ahead, on shared storage)
    counts as now, and the file's time is set to now.  A process reading an
    entry at that moment keeps its open file; one that misses synthesises the
    response again.

    Parameters
    ----------
    folder : str or os.PathLike, optional
        Default :func:`cache_dir`.
    unused_days : float, optional
        >= 0.
    max_bytes : int, optional
        >= 0.
    everything : bool
    now : float, optional
        The present, seconds since the epoch (default: the clock).

    Returns
    -------
    dict
        ``removed`` and ``removed_bytes``; ``kept`` and ``kept_bytes`` (files
        left, ``.part`` files included); ``failed`` (paths that could not be
        removed).

    Raises
    ------
    ParameterError
        ``unused_days`` or ``max_bytes`` negative or not a number.
    """
    for name, value in (("unused_days", unused_days), ("max_bytes", max_bytes)):
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float)) or not value >= 0):
            raise ParameterError(f"{name} = {value!r}: expected a number >= 0")
    now = time.time() if now is None else float(now)
    drop, keep = [], []
    for e in cache_entries(folder):
        if e.used > now:  # a clock ahead (another machine's, on shared storage): used now, and so from now on
            _touch(e.path, now)
            e = dataclasses.replace(e, used=now)
        age_s = now - e.used
        if e.kind == "part":
            (drop if age_s > _PART_GRACE_S else keep).append(e)
        elif everything or (unused_days is not None and age_s >= unused_days * 86400.0):
            drop.append(e)
        else:
            keep.append(e)
    if max_bytes is not None:
        total = sum(e.size_bytes for e in keep if e.kind != "part")  # a writer's temporary is not removable yet
        oldest_first = sorted((e for e in keep if e.kind != "part"), key=lambda e: (e.used, e.path.name))
        over = 0
        while total > max_bytes and over < len(oldest_first):
            total -= oldest_first[over].size_bytes
            over += 1
        going = {e.path for e in oldest_first[:over]}
        drop += oldest_first[:over]
        keep = [e for e in keep if e.path not in going]  # one pass: a farm's folder may hold thousands
    removed, removed_bytes, failed = 0, 0, []
    for e in drop:
        try:
            os.unlink(e.path)
        except FileNotFoundError:
            continue  # another process pruned it first
        except OSError:
            failed.append(str(e.path))
            keep.append(e)
            continue
        removed += 1
        removed_bytes += e.size_bytes
    return {"removed": removed, "removed_bytes": removed_bytes, "kept": len(keep),
            "kept_bytes": sum(e.size_bytes for e in keep), "failed": failed}
