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
    return response_cache.entry_path(response_cache.cache_key(room, **args))


def split(path):
    """An entry file's three parts: the layout line, the metadata line, the samples."""
    data = path.read_bytes()
    first = data.index(b"\n") + 1
    second = data.index(b"\n", first) + 1
    return data[:first], data[first:second], data[second:]


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
    path = entry()
    assert other_files(folder) == [path.name]  # one file, no temporary files left
    layout, meta, samples = split(path)
    assert layout == b"render response cache entry 2\n"
    assert json.loads(meta)["samples"]["shape"] == list(first.ir.shape)
    assert samples == first.ir.astype("<f8").tobytes()

    synthesis.clear_cache()
    opened = []
    real_open = open

    def counting_open(path, *args, **kwargs):
        opened.append(Path(path).name)
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(response_cache, "open", counting_open, raising=False)
    again = response_cache.cached_synthesize(ROOM, **ARGS)
    assert calls == [16000.0]  # read, not synthesised
    assert opened == [path.name]  # the entry read once
    assert fields(again) == fields(first)
    assert again.ir.dtype == np.float64 and again.ir.flags.c_contiguous and not again.ir.flags.writeable
    # The hit joined the in-process cache: synthesize() now returns that very object.
    assert synthesis.synthesize(ROOM, **ARGS) is again
    assert calls == [16000.0]


def test_the_in_process_cache_comes_first_and_fills_the_disk(cache):
    folder, calls = cache
    direct = synthesis.synthesize(ROOM, **ARGS)  # synthesised before the disk cache was asked
    assert not entry().exists()
    assert response_cache.cached_synthesize(ROOM, **ARGS) is direct
    assert calls == [16000.0]
    assert entry().is_file()  # stored for the next process
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
    assert len(other_files(folder)) == 2


def test_bad_arguments_raise_like_synthesize(cache):
    with pytest.raises(ParameterError, match=r"rate_hz = 1000"):
        response_cache.cached_synthesize(ROOM, rate_hz=1000, channels=1, tail_floor_db=-80.0)
    with pytest.raises(ParameterError, match=r"room = 'hall'"):
        response_cache.cached_synthesize("hall", **ARGS)


# --------------------------------------------------------------------------- damage


def _truncate_samples(path):
    path.write_bytes(path.read_bytes()[:-100])


def _flip_a_sample(path):
    data = bytearray(path.read_bytes())
    data[-3] ^= 0x01  # a well-formed entry with other samples: only the checksum can tell
    path.write_bytes(bytes(data))


def _garbage(path):
    path.write_bytes(b"not a cache entry at all")


def _longer(path):
    path.write_bytes(path.read_bytes() + b"\0" * 16)


def _missing(path):
    path.unlink()


def _other_layout(path):
    layout, meta, samples = split(path)
    path.write_bytes(layout.replace(b"entry 2", b"entry 3") + meta + samples)


def _meta_garbage(path):
    layout, meta, samples = split(path)
    path.write_bytes(layout + b"{ this is not json\n" + samples)


def _meta_truncated(path):
    layout, meta, samples = split(path)
    path.write_bytes(layout + meta[:50])


def _meta_without_end_of_line(path):
    layout, meta, samples = split(path)
    path.write_bytes(layout + meta[:-1])


def _entry_of_another_request(path):
    # Another (valid) entry copied over this one: the key inside does not match.
    response_cache.cached_synthesize(ROOM, **{**ARGS, "tail_floor_db": -60.0})
    path.write_bytes(entry(tail_floor_db=-60.0).read_bytes())


def _wrong_fields(path):
    layout, meta, samples = split(path)
    data = json.loads(meta)
    data["response"]["tail_frames"] += 1
    path.write_bytes(layout + json.dumps(data).encode() + b"\n" + samples)


def _wrong_dtype(path):
    layout, meta, samples = split(path)
    data = json.loads(meta)
    data["samples"]["dtype"] = ">f8"
    path.write_bytes(layout + json.dumps(data).encode() + b"\n" + samples)


@pytest.mark.parametrize(
    "damage",
    [_truncate_samples, _flip_a_sample, _garbage, _longer, _missing, _other_layout, _meta_garbage,
     _meta_truncated, _meta_without_end_of_line, _entry_of_another_request, _wrong_fields, _wrong_dtype],
)
def test_a_damaged_entry_is_ignored_and_rewritten(cache, damage):
    folder, calls = cache
    good = response_cache.cached_synthesize(ROOM, **ARGS)
    damage(entry())
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
    assert not [p for p in folder.parent.rglob("*") if p.suffix in (".response", ".part")]


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
    assert response_cache.entry_path("0" * 64) is None
    synthesis.clear_cache()
    second = response_cache.cached_synthesize(ROOM, **ARGS)
    assert len(calls) == 2  # nothing read back
    assert fields(first) == fields(second)
    assert not any(tmp_path.rglob("*.response"))


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
    # for the atomic rename of one file plus checksum).  Once an entry exists, every read is a hit (a
    # torn file, or one writer's metadata with another's samples, would be a miss), and a hit is one
    # writer's samples whole.  Other bits in one writer stand for a machine whose arithmetic differs in
    # the last bits.  Either way the entry left at the end is valid.
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
    assert misses_after_a_hit == 0


