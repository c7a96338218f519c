"""Run a plan: every task on an executor, failures recorded, a manifest at the end.

* ``jobs == 1`` renders in this process; otherwise a process pool of ``jobs``
  workers (fork where the platform has it, so the responses synthesised while
  planning are inherited; each worker synthesises a response at most once).
* With ``scheduler``, a Dask cluster runs the tasks instead; ``"local"`` starts
  one of ``jobs`` workers, forked from a server process that has imported
  distributed and render (see :func:`prestart_scheduler`): the cluster is up
  once those imports are done (about 2 s) and closes at once.
* One bad file never stops the batch: its error goes into the manifest.
* Ctrl-C cancels pending work; running renders abort and remove their
  temporary files; the manifest records what finished.
"""

from __future__ import annotations

import asyncio
import concurrent.futures as cf
import io
import multiprocessing
import os
import sys
import tempfile
import time
import traceback
from pathlib import Path

import numpy as np

from . import audio_io
from .delivery import decide_gain
from .errors import OutputError, ParameterError, RenderError
from .process_setup import prestart_scheduler, tune_allocator
from .loudness import integrated_over
from .manifest import new_manifest, read_manifest, write_bytes_atomic, write_json_atomic
from .plan import MANIFEST_NAME, response_files
from .renderer import RESPONSES_DIR, measure_task, render_task, response_store_path, temp_path_for
from .shards import assign_shards, shard_manifest_name, task_weight
from .synthesis import ENGINE_VERSION, synthesize

__all__ = ["run_plan", "BatchResult", "prestart_scheduler"]


class BatchResult:
    """Counts of a run and its manifest."""

    def __init__(self, manifest, interrupted=False):
        self.manifest = manifest
        self.interrupted = interrupted
        statuses = [s["status"] for s in manifest["sources"]]
        self.rendered = statuses.count("rendered")
        self.skipped = statuses.count("skipped")
        self.failed = statuses.count("failed")


def _worker(task, output_dir, mode="render", kwargs=None):
    """Run in a worker: never raises for a bad file, returns (status, facts or error)."""
    try:
        if mode == "measure":
            return "measured", measure_task(task, output_dir=output_dir)
        return "rendered", render_task(task, output_dir=output_dir, **(kwargs or {}))
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
        entry["notes"] = list(task.notes) + list(facts.get("notes", []))
        entry["metadata"] = facts.get("metadata")
    return entry


def _loudness_entry(spec, facts, before=None, decision=None):
    after = facts.get("after") if facts else None
    met = None
    if spec.active and after is not None:
        met = True
        if spec.target_lufs is not None:
            met = after["integrated_lufs"] is not None and abs(after["integrated_lufs"] - spec.target_lufs) <= (
                spec.tolerance_lu or 0.0) + 1e-9
        if spec.ceiling_dbtp is not None and after["true_peak_dbtp"] is not None:
            met = met and after["true_peak_dbtp"] <= spec.ceiling_dbtp + 1e-6
    return {
        "preset": spec.preset,
        "target_lufs": spec.target_lufs,
        "ceiling_dbtp": spec.ceiling_dbtp,
        "tolerance_lu": spec.tolerance_lu,
        "normalize": spec.normalize,
        "over_ceiling": spec.over_ceiling,
        "before": before,
        "after": after,
        "gain_db": facts.get("gain_db") if facts else None,
        "limiter_reduction_db": facts.get("limiter_reduction_db") if facts else None,
        "shortfall_lu": round(decision.shortfall_lu, 4) if decision is not None else 0.0,
        "met": met,
    }


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


def _remove(path):
    try:
        os.unlink(path)
    except OSError:
        pass


def _remove_tree(folder):
    """Remove the two-pass temporaries' folder (and anything left in it by a killed run)."""
    if folder.is_dir():
        for p in folder.iterdir():
            _remove(p)
        try:
            folder.rmdir()
        except OSError:
            pass


