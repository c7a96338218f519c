"""From a validated job to a sorted list of tasks: globs, probes, output names.

One task per source file.  A task carries paths and small specs only (never
audio), so it pickles cheaply to a worker process or a cluster.  Tasks are
sorted longest first by (frames + tail) × output channels, the work each
needs (longest-processing-time scheduling), ties by source path, so every
planning of the same job gives the same order.
"""

from __future__ import annotations

import glob
import hashlib
import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path, PurePosixPath
from typing import Optional, Tuple

from . import audio_io
from .errors import AudioInputError, JobError, OutputError
from .job import Job
from .room import Room
from .response_cache import cached_synthesize
from .synthesis import ENGINE_VERSION

__all__ = ["Task", "Plan", "plan_job", "MAX_SOURCES", "ROOMS_DIR", "MANIFEST_NAME", "response_files"]

#: Most source files one job may plan (a billion-file glob is refused up front).
MAX_SOURCES = 200_000
#: Sub-folder of the output folder that holds each room's response.
ROOMS_DIR = "rooms"
MANIFEST_NAME = "manifest.json"


@dataclass(frozen=True)
class Task:
    """Everything a worker needs to render one source (small and picklable).

    ``error`` is set (and nothing else is usable) when the source could not be probed.
    """

    key: str
    source: str
    group: int
    room_name: str
    room: Optional[Room] = None
    wet_db: float = 0.0
    dry_db: float = 0.0
    channels_out: int = 0
    info: Optional[audio_io.AudioInfo] = None
    outputs: Tuple[Tuple[str, str], ...] = ()
    format: str = "WAV"
    subtype: str = "PCM_24"
    tail: str = "extend"
    tail_floor_db: float = -90.0
    tail_frames: int = 0
    frames_out: int = 0
    settings_sha256: str = ""
    notes: Tuple[str, ...] = ()
    error: Optional[str] = None

    @property
    def cost(self) -> int:
        """Frames to produce (the sort key of the schedule)."""
        return self.frames_out * max(self.channels_out, 1)


@dataclass(frozen=True)
class Plan:
    job: Job
    tasks: Tuple[Task, ...]
    #: (room name, room, rate_hz, channels) of every response the tasks use, sorted.
    rooms: Tuple[Tuple[str, Room, float, int], ...] = field(default=())

    @property
    def renderable(self):
        return tuple(t for t in self.tasks if t.error is None)


def response_files(plan):
    """Where each room response of a plan is written, by (name, fingerprint, rate, channels).

    ``rooms/<room>.ir.wav`` when a room name is used at one rate, channel
    count and setting; otherwise the rate, channels (and a short fingerprint)
    are added to the name so that none overwrites another.
    """
    by_name = {}
    for name, room, rate, channels in plan.rooms:
        by_name.setdefault(name, []).append((room.fingerprint(), rate, channels))
    out = {}
    for name, idents in by_name.items():
        fingerprints = {fp for fp, _, _ in idents}
        for fp, rate, channels in idents:
            if len(idents) == 1:
                stem = name
            else:
                stem = f"{name}.{int(rate)}hz.{channels}ch" + (f".{fp[:8]}" if len(fingerprints) > 1 else "")
            out[(name, fp, rate, channels)] = plan.job.output_dir / ROOMS_DIR / f"{stem}.ir.wav"
    return out


def _glob_base(pattern):
    """The leading part of a glob pattern without wildcards (what {dir} is relative to)."""
    parts = PurePosixPath(pattern.replace("\\", "/")).parts
    fixed = []
    for p in parts[:-1]:
        if glob.has_magic(p):
            break
        fixed.append(p)
    return str(PurePosixPath(*fixed)) if fixed else ""