# --------------------------------------------------------------------------- housekeeping

DAY_S = 86400.0


def _fake_entry(folder, index, *, size, used):
    """A file named as an entry (its contents do not matter to housekeeping), last used at ``used``."""
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{index:064x}.response"
    path.write_bytes(b"\0" * size)
    os.utime(path, (used, used))
    return path


def test_a_hit_marks_the_entry_as_used(cache):
    folder, calls = cache
    response_cache.cached_synthesize(ROOM, **ARGS)
    path = entry()
    os.utime(path, (1e9, 1e9))  # 2001
    synthesis.clear_cache()
    response_cache.cached_synthesize(ROOM, **ARGS)
    assert len(calls) == 1  # a hit
    assert path.stat().st_mtime > 1e9 + 10 * 365 * DAY_S


def test_entries_are_listed_most_recent_first_and_other_files_are_not(tmp_path):
    folder = tmp_path / "cache"
    old = _fake_entry(folder, 1, size=10, used=1000.0)
    new = _fake_entry(folder, 2, size=20, used=2000.0)
    (folder / "notes.txt").write_text("the user's own file")
    (folder / "ABC.response").write_text("not a key")
    listed = response_cache.cache_entries(folder)
    assert [(e.path, e.size_bytes, e.used, e.kind) for e in listed] == [(new, 20, 2000.0, "entry"),
                                                                        (old, 10, 1000.0, "entry")]
    assert response_cache.cache_entries(tmp_path / "missing") == []


@pytest.mark.parametrize(
    "kwargs, left",
    [
        ({"everything": True}, []),
        ({"unused_days": 10}, [0, 1]),  # used 1 and 5 days ago stay, 20 and 40 days ago go
        ({"unused_days": 0}, []),
        ({"max_bytes": 350}, [0, 1, 2]),  # 100 + 100 + 100 <= 350: the least recently used goes
        ({"max_bytes": 100}, [0]),
        ({"max_bytes": 0}, []),
        ({"unused_days": 30, "max_bytes": 150}, [0]),
        ({}, [0, 1, 2, 3]),
    ],
)
def test_prune_removes_what_it_is_asked_to_least_recently_used_first(tmp_path, kwargs, left):
    folder = tmp_path / "cache"
    now = 100 * DAY_S
    paths = [_fake_entry(folder, i, size=100, used=now - days * DAY_S) for i, days in enumerate([1, 5, 20, 40])]
    (folder / "notes.txt").write_text("kept whatever happens")
    result = response_cache.prune(folder, now=now, **kwargs)
    assert sorted(p.name for p in folder.iterdir()) == sorted([paths[i].name for i in left] + ["notes.txt"])
    assert result == {"removed": 4 - len(left), "removed_bytes": 100 * (4 - len(left)), "kept": len(left),
                      "kept_bytes": 100 * len(left), "failed": []}


def _leave_a_writers_temporary(folder, monkeypatch):
    """A real temporary of _write_atomic, as a writer killed before its rename leaves it."""
    with monkeypatch.context() as m:
        m.setattr(response_cache.os, "replace", lambda src, dst: None)
        assert response_cache._store(folder, "cd" * 32, {"format": 2}, synthesis.synthesize(ROOM, **ARGS))
    (part,) = [p for p in folder.iterdir() if p.name.endswith(".part")]
    return part


@pytest.mark.parametrize("age_s, removed", [(60.0, False), (2 * 3600.0, True)])
def test_a_writers_temporary_goes_once_an_hour_old(tmp_path, monkeypatch, age_s, removed):
    folder = tmp_path / "cache"
    part = _leave_a_writers_temporary(folder, monkeypatch)
    now = part.stat().st_mtime + age_s
    result = response_cache.prune(folder, now=now)
    assert part.exists() is not removed
    assert result["removed"] == int(removed)


