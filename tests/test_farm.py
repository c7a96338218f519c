"""Beyond one machine: shards, merging, Dask, and the same bytes everywhere."""

import json

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import SMALL_ROOM, speechlike, write_audio
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
