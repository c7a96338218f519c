"""The on-disk response cache: hits give synthesis's response bit for bit, damage and races are harmless."""

import dataclasses
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from render import response_cache, synthesis
from render.errors import ParameterError
from render.room import Room

#: A short, cheap room (our choice): ~0.1 s to synthesise at 16 kHz.
ROOM = Room(decay_s=0.3, size_m=(4.0, 3.0, 2.5), seed=5)
ARGS = dict(rate_hz=16000, channels=1, tail_floor_db=-80.0)


@pytest.fixture
def cache(tmp_path, monkeypatch):
    """A fresh cache folder in RENDER_CACHE_DIR, an empty in-process cache, and a synthesis counter."""
    folder = tmp_path / "cache"
    monkeypatch.setenv("RENDER_CACHE_DIR", str(folder))
    synthesis.clear_cache()
    calls = []
    real = synthesis._synthesize

    def counting(*args, **kwargs):
        calls.append(kwargs.get("rate_hz"))
        return real(*args, **kwargs)

    monkeypatch.setattr(synthesis, "_synthesize", counting)
    yield folder, calls
    synthesis.clear_cache()


def fields(response):
    """Every field of a Response, comparable with == (samples as bytes, NaN-safe floats as repr)."""
    out = {f.name: repr(getattr(response, f.name)) for f in dataclasses.fields(response) if f.name != "ir"}
    out["ir"] = (response.ir.dtype.str, response.ir.shape, response.ir.tobytes())
    return out


def entry(room=ROOM, **changes):
    args = {**ARGS, **changes}
    return response_cache.entry_paths(response_cache.cache_key(room, **args))


def other_files(folder):
    return sorted(p.name for p in folder.iterdir()) if folder.exists() else []


# --------------------------------------------------------------------------- where


@pytest.mark.parametrize(
    "env, expected",
    [
        ({"RENDER_CACHE_DIR": "/data/rc"}, Path("/data/rc")),  # our choice: the variable wins
        ({"RENDER_CACHE_DIR": "off", "XDG_CACHE_HOME": "/x"}, None),
        ({"RENDER_CACHE_DIR": "OFF"}, None),
        ({"RENDER_CACHE_DIR": ""}, None),
        # XDG Base Directory Specification: $XDG_CACHE_HOME, else $HOME/.cache; relative values are ignored.
        ({"XDG_CACHE_HOME": "/xdg"}, Path("/xdg/render/responses")),
        ({"XDG_CACHE_HOME": "", "HOME": "/home/u"}, Path("/home/u/.cache/render/responses")),
        ({"XDG_CACHE_HOME": "relative/dir", "HOME": "/home/u"}, Path("/home/u/.cache/render/responses")),
        ({"HOME": "/home/v"}, Path("/home/v/.cache/render/responses")),
    ],
)
def test_cache_dir_follows_the_environment(monkeypatch, env, expected):
    for name in ("RENDER_CACHE_DIR", "XDG_CACHE_HOME"):
        monkeypatch.delenv(name, raising=False)
    for name, value in env.items():
        monkeypatch.setenv(name, value)
    assert response_cache.cache_dir() == expected


# --------------------------------------------------------------------------- hits and misses


def test_a_hit_is_synthesis_bit_for_bit_read_once(cache, monkeypatch):
    folder, calls = cache
    first = response_cache.cached_synthesize(ROOM, **ARGS)
    assert calls == [16000.0]
    npy, meta = entry()
    assert npy.is_file() and meta.is_file()
    assert other_files(folder) == sorted([npy.name, meta.name])  # no temporary files left

    synthesis.clear_cache()
    opened = []
    real_open = open

    def counting_open(path, *args, **kwargs):
        opened.append(Path(path).name)
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(response_cache, "open", counting_open, raising=False)
    again = response_cache.cached_synthesize(ROOM, **ARGS)
    assert calls == [16000.0]  # read, not synthesised
    assert sorted(opened) == sorted([npy.name, meta.name])  # each file read once
    assert fields(again) == fields(first)
    assert again.ir.dtype == np.float64 and again.ir.flags.c_contiguous and not again.ir.flags.writeable
    # The hit joined the in-process cache: synthesize() now returns that very object.
    assert synthesis.synthesize(ROOM, **ARGS) is again
    assert calls == [16000.0]


def test_the_in_process_cache_comes_first_and_fills_the_disk(cache):
    folder, calls = cache
    direct = synthesis.synthesize(ROOM, **ARGS)  # synthesised before the disk cache was asked
    assert not entry()[1].exists()
    assert response_cache.cached_synthesize(ROOM, **ARGS) is direct
    assert calls == [16000.0]
    assert entry()[1].is_file()  # stored for the next process
    synthesis.clear_cache()
    assert fields(response_cache.cached_synthesize(ROOM, **ARGS)) == fields(direct)
    assert calls == [16000.0]


