"""Start early the server that a local Dask cluster's workers fork from (standard library only).

``render run --scheduler local`` calls :func:`prestart_scheduler` before it
imports anything heavy: the server imports distributed and ``render.batch``
(about 2 s on a 2-core machine, ``scipy.signal`` alone 1 s) while this process
imports the same, reads the job and plans.  :mod:`render.batch` calls it again
(harmless) for library callers of ``run_plan``.
"""

from __future__ import annotations

import multiprocessing
import os

__all__ = ["prestart_scheduler"]

#: Environment of the forkserver, hence of the workers, unless the user set these: single-threaded
#: numerics, as distributed's own pre-spawn defaults (the server starts before distributed is imported).
_FORKSERVER_ENV = {"OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}


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