def _expand(job: Job):
    """(group, absolute path, {dir} value) for every matched file, in a stable order."""
    found = []
    seen_in_group = set()
    for g in job.groups:
        for i, pattern in enumerate(g.files):
            full = pattern if os.path.isabs(pattern) else os.path.join(str(job.base_dir), pattern)
            base = _glob_base(pattern)
            base_full = base if os.path.isabs(base) else os.path.join(str(job.base_dir), base)
            matches = sorted(p for p in glob.iglob(full, recursive=True) if os.path.isfile(p))
            if not matches:
                raise JobError(f"{job.path}: sources[{g.index}].files[{i}] = \"{pattern}\": matched no file")
            for m in matches:
                ident = (g.index, os.path.realpath(m))
                if ident in seen_in_group:
                    continue
                seen_in_group.add(ident)
                rel_dir = os.path.relpath(os.path.dirname(m), base_full)
                found.append((g, os.path.abspath(m), "" if rel_dir == "." else PurePosixPath(*Path(rel_dir).parts).as_posix()))
                if len(found) > MAX_SOURCES:
                    raise JobError(f"{job.path}: sources: more than {MAX_SOURCES} files matched; split the job")
    return found


def _output_name(job: Job, *, dir_value, name, stem, room, group, ext):
    text = job.name_pattern.format(dir=dir_value, name=name, stem=stem, room=room, group=group)
    parts = [p for p in PurePosixPath(text.replace("\\", "/")).parts if p not in ("", "/")]
    if not parts or any(p == ".." for p in parts):
        raise JobError(
            f"{job.path}: job.name_pattern = \"{job.name_pattern}\": gives \"{text}\", which leaves the output folder"
        )
    rel = PurePosixPath(*parts)
    if rel.parts[0] in (ROOMS_DIR, "report", ".render-tmp", ".render-responses") or str(rel) in (MANIFEST_NAME, "report.html"):
        raise JobError(f"{job.path}: job.name_pattern = \"{job.name_pattern}\": \"{rel}\" is reserved for the renderer")
    return rel.as_posix() + ext