class _Lock:
    """One run per output folder: a lock file naming the holder; a dead holder's lock is taken over."""

    def __init__(self, folder, name):
        self.path = Path(folder) / name
        self.held = False

    def __enter__(self):
        import json
        import socket

        host = socket.gethostname()
        # The lock appears complete or not at all: written to a temporary, then hard-linked into place.
        fd, tmp = tempfile.mkstemp(prefix=".render.lock.", suffix=".part", dir=str(self.path.parent))
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                json.dump({"pid": os.getpid(), "host": host,
                           "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}, f)
            self._take(tmp, host)
        except BaseException:
            # Ctrl-C between the link and the return: a lock that is ours (the same file as our
            # temporary) goes too, since __exit__ will not run.
            try:
                if os.path.samefile(tmp, self.path):
                    _remove(self.path)
            except OSError:
                pass
            self.held = False
            raise
        finally:
            _remove(tmp)  # the lock is the hard link; the temporary goes, Ctrl-C or not
        return self

    def _take(self, tmp, host):
        import json

        for _ in range(2):
            try:
                os.link(tmp, self.path)
            except FileExistsError:
                try:
                    holder = json.loads(self.path.read_text(encoding="utf-8"))
                except (OSError, ValueError):
                    holder = {}
                pid, where = holder.get("pid"), holder.get("host")
                unreadable_and_old = not holder and time.time() - _mtime(self.path) > 60.0
                if unreadable_and_old or (where == host and isinstance(pid, int) and not _alive(pid)):
                    _remove(self.path)  # stale: its process is gone
                    continue
                raise OutputError(
                    f"{self.path.parent}: another render is running here (pid {pid} on {where}, since "
                    f"{holder.get('started', '?')}); if it is not, remove {self.path}"
                ) from None
            self.held = True
            return
        raise OutputError(f"{self.path}: cannot take the lock")

    def __exit__(self, *exc):
        if self.held:
            _remove(self.path)
            self.held = False


def _mtime(path):
    try:
        return os.stat(path).st_mtime
    except OSError:
        return time.time()


def _alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _clean_leftovers(folder):
    """Remove temporaries (``.*.part``) that a killed run left in the output folder."""
    removed = 0
    for p in Path(folder).rglob(".*.part"):
        if p.is_file():
            _remove(p)
            removed += 1
    _remove_tree(Path(folder) / ".render-tmp")
    return removed


class _Journal:
    """Finished entries, appended and fsync'd one per line, so a killed run loses nothing it finished."""

    def __init__(self, path):
        self.path = Path(path)
        self.f = None

    def read(self):
        import json

        out = []
        try:
            with open(self.path, encoding="utf-8") as f:
                for line in f:
                    try:
                        out.append(json.loads(line))
                    except ValueError:
                        pass  # a line cut short by a kill
        except OSError:
            pass
        return out

    def append(self, entry):
        import json

        if self.f is None:
            self.f = open(self.path, "a", encoding="utf-8")
        self.f.write(json.dumps(entry, separators=(",", ":")) + "\n")
        self.f.flush()
        os.fsync(self.f.fileno())

    def close(self, *, remove):
        if self.f is not None:
            self.f.close()
            self.f = None
        if remove:
            _remove(self.path)


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
        store = response_store_path(plan.job.output_dir, room=room, rate_hz=rate, channels=channels,
                                    tail_floor_db=plan.job.tail_floor_db)
        if not store.is_file():
            buf = io.BytesIO()
            np.save(buf, np.ascontiguousarray(response.ir), allow_pickle=False)
            write_bytes_atomic(store, buf.getvalue())
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
    """A Dask distributed client's concurrent.futures executor (and the cluster it may own).

    A ``"local"`` cluster's workers are forked from one server process that
    imports distributed and render once, while this process imports
    distributed and starts the scheduler (``forkserver``, where the platform
    has it); spawned workers would each start a fresh interpreter, import them
    again and tear them down at the end.  The workers keep glibc's default
    memory handling and do not profile themselves (see
    :data:`_LOCAL_CLUSTER_CONFIG`).
    """

    def __init__(self, address, jobs):
        forkserver = prestart_scheduler(address)
        try:
            import dask
            from dask.distributed import Client, LocalCluster
        except ImportError:
            raise ParameterError(
                "--scheduler needs Dask: pip install 'render[farm]' (dask[distributed])"
            ) from None
        self.cluster = None
        self.config = None
        if address == "local":
            settings = dict(_LOCAL_CLUSTER_CONFIG)
            if forkserver:
                settings["distributed.worker.multiprocessing-method"] = "forkserver"
            # Held while the cluster lives: a worker that dies is started again the same way.
            self.config = dask.config.set(settings)
            try:
                self.cluster = LocalCluster(n_workers=jobs, threads_per_worker=1, processes=True,
                                            dashboard_address=None)
                self.client = Client(self.cluster)
            except BaseException:
                self._close_cluster()
                raise
        else:
            try:
                self.client = Client(address, timeout=30)
            except (OSError, TimeoutError, asyncio.TimeoutError) as e:
                raise ParameterError(f"--scheduler = {address!r}: cannot connect ({e})") from None
        self.executor = self.client.get_executor(pure=False, retries=2)

    def submit(self, fn, *args):
        return self.executor.submit(fn, *args)

    def shutdown(self, wait=True, cancel_futures=False):
        try:
            # Dask's executor waits for every future, pending ones too, unless told not to wait:
            # then it cancels them (Ctrl-C).
            self.executor.shutdown(wait=wait and not cancel_futures)
        finally:
            try:
                self.client.close()
            finally:
                self._close_cluster()

    def _close_cluster(self):
        try:
            if self.cluster is not None:
                cluster, self.cluster = self.cluster, None
                try:
                    cluster.close(timeout=_CLOSE_TIMEOUT_S)
                except (TimeoutError, asyncio.TimeoutError):  # two classes before Python 3.11
                    pass  # the results are in; the workers end with this process (daemons)
        finally:
            if self.config is not None:
                self.config.__exit__(None, None, None)
                self.config = None


#: Dask settings while a local cluster runs (measured on 2 cores, 15 s stereo files):
#:
#: * Distributed sets ``MALLOC_TRIM_THRESHOLD_`` in its workers; setting it turns off glibc's
#:   adaptive mmap threshold, so every large buffer (the convolution's FFT blocks) is mapped afresh
#:   and page-faults in each block: 1.7-2.2x the pool's compute per task.  ``None`` leaves the variable
#:   unset (a value the user set still holds).
#: * Each worker's event loop samples the running task's stack every 10 ms (a profile for the
#:   dashboard, which is off), ticks every 20 ms and polls memory every 100 ms: 12-17 % on top of
#:   the tasks' CPU time, taken from them when every core renders (1-2 % with these settings).
_LOCAL_CLUSTER_CONFIG = {
    "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
    "distributed.worker.profile.enabled": False,
    "distributed.admin.tick.interval": "1s",
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.admin.system-monitor.interval": "2s",
}
#: Seconds a local cluster's close may take; then the batch goes on (the workers end with this process).
_CLOSE_TIMEOUT_S = 10.0


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
        spec = job.loudness
        if spec.normalize == "group" and spec.target_lufs is not None:
            # One gain per group needs the whole group in one shard: groups are the units.
            groups = sorted({t.group for t in plan.tasks})
            weight = {g: sum(task_weight(t) for t in plan.tasks if t.group == g) for g in groups}
            unit_owner = dict(zip(groups, assign_shards([weight[g] for g in groups], shards=n)))
            owners = [unit_owner[t.group] for t in plan.tasks]
        else:
            owners = assign_shards([task_weight(t) for t in plan.tasks], shards=n)
        selected = [i for i in selected if owners[i] == k - 1]
        manifest_path = out_dir / shard_manifest_name(k, n)
    tune_allocator()  # before the first large buffer; forked pool workers inherit it
    lock = _Lock(out_dir, ".render.lock" if shard is None else f".render.shard-{shard[0]}-of-{shard[1]}.lock")
    with lock:
        return _run_locked(plan, out_dir, manifest_path, selected, jobs=jobs, quiet=quiet, resume=resume,
                           shard=shard, scheduler=scheduler)


def _run_locked(plan, out_dir, manifest_path, selected, *, jobs, quiet, resume, shard, scheduler):
    """Run under the lock.  Ctrl-C before any source has started claims nothing: no manifest is written."""
    try:
        prepared = _prepare(plan, out_dir, manifest_path, selected, resume=resume, shard=shard,
                            scheduler=scheduler)
    except KeyboardInterrupt:
        # Nothing has rendered: the previous manifest (if any) stays, this run's temporaries go
        # (the folder is this run's alone unless it is a shard, whose temporaries start later).
        if shard is None:
            _clean_leftovers(out_dir)
            _remove_tree(out_dir / RESPONSES_DIR)
        raise
    return _render_prepared(plan, out_dir, manifest_path, selected, prepared, jobs=jobs, quiet=quiet,
                            shard=shard, scheduler=scheduler)


def _prepare(plan, out_dir, manifest_path, selected, *, resume, shard, scheduler):
    """Everything before the first source starts: leftovers, journal, rooms, what to skip."""
    job = plan.job
    prestart_scheduler(scheduler)  # a local cluster's start overlaps with the checks and the rooms below
    if shard is None:
        _clean_leftovers(out_dir)
    journal = _Journal(manifest_path.with_suffix(".journal.jsonl"))
    old = None
    if resume:
        old = read_manifest(manifest_path) or (read_manifest(out_dir / MANIFEST_NAME) if shard else None)
    old_by_key = {(e["source"], e["group"]): e for e in (old or {}).get("sources", [])}
    if resume:
        for e in journal.read():  # entries a killed run finished after its last manifest
            if isinstance(e, dict) and "source" in e and "group" in e:
                old_by_key[(e["source"], e["group"])] = e
    else:
        journal.close(remove=True)
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

    spec = job.loudness
    two_pass = spec.target_lufs is not None or (spec.ceiling_dbtp is not None and spec.over_ceiling != "limit")
    if two_pass and spec.normalize == "group":
        # One gain per group: a group renders whole or not at all.
        redo = {plan.tasks[i].group for i in todo}
        for i in list(entries):
            t = plan.tasks[i]
            if entries[i]["status"] == "skipped" and t.group in redo:
                del entries[i]
                todo.append(i)
        todo.sort()
    return manifest, journal, entries, todo, spec, two_pass


def _render_prepared(plan, out_dir, manifest_path, selected, prepared, *, jobs, quiet, shard, scheduler):
    manifest, journal, entries, todo, spec, two_pass = prepared
    audio_s = sum(plan.tasks[i].frames_out / plan.tasks[i].info.rate_hz for i in todo)
    progress = _Progress(files=len(todo) * (2 if two_pass else 1), audio_s=audio_s * (2 if two_pass else 1),
                         quiet=quiet)
    interrupted = False
    executor = None  # made inside the try below: a Ctrl-C while a cluster starts is handled like any other

    def execute(calls):
        """Run (index, mode, kwargs) calls; yield (index, status, payload) as they finish."""
        # Each result is yielded (and recorded by the caller) before the progress bar moves, so a
        # Ctrl-C during the bar's update cannot lose a finished file.
        if executor is None:
            for i, mode, kwargs in calls:
                status, payload = _worker(plan.tasks[i], out_dir, mode, kwargs)
                yield i, status, payload
                progress.step(audio_s=plan.tasks[i].frames_out / plan.tasks[i].info.rate_hz, label=plan.tasks[i].key)
            return
        futures = {executor.submit(_worker, plan.tasks[i], out_dir, mode, kwargs): i for i, mode, kwargs in calls}
        for fut in cf.as_completed(futures):
            i = futures[fut]
            try:
                status, payload = fut.result()
            except Exception as e:  # a worker died (killed, out of memory)
                status, payload = "failed", f"{plan.tasks[i].key}: worker failed: {type(e).__name__}: {e}"
            yield i, status, payload
            progress.step(audio_s=plan.tasks[i].frames_out / plan.tasks[i].info.rate_hz, label=plan.tasks[i].key)

    def record(i, status, payload, before=None, decision=None):
        t = plan.tasks[i]
        ok = status == "rendered"
        entries[i] = _entry(t, status, facts=payload if ok else None, error=None if ok else payload)
        entries[i]["loudness"] = _loudness_entry(spec, payload if ok else None, before, decision)
        if ok:
            journal.append(entries[i])

    limit = spec.ceiling_dbtp if (spec.ceiling_dbtp is not None and spec.over_ceiling == "limit") else None
    try:
        executor = _executor(min(jobs, max(len(todo), 1)), scheduler) if todo else None
        if not two_pass:
            for i, status, payload in execute([(i, "render", {"limit": limit}) for i in todo]):
                record(i, status, payload)
        else:
            measured = {}
            for i, status, payload in execute([(i, "measure", None) for i in todo]):
                if status == "measured":
                    measured[i] = payload
                else:
                    record(i, status, payload)
            decisions = {}
            if spec.normalize == "group":
                by_group = {}
                for i in sorted(measured):  # not completion order: the group's mean is summed in one order
                    by_group.setdefault(plan.tasks[i].group, []).append(i)
                for members in by_group.values():
                    lufs = integrated_over([measured[i]["hops"] for i in members],
                                           hop_frames=measured[members[0]]["hop_frames"])
                    peak = max(measured[i]["before"]["true_peak_dbtp"] for i in members)
                    d = decide_gain(lufs, target_lufs=spec.target_lufs, true_peak_dbtp=peak,
                                    ceiling_dbtp=spec.ceiling_dbtp, over_ceiling=spec.over_ceiling)
                    decisions.update({i: d for i in members})
            else:
                for i, m in measured.items():
                    decisions[i] = decide_gain(m["before"]["integrated_lufs"], target_lufs=spec.target_lufs,
                                               true_peak_dbtp=m["before"]["true_peak_dbtp"],
                                               ceiling_dbtp=spec.ceiling_dbtp, over_ceiling=spec.over_ceiling)
            calls = []
            for i in sorted(measured):
                d = decisions[i]
                if d.fail is not None:
                    _remove(temp_path_for(plan.tasks[i], out_dir))
                    record(i, "failed", f"{plan.tasks[i].key}: {d.fail}", measured[i]["before"], d)
                    continue
                calls.append((i, "render", {"gain_db": d.gain_db, "limit": spec.ceiling_dbtp if d.limit else None,
                                            "two_pass": True,
                                            "target_lufs": spec.target_lufs if spec.normalize == "file" else None}))
            for i, status, payload in execute(calls):
                record(i, status, payload, measured[i]["before"], decisions[i])
    except KeyboardInterrupt:
        interrupted = True
        if executor is not None:
            executor.shutdown(wait=True, cancel_futures=True)
            executor = None
    finally:
        if executor is not None:
            executor.shutdown(wait=True)
        progress.close()
        if shard is None:
            _remove_tree(out_dir / ".render-tmp")
            _remove_tree(out_dir / RESPONSES_DIR)
        else:
            for i in todo:
                _remove(temp_path_for(plan.tasks[i], out_dir))
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
    journal.close(remove=True)
    return result