@pytest.mark.parametrize(
    "room, changes",
    [
        (ROOM.replace(seed=6), {}),
        (ROOM.replace(decay_s=0.35), {}),
        (ROOM, {"rate_hz": 22050}),
        (ROOM, {"channels": 2}),
        (ROOM, {"tail_floor_db": -70.0}),
    ],
)
def test_any_other_request_misses(cache, room, changes):
    folder, calls = cache
    base = response_cache.cached_synthesize(ROOM, **ARGS)
    synthesis.clear_cache()
    other = response_cache.cached_synthesize(room, **{**ARGS, **changes})
    assert len(calls) == 2  # synthesised, not taken from the first entry
    assert response_cache.cache_key(room, **{**ARGS, **changes}) != response_cache.cache_key(ROOM, **ARGS)
    assert fields(other) != fields(base)
    assert len(other_files(folder)) == 4


def test_bad_arguments_raise_like_synthesize(cache):
    with pytest.raises(ParameterError, match=r"rate_hz = 1000"):
        response_cache.cached_synthesize(ROOM, rate_hz=1000, channels=1, tail_floor_db=-80.0)
    with pytest.raises(ParameterError, match=r"room = 'hall'"):
        response_cache.cached_synthesize("hall", **ARGS)


# --------------------------------------------------------------------------- damage


def _truncate_npy(npy, meta):
    npy.write_bytes(npy.read_bytes()[:-100])


def _flip_a_sample(npy, meta):
    data = bytearray(npy.read_bytes())
    data[-3] ^= 0x01  # a valid .npy with other samples: only the checksum can tell
    npy.write_bytes(bytes(data))


def _npy_garbage(npy, meta):
    npy.write_bytes(b"not a numpy file at all")


def _npy_longer(npy, meta):
    npy.write_bytes(npy.read_bytes() + b"\0" * 16)


def _npy_missing(npy, meta):
    npy.unlink()


def _json_garbage(npy, meta):
    meta.write_bytes(b"{ this is not json")


def _json_truncated(npy, meta):
    meta.write_bytes(meta.read_bytes()[:50])


def _json_missing(npy, meta):
    meta.unlink()


def _json_of_another_request(npy, meta):
    # Another (valid) entry's files copied over this one: the key inside does not match.
    other_npy, other_meta = entry(tail_floor_db=-60.0)
    response_cache.cached_synthesize(ROOM, **{**ARGS, "tail_floor_db": -60.0})
    meta.write_bytes(other_meta.read_bytes())
    npy.write_bytes(other_npy.read_bytes())


def _json_wrong_fields(npy, meta):
    data = json.loads(meta.read_text())
    data["response"]["tail_frames"] += 1
    meta.write_text(json.dumps(data))


@pytest.mark.parametrize(
    "damage",
    [_truncate_npy, _flip_a_sample, _npy_garbage, _npy_longer, _npy_missing, _json_garbage, _json_truncated,
     _json_missing, _json_of_another_request, _json_wrong_fields],
)
def test_a_damaged_entry_is_ignored_and_rewritten(cache, damage):
    folder, calls = cache
    good = response_cache.cached_synthesize(ROOM, **ARGS)
    npy, meta = entry()
    damage(npy, meta)
    synthesis.clear_cache()
    count = len(calls)
    again = response_cache.cached_synthesize(ROOM, **ARGS)
    assert len(calls) == count + 1  # the damaged entry was not used
    assert fields(again) == fields(good)
    synthesis.clear_cache()
    assert fields(response_cache.cached_synthesize(ROOM, **ARGS)) == fields(good)
    assert len(calls) == count + 1  # rewritten: now a hit
    assert not [name for name in other_files(folder) if name.endswith(".part")]


# --------------------------------------------------------------------------- unwritable, off


def _folder_under_a_file(folder, monkeypatch):
    folder.parent.mkdir(parents=True, exist_ok=True)
    (folder.parent / "file").write_text("x")
    monkeypatch.setenv("RENDER_CACHE_DIR", str(folder.parent / "file" / "cache"))


def _creating_files_refused(folder, monkeypatch):
    # A read-only folder (simulated: the tests may run as root, who may write anywhere).
    real = os.open

    def refuse(path, flags, *args, **kwargs):
        if flags & os.O_CREAT:
            raise PermissionError(13, "Permission denied", str(path))
        return real(path, flags, *args, **kwargs)

    monkeypatch.setattr(response_cache.os, "open", refuse)


