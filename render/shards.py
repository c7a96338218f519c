"""Deterministic partition of a plan's tasks into shards, and merging their manifests.

A render farm runs ``render run JOB --shard K/N`` as N independent commands
(a job array).  Every command plans the same job on its own machine, so the
partition must depend only on what every machine reads identically: the
files' headers and the job text, never on timing, hash order or floating
point details.  Each task's weight is ``(frames + an integer tail estimate
from the room's longest decay) × output channels``; tasks are taken heaviest
first (ties by source path) and each goes to the lightest shard so far
(ties to the lowest shard number): greedy longest-processing-time.

>>> assign_shards([5, 4, 3, 3, 1], shards=2)
[0, 1, 1, 0, 1]
"""

from __future__ import annotations

import math
import os
import re

from .errors import ParameterError

__all__ = ["assign_shards", "parse_shard", "task_weight", "shard_manifest_name", "SHARD_NAME_RE"]

SHARD_NAME_RE = re.compile(r"^manifest\.shard-(\d+)-of-(\d+)\.json$")


def task_weight(task):
    """Integer work estimate of a task (identical on every machine that reads the same files)."""
    if task.info is None or task.room is None:
        return 1
    tail = int(math.ceil(task.room.decay_max_s * 1.5 * task.info.rate_hz)) if task.tail == "extend" else 0
    return (task.info.frames + tail) * max(task.channels_out, 1)


def assign_shards(weights, *, shards):
    """Shard index (0-based) of each item, by greedy longest-processing-time.

    Parameters
    ----------
    weights : sequence of int
        Work of each item, in the plan's order.
    shards : int
        Number of shards, ≥ 1.
    """
    if isinstance(shards, bool) or not isinstance(shards, int) or shards < 1:
        raise ParameterError(f"shards = {shards!r}: must be a whole number ≥ 1")
    order = sorted(range(len(weights)), key=lambda i: (-int(weights[i]), i))
    load = [0] * shards
    out = [0] * len(weights)
    for i in order:
        k = min(range(shards), key=lambda s: (load[s], s))
        out[i] = k
        load[k] += int(weights[i])
    return out


def parse_shard(text, *, environ=None):
    """``"K/N"`` (1-based) or ``"slurm"`` (from the job-array environment) → (K, N).

    ``slurm`` reads SLURM_ARRAY_TASK_ID, SLURM_ARRAY_TASK_COUNT and
    SLURM_ARRAY_TASK_MIN (arrays may start at any index), so shard
    K = TASK_ID − TASK_MIN + 1.
    """
    env = os.environ if environ is None else environ
    if text == "slurm":
        names = ("SLURM_ARRAY_TASK_ID", "SLURM_ARRAY_TASK_COUNT", "SLURM_ARRAY_TASK_MIN")
        missing = [n for n in names if n not in env]
        if missing:
            raise ParameterError(f"--shard slurm: {', '.join(missing)} not set: run inside a job array, or give K/N")
        try:
            task_id, count, first = (int(env[n]) for n in names)
        except ValueError:
            raise ParameterError(
                "--shard slurm: " + ", ".join(f"{n}={env[n]!r}" for n in names) + ": expected whole numbers"
            ) from None
        k, n = task_id - first + 1, count
    else:
        m = re.fullmatch(r"\s*(\d+)\s*/\s*(\d+)\s*", text or "")
        if not m:
            raise ParameterError(f"--shard = {text!r}: expected K/N (e.g. 2/8) or 'slurm'")
        k, n = int(m.group(1)), int(m.group(2))
    if not (n >= 1 and 1 <= k <= n):
        raise ParameterError(f"--shard = {k}/{n}: expected 1 ≤ K ≤ N")
    return k, n


def shard_manifest_name(k, n):
    return f"manifest.shard-{k}-of-{n}.json"
