"""Run a plan: every task on an executor, failures recorded, a manifest at the end.

* ``jobs == 1`` renders in this process; otherwise a process pool of ``jobs``
  workers (fork where the platform has it, so the responses synthesised while
  planning are inherited; each worker synthesises a response at most once).
* One bad file never stops the batch: its error goes into the manifest.
* Ctrl-C cancels pending work; running renders abort and remove their
  temporary files; the manifest records what finished.
"""

from __future__ import annotations

import concurrent.futures as cf
import multiprocessing
import os
import sys
import time
import traceback
from pathlib import Path

from . import audio_io
from .errors import RenderError
from .manifest import new_manifest, read_manifest, write_json_atomic
from .errors import ParameterError
from .plan import MANIFEST_NAME, response_files
from .renderer import render_task
from .shards import assign_shards, shard_manifest_name, task_weight
from .synthesis import ENGINE_VERSION, synthesize

__all__ = ["run_plan", "BatchResult"]


class BatchResult:
    """Counts of a run and its manifest."""

    def __init__(self, manifest, interrupted=False):
        self.manifest = manifest
        self.interrupted = interrupted
        statuses = [s["status"] for s in manifest["sources"]]
        self.rendered = statuses.count("rendered")
        self.skipped = statuses.count("skipped")
        self.failed = statuses.count("failed")


def _worker(task, output_dir):
    """Run in a worker: never raises for a bad file, returns (status, facts or error)."""
    try:
        return "rendered", render_task(task, output_dir=output_dir)
    except RenderError as e:
        return "failed", str(e)
    except (OSError, ValueError, RuntimeError, MemoryError) as e:
        return "failed", f"{task.key}: {type(e).__name__}: {e}"
    except Exception as e:  # noqa: BLE001 - a bug must not stop the batch either
        return "failed", f"{task.key}: internal error {type(e).__name__}: {e}\n{traceback.format_exc(limit=3)}"


def _entry(task, status, facts=None, error=None):
    info = task.info
    entry = {
        "source": task.key,
        "group": task.group,
        "status": status,
        "error": error,
        "input": None
        if info is None
        else {
            "path": task.key,
            "sha256": None,
            "frames": info.frames,
            "rate_hz": info.rate_hz,
            "channels": info.channels,
            "subtype": info.subtype,
            "format": info.format,
        },
        "room": task.room_name,
        "room_fingerprint": task.room.fingerprint() if task.room is not None else None,
        "settings_sha256": task.settings_sha256,
        "wet_db": task.wet_db,
        "dry_db": task.dry_db,
        "channels_out": task.channels_out,
        "format": task.format,
        "subtype": task.subtype,
        "tail_frames": task.tail_frames if task.tail == "extend" else 0,
        "notes": list(task.notes),
        "stems": {},
        "render_s": None,
    }
    if facts:
        entry["input"]["sha256"] = facts["input_sha256"]
        entry["stems"] = facts["stems"]
        entry["render_s"] = facts["render_s"]
    return entry


def _can_skip(task, old, output_dir):
    if old is None or old.get("status") not in ("rendered", "skipped"):
        return False
    if old.get("settings_sha256") != task.settings_sha256 or not old.get("input"):
        return False
    if set(old.get("stems", {})) != {stem for stem, _ in task.outputs}:
        return False
    try:
        if audio_io.sha256_file(task.source) != old["input"].get("sha256"):
            return False
        for stem, rel in task.outputs:
            rec = old["stems"][stem]
            p = Path(output_dir) / rel
            if rec.get("path") != rel or not p.is_file() or audio_io.sha256_file(p) != rec.get("sha256"):
                return False
    except (OSError, RenderError):
        return False
    return True


