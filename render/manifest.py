"""The manifest: what was done to every file, written atomically as JSON."""

from __future__ import annotations

import json
import os
import platform
import tempfile
import time
from pathlib import Path

from . import __version__
from .errors import OutputError

__all__ = ["SCHEMA_VERSION", "library_versions", "write_bytes_atomic", "write_json_atomic", "read_manifest", "new_manifest"]

SCHEMA_VERSION = 1


def library_versions():
    """Versions of everything that computed an output."""
    import numpy
    import scipy
    import soundfile

    return {
        "render": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "soundfile": soundfile.__version__,
        "libsndfile": soundfile.__libsndfile_version__,
    }


def new_manifest(job, *, engine_version):
    return {
        "schema_version": SCHEMA_VERSION,
        "job": {"name": job.name, "path": str(job.path), "sha256": job.text_sha256},
        "engine_version": engine_version,
        "versions": library_versions(),
        "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "rooms": [],
        "sources": [],
        "summary": {},
    }


def write_bytes_atomic(path, data):
    """Write bytes to a temporary file beside ``path``, fsync it, then rename it into place.

    Returns the path.  Permissions follow the umask (as an ordinary file would).
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=str(path.parent))
    except OSError as e:
        raise OutputError(f"{path}: cannot write ({e.strerror or e})") from None
    umask = os.umask(0)
    os.umask(umask)
    try:
        os.chmod(tmp, 0o666 & ~umask)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as e:  # Ctrl-C too: no temporary is left behind
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(e, OSError):
            raise OutputError(f"{path}: cannot write ({e.strerror or e})") from None
        raise
    return path


def write_json_atomic(path, data):
    """Write JSON atomically (see :func:`write_bytes_atomic`)."""
    return write_bytes_atomic(path, (json.dumps(data, indent=2) + "\n").encode("utf-8"))


def read_manifest(path):
    """The manifest at ``path`` as a dict, or None if there is none or it is unreadable."""
    try:
        with open(path, encoding="utf-8") as f:
            data = json.load(f)
    except (OSError, ValueError):
        return None
    if not isinstance(data, dict) or data.get("schema_version") != SCHEMA_VERSION:
        return None
    return data


def merge_shards(out_dir):
    """Combine ``manifest.shard-K-of-N.json`` files into one manifest.

    Returns
    -------
    (manifest, problems) : (dict, list of str)
        The merged manifest (sources sorted by path and group, rooms by path)
        and what is wrong: missing shards, sources rendered by two shards,
        shards of different jobs.  The caller decides whether to write it.
    """
    from .shards import SHARD_NAME_RE

    out_dir = Path(out_dir)
    found = {}
    for p in sorted(out_dir.glob("manifest.shard-*-of-*.json")):
        m = SHARD_NAME_RE.match(p.name)
        if m:
            found[(int(m.group(1)), int(m.group(2)))] = p
    if not found:
        raise OutputError(f"{out_dir}: no manifest.shard-K-of-N.json files to merge")
    counts = {n for _, n in found}
    problems = []
    if len(counts) > 1:
        problems.append(f"shards of different splits: N = {', '.join(str(n) for n in sorted(counts))}")
    n = max(counts)
    missing = [k for k in range(1, n + 1) if (k, n) not in found]
    if missing:
        problems.append(f"missing shard(s) {', '.join(str(k) for k in missing)} of {n}")
    merged = None
    seen = {}
    rooms = {}
    for (k, nn), path in sorted(found.items(), key=lambda kv: (kv[0][1], kv[0][0])):
        data = read_manifest(path)
        if data is None:
            problems.append(f"{path.name}: unreadable or of another schema version")
            continue
        if merged is None:
            merged = {key: value for key, value in data.items() if key not in ("sources", "rooms", "shard", "summary")}
            merged["sources"], merged["rooms"] = [], []
            merged["merged_from"] = []
        elif data["job"]["sha256"] != merged["job"]["sha256"]:
            problems.append(f"{path.name}: from another job file (sha256 {data['job']['sha256'][:12]}…)")
            continue
        merged["merged_from"].append(path.name)
        for room in data.get("rooms", []):
            rooms.setdefault(room["path"], room)
        for entry in data.get("sources", []):
            ident = (entry["source"], entry["group"])
            if ident in seen:
                problems.append(f"{entry['source']} (group {entry['group']}) is in {seen[ident]} and {path.name}")
                continue
            seen[ident] = path.name
            merged["sources"].append(entry)
    if merged is None:
        raise OutputError(f"{out_dir}: no readable shard manifest")
    merged["sources"].sort(key=lambda e: (e["source"], e["group"]))
    merged["rooms"] = [rooms[p] for p in sorted(rooms)]
    statuses = [e["status"] for e in merged["sources"]]
    merged["summary"] = {
        "rendered": statuses.count("rendered"),
        "skipped": statuses.count("skipped"),
        "failed": statuses.count("failed"),
        "problems": problems,
    }
    return merged, problems