def _settings_hash(payload):
    text = json.dumps(payload, sort_keys=True, separators=(",", ":"), default=str)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def plan_job(job: Job, *, synthesize_rooms=True):
    """Expand globs, probe sources, resolve rooms, gains and output names.

    Parameters
    ----------
    job : Job
    synthesize_rooms : bool
        Synthesise each (room, rate, channels) once to know the exact tail length
        (cached for the render in this process).  Without it the tail is estimated.

    Returns
    -------
    Plan
    """
    out_root = job.output_dir.resolve()
    ext = "." + job.format
    tasks = []
    used_rooms = {}
    for g, path, dir_value in _expand(job):
        key = os.path.relpath(path, str(job.base_dir))
        key = PurePosixPath(*Path(key).parts).as_posix()
        name = Path(path).stem
        room = job.room_for(g)
        outputs = tuple(
            (stem, _output_name(job, dir_value=dir_value, name=name, stem=stem, room=g.room, group=g.index, ext=ext))
            for stem in job.stems
        )
        try:
            info = audio_io.probe(path)
        except AudioInputError as e:
            tasks.append(Task(key=key, source=path, group=g.index, room_name=g.room, outputs=outputs, error=str(e)))
            continue
        channels_out = info.channels
        if g.channels == 2 and info.channels == 1:
            channels_out = 2
        wet_db = g.wet_db if g.wet_db is not None else g.dry_db + 20.0 * math.log10(room.distance_m / room.critical_distance_m)
        ident = (g.room, room.fingerprint(), float(info.rate_hz), channels_out)
        if ident not in used_rooms:
            if synthesize_rooms:
                response = cached_synthesize(room, rate_hz=float(info.rate_hz), channels=channels_out,
                                             tail_floor_db=job.tail_floor_db)
                tail_frames = response.tail_frames
            else:
                tail_frames = int(math.ceil(room.decay_max_s * (-job.tail_floor_db) / 60.0 * info.rate_hz))
            used_rooms[ident] = (room, tail_frames)
        tail_frames = used_rooms[ident][1]
        frames_out = info.frames + (tail_frames if job.tail == "extend" else 0)
        notes = []
        try:
            # The container and subtype first (their message names the file), then the size decides RF64.
            fmt, subtype = audio_io.output_format(
                requested_format=job.format, requested_subtype=job.subtype, source=info, predicted_bytes=0
            )
            fmt, subtype = audio_io.output_format(
                requested_format=job.format,
                requested_subtype=job.subtype,
                source=info,
                predicted_bytes=audio_io.predicted_bytes(
                    frames=frames_out, channels=channels_out, subtype=subtype, format=fmt
                ),
            )
        except OutputError as e:
            tasks.append(Task(key=key, source=path, group=g.index, room_name=g.room, outputs=outputs, error=str(e)))
            continue
        settings = {
            "engine": ENGINE_VERSION,
            "room": room.fingerprint(),
            "rate_hz": info.rate_hz,
            "channels_out": channels_out,
            "wet_db": round(wet_db, 9),
            "dry_db": g.dry_db,
            "outputs": outputs,
            "format": fmt,
            "subtype": subtype,
            "tail": job.tail,
            "tail_floor_db": job.tail_floor_db,
        }
        tasks.append(
            Task(
                key=key,
                source=path,
                group=g.index,
                room_name=g.room,
                room=room,
                wet_db=float(wet_db),
                dry_db=g.dry_db,
                channels_out=channels_out,
                info=info,
                outputs=outputs,
                format=fmt,
                subtype=subtype,
                tail=job.tail,
                tail_floor_db=job.tail_floor_db,
                tail_frames=tail_frames,
                frames_out=frames_out,
                settings_sha256=_settings_hash(settings),
                notes=tuple(notes),
            )
        )
    rates = {}
    for t in tasks:
        if t.info is not None:
            rates.setdefault(t.group, set()).add(t.info.rate_hz)
    mixed = {g: r for g, r in rates.items() if len(r) > 1}
    if mixed:
        tasks = [
            t if t.group not in mixed else Task(**{**t.__dict__, "notes": t.notes + (
                "sample rates differ within this group (" + ", ".join(f"{r:g}" for r in sorted(mixed[t.group]))
                + " Hz): each file keeps its own",)})
            for t in tasks
        ]
    # Inputs are sacred: no output may be a source, and the output folder may not lie in a
    # source's folder unless the job says so.
    source_dirs = {}
    for t in tasks:
        source_dirs.setdefault(str(Path(t.source).resolve().parent), t.key)
    for folder, key in sorted(source_dirs.items()):
        if not job.allow_output_in_sources and (out_root == Path(folder) or Path(folder) in out_root.parents):
            raise JobError(
                f"{job.path}: job.output = \"{job.output_dir}\": lies inside the folder of source {key} "
                f"({folder}); choose another folder, or set job.allow_output_in_sources = true"
            )
    sources = {str(Path(t.source).resolve()) for t in tasks}
    # Two sources writing one file would silently lose one of them.
    owner = {}
    for t in tasks:
        for stem, rel in t.outputs:
            target = str((out_root / rel).resolve())
            if not target.startswith(str(out_root) + os.sep):
                raise JobError(f"{job.path}: output \"{rel}\" of {t.key} resolves outside the output folder")
            if target in sources:
                raise JobError(f"{job.path}: output \"{rel}\" of {t.key} is a source file: refused")
            if target in owner and owner[target] != t.key:
                raise JobError(
                    f"{job.path}: {owner[target]} and {t.key} would both write \"{rel}\": "
                    "add {dir}, {room} or {group} to job.name_pattern"
                )
            owner[target] = t.key
    tasks.sort(key=lambda t: (-t.cost, t.key, t.group))
    rooms = tuple((ident[0], room, ident[2], ident[3]) for ident, (room, _) in sorted(used_rooms.items()))
    return Plan(job=job, tasks=tuple(tasks), rooms=rooms)