class _Progress:
    """tqdm on a terminal, plain lines otherwise, nothing with ``quiet``."""

    def __init__(self, *, files, audio_s, quiet):
        self.files, self.audio_s, self.quiet = files, audio_s, quiet
        self.done_files, self.done_s = 0, 0.0
        self.started = time.monotonic()
        self.bar = None
        if not quiet and sys.stderr.isatty():
            from tqdm import tqdm

            self.bar = tqdm(total=round(audio_s, 2), unit="s", unit_scale=False, desc="render", file=sys.stderr,
                            bar_format="{desc}: {percentage:3.0f}%|{bar}| {postfix} [{elapsed}<{remaining}]")
            self._postfix()

    def _postfix(self):
        self.bar.set_postfix_str(f"{self.done_files}/{self.files} files, {self.done_s / 3600:.3f}/{self.audio_s / 3600:.3f} h audio")

    def step(self, *, audio_s, label):
        self.done_files += 1
        self.done_s += audio_s
        if self.quiet:
            return
        if self.bar is not None:
            self.bar.update(round(audio_s, 2))
            self._postfix()
            return
        elapsed = time.monotonic() - self.started
        eta = elapsed / self.done_s * (self.audio_s - self.done_s) if self.done_s > 0 else 0.0
        print(f"render: {self.done_files}/{self.files} files, {self.done_s / 3600:.3f} h of audio, "
              f"ETA {eta:.0f} s: {label}", file=sys.stderr, flush=True)

    def close(self):
        if self.bar is not None:
            self.bar.close()


def _write_rooms(plan, manifest, tasks):
    files = response_files(plan)
    used = {(t.room_name, t.room.fingerprint(), float(t.info.rate_hz), t.channels_out) for t in tasks if t.error is None}
    for name, room, rate, channels in plan.rooms:
        if (name, room.fingerprint(), rate, channels) not in used:
            continue
        path = files[(name, room.fingerprint(), rate, channels)]
        response = synthesize(room, rate_hz=rate, channels=channels, tail_floor_db=plan.job.tail_floor_db)
        path.parent.mkdir(parents=True, exist_ok=True)
        audio_io.write_response(path, response.ir, rate_hz=rate)
        manifest["rooms"].append(
            {
                "name": name,
                "fingerprint": room.fingerprint(),
                "parameters": room.sound_fields(),
                "rate_hz": rate,
                "channels": channels,
                "path": path.relative_to(plan.job.output_dir).as_posix(),
                "sha256": audio_io.sha256_file(path),
                "tail_frames": response.tail_frames,
                "bands_hz": list(response.bands_hz),
                "t30_target_s": [round(v, 4) for v in response.target_s],
                "t30_measured_s": [round(v, 4) for v in response.measured_s],
                "t30_error_pct": [round(v, 3) for v in response.error_pct],
            }
        )


class _DaskExecutor:
    """A Dask distributed client's concurrent.futures executor (and the cluster it may own)."""

    def __init__(self, address, jobs):
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            raise ParameterError(
                "--scheduler needs Dask: pip install 'render[farm]' (dask[distributed])"
            ) from None
        self.cluster = None
        if address == "local":
            self.cluster = LocalCluster(n_workers=jobs, threads_per_worker=1, processes=True,
                                        dashboard_address=None)
            self.client = Client(self.cluster)
        else:
            try:
                self.client = Client(address, timeout=30)
            except (OSError, TimeoutError) as e:
                raise ParameterError(f"--scheduler = {address!r}: cannot connect ({e})") from None
        self.executor = self.client.get_executor(pure=False, retries=2)

    def submit(self, fn, *args):
        return self.executor.submit(fn, *args)

    def shutdown(self, wait=True, cancel_futures=False):
        try:
            self.executor.shutdown(wait=wait)
        finally:
            self.client.close()
            if self.cluster is not None:
                self.cluster.close()


def _executor(jobs, scheduler=None):
    if scheduler is not None:
        return _DaskExecutor(scheduler, jobs)
    if jobs == 1:
        return None
    methods = multiprocessing.get_all_start_methods()
    ctx = multiprocessing.get_context("fork" if "fork" in methods else "spawn")
    return cf.ProcessPoolExecutor(max_workers=jobs, mp_context=ctx)


