"""Process set-up for rendering (standard library only): the allocator, and the local cluster's server.

:func:`tune_allocator` keeps glibc from mapping and page-faulting afresh every
large block buffer.  :func:`prestart_scheduler` starts early the server that a
local Dask cluster's workers fork from.

``render run --scheduler local`` calls :func:`prestart_scheduler` before it
imports anything heavy: the server imports distributed and ``render.batch``
(about 2 s on a 2-core machine, ``scipy.signal`` alone 1 s) while this process
imports the same, reads the job and plans.  :mod:`render.batch` calls it again
(harmless) for library callers of ``run_plan``.
"""

from __future__ import annotations

import multiprocessing
import os

__all__ = ["prestart_scheduler", "tune_allocator", "MALLOC_SETTINGS"]

#: glibc allocator settings for a process that streams buffers of tens of MB (FFT blocks of the
#: convolution, stems' blocks): such buffers are taken from and returned to the heap instead of
#: being mapped and page-faulted afresh for every block.  Measured on the 2-core build machine,
#: ``render run`` of 1 min of stereo with a 2.5 s room: 128 k minor page faults -> 49 k, 5-7 %
#: less wall time, the same peak RSS.  Names and values as mallopt(3): (parameter, bytes).
MALLOC_SETTINGS = {"MMAP_THRESHOLD": (-3, 64 * 2**20), "TRIM_THRESHOLD": (-1, 256 * 2**20), "TOP_PAD": (-2, 64 * 2**20)}

#: Environment of the forkserver, hence of the workers, unless the user set these: single-threaded
#: numerics, as distributed's own pre-spawn defaults (the server starts before distributed is imported),
#: and :data:`MALLOC_SETTINGS` (glibc reads them from the environment when a process starts).
_FORKSERVER_ENV = {"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1",
                   **{f"MALLOC_{name}_": str(value) for name, (_, value) in MALLOC_SETTINGS.items()}}


def tune_allocator():
    """Apply :data:`MALLOC_SETTINGS` to this process (and the workers it forks later); glibc only.

    Does nothing elsewhere, or for a setting the user gave in the environment
    (``MALLOC_MMAP_THRESHOLD_`` and the like).  Never raises.

    Returns
    -------
    dict
        The settings applied, name -> bytes.
    """
    import ctypes
    import ctypes.util
    import sys

    if not sys.platform.startswith("linux"):
        return {}
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        mallopt = libc.mallopt
    except (OSError, AttributeError):
        return {}
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    applied = {}
    for name, (param, value) in MALLOC_SETTINGS.items():
        if f"MALLOC_{name}_" in os.environ:
            continue
        if mallopt(param, value) == 1:  # mallopt returns 1 on success
            applied[name] = value
    return applied


def prestart_scheduler(scheduler):
    """Start early what a ``scheduler`` (as for :func:`render.batch.run_plan`) takes long to start.

    For ``"local"``, where the platform has ``forkserver``: the process that
    the cluster's workers will fork from, importing distributed and render
    (about 2 s of imports) while the caller goes on, e.g. planning.  Nothing
    for other schedulers, or without Dask.  Calling it again does nothing.

    Returns
    -------
    bool
        Whether the local cluster's workers will fork from that server.
    """
    import importlib.util

    if scheduler != "local" or "forkserver" not in multiprocessing.get_all_start_methods():
        return False
    if importlib.util.find_spec("distributed") is None:
        return False
    _start_forkserver()
    return True


def _start_forkserver():
    """Start the forkserver (if not running) importing distributed and render.batch, workers fork ready.

    Distributed sets its own preload list on first use; the server is running
    by then, so that list is not used.
    """
    from multiprocessing import forkserver

    saved = dict(os.environ)
    os.environ.update({k: v for k, v in _FORKSERVER_ENV.items() if k not in saved})
    try:
        multiprocessing.get_context("forkserver").set_forkserver_preload(["distributed", "render.batch"])
        forkserver.ensure_running()
    finally:
        for k in _FORKSERVER_ENV:
            if k not in saved:
                os.environ.pop(k, None)
