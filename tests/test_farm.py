"""Beyond one machine: shards, merging, Dask, and the same bytes everywhere."""

import json
import multiprocessing
import operator
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import SMALL_ROOM, speechlike, write_audio
from render.batch import prestart_scheduler
from render.cli import EXIT_OK, EXIT_PARTIAL, main
from render.errors import ParameterError
from render.shards import assign_shards, parse_shard


@settings(max_examples=200, deadline=None, derandomize=True)
@given(weights=st.lists(st.integers(1, 10**9), max_size=60), shards=st.integers(1, 7))
def test_shards_cover_every_task_exactly_once_and_balance(weights, shards):
    owners = assign_shards(weights, shards=shards)
    assert len(owners) == len(weights) and all(0 <= k < shards for k in owners)
    assert owners == assign_shards(list(weights), shards=shards)  # planning again gives the same split
    if weights:
        load = [sum(w for w, k in zip(weights, owners) if k == s) for s in range(shards)]
        # Greedy longest-processing-time: no shard exceeds the mean by more than one task (Graham's bound).
        assert max(load) <= sum(weights) / shards + max(weights)


@pytest.mark.parametrize(
    "env, expected",
    [
        ({"SLURM_ARRAY_TASK_ID": "1", "SLURM_ARRAY_TASK_COUNT": "4", "SLURM_ARRAY_TASK_MIN": "1"}, (1, 4)),
        ({"SLURM_ARRAY_TASK_ID": "7", "SLURM_ARRAY_TASK_COUNT": "4", "SLURM_ARRAY_TASK_MIN": "4"}, (4, 4)),
        ({"SLURM_ARRAY_TASK_ID": "0", "SLURM_ARRAY_TASK_COUNT": "3", "SLURM_ARRAY_TASK_MIN": "0"}, (1, 3)),
    ],
)
def test_slurm_array_indices_may_start_anywhere(env, expected):
    assert parse_shard("slurm", environ=env) == expected


@pytest.mark.parametrize(
    "text, env, match",
    [
        ("0/3", {}, r"expected 1 ≤ K ≤ N"),
        ("4/3", {}, r"expected 1 ≤ K ≤ N"),
        ("half", {}, r"expected K/N"),
        ("slurm", {}, r"SLURM_ARRAY_TASK_ID.*not set"),
    ],
)
def test_bad_shards_are_refused(text, env, match):
    with pytest.raises(ParameterError, match=match):
        parse_shard(text, environ=env)


def _job(tmp_path, extra=""):
    rng = np.random.default_rng(3)
    for i in range(5):
        write_audio(tmp_path / "in" / f"take{i}.wav", speechlike(rng, 3000 + 700 * i, 1 + i % 2), 48000, "PCM_24")
    text = f"""
[job]
output = "out"
{SMALL_ROOM}
[mix]
wet_db = -8
{extra}
[[sources]]
files = ["in/*.wav"]
room = "box"
"""
    path = tmp_path / "job.toml"
    path.write_text(text)
    return path


def _hashes(tmp_path):
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    return {(e["source"], s): v["sha256"] for e in m["sources"] for s, v in e["stems"].items()}


@pytest.mark.parametrize("loudness", ["", '[loudness]\npreset = "podcast-mono"'])
def test_jobs_shards_and_dask_give_the_same_bytes(tmp_path, loudness):
    job = _job(tmp_path, loudness)
    assert main(["run", str(job), "--quiet", "--jobs", "1"]) == EXIT_OK
    single = _hashes(tmp_path)
    assert len(single) == 15
    assert main(["run", str(job), "--quiet", "--jobs", "2"]) == EXIT_OK
    assert _hashes(tmp_path) == single
    (tmp_path / "out" / "manifest.json").unlink()
    for k in (1, 2, 3):
        assert main(["run", str(job), "--quiet", "--jobs", "1", "--shard", f"{k}/3"]) == EXIT_OK
    assert main(["merge", str(tmp_path / "out")]) == EXIT_OK
    assert _hashes(tmp_path) == single
    pytest.importorskip("distributed")
    assert main(["run", str(job), "--quiet", "--jobs", "2", "--scheduler", "local"]) == EXIT_OK
    assert _hashes(tmp_path) == single


def test_merge_reports_a_missing_shard(tmp_path, capsys):
    job = _job(tmp_path)
    for k in (1, 3):
        assert main(["run", str(job), "--quiet", "--jobs", "1", "--shard", f"{k}/3"]) == EXIT_OK
    assert main(["merge", str(tmp_path / "out")]) == EXIT_PARTIAL
    assert "missing shard(s) 2 of 3" in capsys.readouterr().err