def run_plan(plan, *, jobs=None, quiet=False, resume=False, shard=None, scheduler=None):
    """Render every task of a plan; write the rooms, the stems and the manifest.

    Parameters
    ----------
    plan : render.plan.Plan
    jobs : int, optional
        Worker processes; default all cores; 1 renders in this process.
    quiet : bool
        No progress output.
    resume : bool
        Skip sources whose input hash and settings match the existing manifest
        and whose outputs still exist with their recorded hashes.
    shard : (int, int), optional
        (K, N): render only shard K of N (1-based) and write
        ``manifest.shard-K-of-N.json`` instead of ``manifest.json``.
    scheduler : str, optional
        A Dask distributed scheduler's address, or ``"local"`` for a
        ``LocalCluster`` of ``jobs`` workers on this machine.

    Returns
    -------
    BatchResult
    """
    job = plan.job
    out_dir = job.output_dir
    out_dir.mkdir(parents=True, exist_ok=True)
    jobs = jobs or os.cpu_count() or 1
    selected = range(len(plan.tasks))
    manifest_path = out_dir / MANIFEST_NAME
    if shard is not None:
        k, n = shard
        owners = assign_shards([task_weight(t) for t in plan.tasks], shards=n)
        selected = [i for i in selected if owners[i] == k - 1]
        manifest_path = out_dir / shard_manifest_name(k, n)
    old = None
    if resume:
        old = read_manifest(manifest_path) or (read_manifest(out_dir / MANIFEST_NAME) if shard else None)
    old_by_key = {(e["source"], e["group"]): e for e in (old or {}).get("sources", [])}
    manifest = new_manifest(job, engine_version=ENGINE_VERSION)
    if shard is not None:
        manifest["shard"] = {"k": shard[0], "n": shard[1]}
    _write_rooms(plan, manifest, [plan.tasks[i] for i in selected])

    entries = {}
    todo = []
    for i in selected:
        task = plan.tasks[i]
        if task.error is not None:
            entries[i] = _entry(task, "failed", error=task.error)
        elif resume and _can_skip(task, old_by_key.get((task.key, task.group)), out_dir):
            e = dict(old_by_key[(task.key, task.group)])
            e["status"] = "skipped"
            entries[i] = e
        else:
            todo.append(i)

    progress = _Progress(
        files=len(todo),
        audio_s=sum(plan.tasks[i].frames_out / plan.tasks[i].info.rate_hz for i in todo),
        quiet=quiet,
    )
    interrupted = False
    executor = _executor(min(jobs, max(len(todo), 1)), scheduler) if todo else None
    try:
        if executor is None:
            for i in todo:
                t = plan.tasks[i]
                status, payload = _worker(t, out_dir)
                entries[i] = _entry(t, status, facts=payload if status == "rendered" else None,
                                    error=None if status == "rendered" else payload)
                progress.step(audio_s=t.frames_out / t.info.rate_hz, label=t.key)
        else:
            futures = {executor.submit(_worker, plan.tasks[i], out_dir): i for i in todo}
            for fut in cf.as_completed(futures):
                i = futures[fut]
                t = plan.tasks[i]
                try:
                    status, payload = fut.result()
                except Exception as e:  # a worker died (killed, out of memory)
                    status, payload = "failed", f"{t.key}: worker failed: {type(e).__name__}: {e}"
                entries[i] = _entry(t, status, facts=payload if status == "rendered" else None,
                                    error=None if status == "rendered" else payload)
                progress.step(audio_s=t.frames_out / t.info.rate_hz, label=t.key)
    except KeyboardInterrupt:
        interrupted = True
        if executor is not None:
            executor.shutdown(wait=True, cancel_futures=True)
            executor = None
    finally:
        if executor is not None:
            executor.shutdown(wait=True)
        progress.close()
    manifest["sources"] = [entries[i] for i in sorted(entries, key=lambda i: (plan.tasks[i].key, plan.tasks[i].group))]
    result = BatchResult(manifest, interrupted=interrupted)
    manifest["summary"] = {
        "rendered": result.rendered,
        "skipped": result.skipped,
        "failed": result.failed,
        "not_run": len(selected) - len(entries),
        "interrupted": interrupted,
    }
    write_json_atomic(manifest_path, manifest)
    return result
