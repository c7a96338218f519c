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

__all__ = ["SCHEMA_VERSION", "library_versions", "write_json_atomic", "read_manifest", "new_manifest"]

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


def write_json_atomic(path, data):
    """Write JSON to a temporary file beside ``path``, fsync it, then rename it into place."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=str(path.parent))
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            json.dump(data, f, indent=2, sort_keys=False)
            f.write("\n")
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as e:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise OutputError(f"{path}: cannot write ({e.strerror or e})") from None


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