def test_a_writers_temporary_does_not_count_towards_the_size_limit(tmp_path, monkeypatch):
    folder = tmp_path / "cache"
    part = _leave_a_writers_temporary(folder, monkeypatch)  # tens of kB, fresh
    now = part.stat().st_mtime + 1.0
    entries = [_fake_entry(folder, i, size=100, used=now - 10 * i) for i in range(4)]
    result = response_cache.prune(folder, max_bytes=250, now=now)
    assert [p.exists() for p in entries] == [True, True, False, False]  # 200 B of entries left, not 0
    assert part.exists() and result["removed"] == 2


@pytest.mark.parametrize("kwargs, removed", [({}, []), ({"unused_days": 30}, []), ({"unused_days": 0.5}, ["npy", "json"]),
                                             ({"everything": True}, ["npy", "json"])])
def test_layout_1_files_follow_the_entries_rules(tmp_path, kwargs, removed):
    # A machine not yet upgraded may still use them on a shared folder.
    folder = tmp_path / "cache"
    folder.mkdir()
    now = 10 * DAY_S
    key = "ab" * 32
    for suffix in ("npy", "json"):
        path = folder / f"{key}.{suffix}"
        path.write_bytes(b"x")
        os.utime(path, (now - DAY_S, now - DAY_S))
    response_cache.prune(folder, now=now, **kwargs)
    assert sorted(p.suffix[1:] for p in folder.iterdir()) == sorted({"npy", "json"} - set(removed))


def test_a_last_use_in_the_future_counts_as_now(tmp_path):
    folder = tmp_path / "cache"
    now = 100 * DAY_S
    ahead = _fake_entry(folder, 1, size=100, used=now + 3600.0)  # another machine's clock, an hour ahead
    assert response_cache.prune(folder, unused_days=1, now=now)["removed"] == 0
    assert ahead.stat().st_mtime == now  # ages from now on
    assert response_cache.prune(folder, unused_days=1, now=now + 2 * DAY_S)["removed"] == 1


def test_only_regular_files_are_cache_files(tmp_path):
    folder = tmp_path / "cache"
    (folder / f"{1:064x}.response").mkdir(parents=True)  # a folder with an entry's name
    target = tmp_path / "precious.wav"
    target.write_bytes(b"user data")
    (folder / f"{2:064x}.response").symlink_to(target)
    assert response_cache.cache_entries(folder) == []
    assert response_cache.prune(folder, everything=True) == {"removed": 0, "removed_bytes": 0, "kept": 0,
                                                              "kept_bytes": 0, "failed": []}
    assert target.read_bytes() == b"user data"


@pytest.mark.parametrize("bad", [{"unused_days": -1}, {"max_bytes": -5}, {"unused_days": "7"},
                                 {"max_bytes": True}, {"unused_days": float("nan")}])
def test_prune_refuses_bad_limits(tmp_path, bad):
    with pytest.raises(ParameterError, match=r"expected a number >= 0"):
        response_cache.prune(tmp_path, **bad)


def test_a_pruned_entry_is_synthesised_again(cache):
    folder, calls = cache
    first = response_cache.cached_synthesize(ROOM, **ARGS)
    assert response_cache.prune(everything=True)["removed"] == 1
    synthesis.clear_cache()
    assert fields(response_cache.cached_synthesize(ROOM, **ARGS)) == fields(first)
    assert len(calls) == 2


def test_the_cache_command_reports_and_prunes(cache, capsys):
    from render.cli import main

    folder, calls = cache
    response_cache.cached_synthesize(ROOM, **ARGS)
    size = entry().stat().st_size
    assert main(["cache", "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["folder"] == str(folder) and shown["entries"] == 1 and shown["bytes"] == size
    assert main(["cache", "--unused-days", "1"]) == 0  # used just now: kept
    assert "removed 0 file(s)" in capsys.readouterr().out
    assert main(["cache", "--clear"]) == 0
    out = capsys.readouterr().out
    assert "removed 1 file(s)" in out and "0 response(s), 0.0 MB" in out
    assert not entry().exists()


def test_the_cache_command_fails_when_an_entry_cannot_be_removed(cache, monkeypatch, capsys):
    from render.cli import main

    folder, calls = cache
    response_cache.cached_synthesize(ROOM, **ARGS)

    def refuse(path):
        raise PermissionError(13, "Permission denied", str(path))

    monkeypatch.setattr(response_cache.os, "unlink", refuse)
    assert main(["cache", "--clear"]) == 5  # the exit code of an unwritable output
    captured = capsys.readouterr()
    assert "removed 0 file(s)" in captured.out and f"could not remove {entry()}" in captured.err
    assert entry().exists()


def test_the_cache_command_when_the_cache_is_off(monkeypatch, capsys):
    from render.cli import main

    monkeypatch.setenv("RENDER_CACHE_DIR", "off")
    assert main(["cache", "--clear"]) == 0
    assert "the response cache is off" in capsys.readouterr().out