@pytest.mark.parametrize("make_unwritable", [_folder_under_a_file, _creating_files_refused])
def test_an_unwritable_folder_only_means_nothing_is_stored(cache, monkeypatch, make_unwritable):
    folder, calls = cache
    expected = fields(synthesis.synthesize(ROOM, **ARGS))  # in-process only, no disk
    synthesis.clear_cache()
    make_unwritable(folder, monkeypatch)
    got = response_cache.cached_synthesize(ROOM, **ARGS)
    assert fields(got) == expected
    assert len(calls) == 2
    assert not [p for p in folder.parent.rglob("*") if p.suffix in (".npy", ".json", ".part")]


def test_a_read_only_folder_with_an_entry_is_read(cache, monkeypatch):
    folder, calls = cache
    good = response_cache.cached_synthesize(ROOM, **ARGS)
    synthesis.clear_cache()
    _creating_files_refused(folder, monkeypatch)
    assert fields(response_cache.cached_synthesize(ROOM, **ARGS)) == fields(good)
    assert len(calls) == 1


def test_off_disables_the_cache(cache, tmp_path, monkeypatch):
    folder, calls = cache
    monkeypatch.setenv("RENDER_CACHE_DIR", "off")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    first = response_cache.cached_synthesize(ROOM, **ARGS)
    assert response_cache.entry_paths("0" * 64) is None
    synthesis.clear_cache()
    second = response_cache.cached_synthesize(ROOM, **ARGS)
    assert len(calls) == 2  # nothing read back
    assert fields(first) == fields(second)
    assert not any(tmp_path.rglob("*.npy")) and not any(tmp_path.rglob("*.json"))


# --------------------------------------------------------------------------- concurrency

WRITER = textwrap.dedent(
    """
    import sys, dataclasses
    import numpy as np
    from render import response_cache, synthesis
    from render.room import Room

    room = Room(decay_s=0.3, size_m=(4.0, 3.0, 2.5), seed=5)
    args = dict(rate_hz=16000, channels=1, tail_floor_db=-80.0)
    variant, rounds = int(sys.argv[1]), int(sys.argv[2])
    response = response_cache.cached_synthesize(room, **args)  # both writers race on the first store
    if variant:
        # Another machine's last bits (simulated): the same key, other samples.
        response = dataclasses.replace(response, ir=response.ir * (1.0 + 2.0 ** -52))
    key, ident = response_cache._identity(room, args["rate_hz"], args["channels"], args["tail_floor_db"])
    name = response_cache._digest(ident)
    for _ in range(rounds):
        assert response_cache._store(response_cache.cache_dir(), name, ident, response)
    print("done")
    """
)


@pytest.mark.parametrize("variants", [(0, 0), (0, 1)], ids=["same-bits", "other-bits"])
def test_concurrent_writers_leave_a_valid_entry_and_readers_see_whole_ones(cache, variants):
    # Two processes store the same entry over and over while this one reads it (our choice of checks,
    # for the atomic rename plus checksum).  Same bits: once an entry is whole, every read is a hit
    # (a torn file would be a miss).  Other bits in one writer, as a machine whose arithmetic differs
    # in the last bits would give: a read may miss when the two files come from different writers,
    # but a hit is always one writer's samples.  Either way the entry is valid at the end.
    folder, calls = cache
    reference = synthesis.synthesize(ROOM, **ARGS)
    allowed = {reference.ir.tobytes(), (reference.ir * (1.0 + 2.0 ** -52)).tobytes()}
    if variants == (0, 0):
        allowed = {reference.ir.tobytes()}
    key, ident = response_cache._identity(ROOM, ARGS["rate_hz"], ARGS["channels"], ARGS["tail_floor_db"])
    name = response_cache._digest(ident)
    env = {**os.environ, "RENDER_CACHE_DIR": str(folder)}
    writers = [
        subprocess.Popen([sys.executable, "-c", WRITER, str(v), "300"], env=env, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
        for v in variants
    ]
    hits = misses_after_a_hit = 0
    while any(w.poll() is None for w in writers):
        got = response_cache._load(folder, name, ident, key)
        if got is None:
            misses_after_a_hit += hits > 0
            continue
        hits += 1
        assert got.ir.tobytes() in allowed
        assert got.tail_frames == reference.tail_frames
    for w in writers:
        out, err = w.communicate()
        assert w.returncode == 0 and out.strip() == "done", err
    final = response_cache._load(folder, name, ident, key)
    assert final is not None and final.ir.tobytes() in allowed
    assert not [n for n in other_files(folder) if n.endswith(".part")]
    assert hits > 0  # the reader did read while the entry was being replaced
    if variants == (0, 0):
        assert misses_after_a_hit == 0