def test_a_task_failing_inside_a_dask_worker_is_recorded(tmp_path):
    pytest.importorskip("distributed")
    job = _job(tmp_path)
    rng = np.random.default_rng(9)
    bad = write_audio(tmp_path / "in" / "cut.flac", speechlike(rng, 40000, 1), 48000, "PCM_16", "FLAC")
    data = bad.read_bytes()
    bad.write_bytes(data[: len(data) // 2])  # the header is fine, the data stops half way
    text = job.read_text().replace('files = ["in/*.wav"]', 'files = ["in/*.wav", "in/*.flac"]')
    job.write_text(text)
    assert main(["run", str(job), "--quiet", "--jobs", "2", "--scheduler", "local"]) == EXIT_PARTIAL
    m = json.loads((tmp_path / "out" / "manifest.json").read_text())
    status = {e["source"]: e["status"] for e in m["sources"]}
    assert status.pop("in/cut.flac") == "failed"
    assert set(status.values()) == {"rendered"}


@pytest.fixture
def one_worker_cluster(monkeypatch):
    """A one-worker local cluster through the batch's own executor, closed afterwards."""
    pytest.importorskip("distributed")
    from render.batch import _DaskExecutor

    # Unset, so the workers get the batch's choices; the nanny also writes them into this process's
    # environment, which monkeypatch restores afterwards.
    for name in ("MALLOC_TRIM_THRESHOLD_", "MALLOC_MMAP_THRESHOLD_", "MALLOC_TOP_PAD_", "OMP_NUM_THREADS",
                 "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS", "PYTHONHASHSEED"):
        monkeypatch.delenv(name, raising=False)
    executor = _DaskExecutor("local", 1)
    try:
        yield executor
    finally:
        executor.shutdown(wait=False)


def test_local_dask_workers_get_our_allocator_settings_not_distributeds(one_worker_cluster):
    # glibc mallopt(3): setting M_TRIM_THRESHOLD (MALLOC_TRIM_THRESHOLD_) turns off the dynamic mmap
    # threshold; distributed's default of 65536 makes every large buffer mapped and faulted in afresh.
    # Workers forked from our server get our settings instead (large buffers stay on the heap); spawned
    # workers get none.
    from render.process_setup import MALLOC_SETTINGS

    forked = "forkserver" in multiprocessing.get_all_start_methods()
    for name, (_, value) in MALLOC_SETTINGS.items():
        expected = str(value) if forked else None
        assert one_worker_cluster.submit(os.getenv, f"MALLOC_{name}_").result() == expected, name
    # ... while the numerics stay single-threaded in each worker (distributed's default, our choice too).
    assert one_worker_cluster.submit(os.getenv, "OMP_NUM_THREADS").result() == "1"


@pytest.mark.skipif("forkserver" not in multiprocessing.get_all_start_methods(), reason="no forkserver here")
def test_local_dask_workers_fork_from_the_prestarted_server(one_worker_cluster):
    # Our choice: workers fork from a server that has imported render, so they are not this process's
    # children (the nanny's spawned workers were); starting it again is a no-op.
    assert prestart_scheduler("local") is True
    assert one_worker_cluster.submit(os.getppid).result() != os.getpid()


@pytest.mark.parametrize("scheduler", [None, "tcp://127.0.0.1:8786"])
def test_prestart_does_nothing_for_other_schedulers(scheduler):
    assert prestart_scheduler(scheduler) is False


def test_a_dead_local_worker_is_replaced_and_only_its_task_fails(one_worker_cluster):
    # Our choice: a task that kills its worker fails alone (after the retries), the cluster goes on.
    doomed = one_worker_cluster.submit(os._exit, 3)
    from distributed import KilledWorker

    with pytest.raises(KilledWorker, match="died"):
        doomed.result()
    assert one_worker_cluster.submit(operator.add, 2, 3).result() == 5


def test_ctrl_c_cancels_the_pending_dask_tasks(one_worker_cluster):
    # What run_plan does on KeyboardInterrupt: pending work is cancelled, not waited for (common practice,
    # as concurrent.futures' cancel_futures).
    pending = [one_worker_cluster.submit(time.sleep, 0.5) for _ in range(20)]
    one_worker_cluster.shutdown(wait=True, cancel_futures=True)
    assert sum(f.cancelled() for f in pending) >= 15


@pytest.mark.skipif(sys.platform == "win32", reason="SIGINT to a process group is POSIX")
def test_ctrl_c_in_a_terminal_stops_a_local_dask_run_and_keeps_what_finished(tmp_path):
    # A terminal's Ctrl-C goes to the whole process group: the batch, the forkserver and the workers.
    pytest.importorskip("distributed")
    rng = np.random.default_rng(12)
    for i in range(12):
        write_audio(tmp_path / "in" / f"take{i:02d}.wav", speechlike(rng, 48000 * 10, 2), 48000, "PCM_24")
    job = tmp_path / "job.toml"
    job.write_text(f'[job]\noutput = "out"\n{SMALL_ROOM}\n[[sources]]\nfiles = ["in/*.wav"]\nroom = "box"\n')
    proc = subprocess.Popen([sys.executable, "-m", "render", "run", str(job), "--jobs", "2", "--scheduler", "local"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    out = tmp_path / "out"
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not list(out.glob("take*.wav")) and proc.poll() is None:
        time.sleep(0.02)  # wait until the first file is finished, then interrupt
    os.killpg(proc.pid, signal.SIGINT)
    try:
        _, err = proc.communicate(timeout=120)  # before: shutting down waited for every pending task, forever
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        raise
    assert proc.returncode == 130, err[-2000:]
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["summary"]["interrupted"] is True
    # What had come back is recorded (a file finished but not yet reported is not run, as with the pool).
    assert {e["status"] for e in manifest["sources"]} <= {"rendered"}
    assert manifest["summary"]["rendered"] + manifest["summary"]["not_run"] == 12


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt")
def test_tune_allocator_applies_each_setting_unless_the_user_gave_it(monkeypatch):
    # mallopt(3) returns 1 for every parameter it accepts; a value set in the environment is the user's.
    from render.process_setup import MALLOC_SETTINGS, tune_allocator

    for name in MALLOC_SETTINGS:
        monkeypatch.delenv(f"MALLOC_{name}_", raising=False)
    assert tune_allocator() == {name: value for name, (_, value) in MALLOC_SETTINGS.items()}
    monkeypatch.setenv("MALLOC_TOP_PAD_", "0")
    assert "TOP_PAD" not in tune_allocator()
