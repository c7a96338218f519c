"""Job files: one validation pass from TOML to frozen dataclasses.

Every key is known (an unknown key is an error: a typo must not silently
render a default); every message names the file, the key path, the value and
what was expected, e.g.
``jobs/reel.toml: rooms.kitchen.decay_s = -1.0: must be a reverberation time from 0.05 to 30.0 s``.

This module reads the job file and nothing else: globs are expanded and
sources probed by :mod:`render.plan`.

The schema is :data:`SCHEMA`; the README's key table is checked against it
by a test.
"""

from __future__ import annotations

import hashlib
import math
import os
import string
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Dict, Optional, Tuple

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python < 3.11 only
    import tomli as tomllib

from .catalogue import CATALOGUE
from .errors import JobError, RoomError
from .room import Room

__all__ = ["Job", "LoudnessSpec", "SourceGroup", "load_job", "parse_job", "SCHEMA", "STEMS", "PATTERN_FIELDS"]

STEMS = ("mix", "wet", "dry")
FORMATS = ("wav", "flac")
SUBTYPES = ("same", "PCM_16", "PCM_24", "FLOAT")
TAILS = ("extend", "cut")
#: Placeholders a ``name_pattern`` may use.
PATTERN_FIELDS = ("dir", "name", "stem", "room", "group")
#: Most source groups and globs a job may have (job files are data from many hands).
MAX_GROUPS = 1000
MAX_PATTERNS = 1000

_ROOM_KEYS = {
    "base": "name of a built-in room to start from (`render rooms`)",
    "decay_s": "T60 at 1 kHz, s (0.05-30)",
    "decay_lf_s": "T60 at 125 Hz, s (0.05-30; default decay_s)",
    "decay_hf_s": "T60 at 4 kHz, s (0.05-30; default decay_s)",
    "decay_bands_s": "T60 in the 7 octave bands 125 Hz-8 kHz, s",
    "size_m": "[length, width, height], m (0.5-500 each)",
    "source_m": "talker position [x, y, z], m",
    "listener_m": "microphone position [x, y, z], m",
    "distance_m": "talker-to-microphone distance, m",
    "predelay_ms": "extra delay of the whole wet response, ms (0-500)",
    "diffusion": "allpass diffusion of the tail, 0-1",
    "spread": "stereo decorrelation of the tail, 0-1",
    "temperature_c": "air temperature, °C (-20-50)",
    "seed": "seed of every random choice in the room's network",
    "description": "free text",
}

#: Every key a job file may hold: section -> key -> one-line description.
SCHEMA: Dict[str, Dict[str, str]] = {
    "job": {
        "name": "name of the job (default: the job file's name)",
        "output": "output folder, relative to the job file (default out/<name>)",
        "stems": 'subset of ["mix", "wet", "dry"]; mix = dry + wet (default all three)',
        "format": '"wav" or "flac"; WAV becomes RF64 past 4 GiB (default "wav")',
        "subtype": '"same" (as the source), "PCM_16", "PCM_24" or "FLOAT" (default "same")',
        "tail": '"extend" (output = source + tail) or "cut" (source length, faded) (default "extend")',
        "tail_floor_db": "where a room's tail is cut, dB re its envelope's peak (-150 to -20; default -90)",
        "name_pattern": 'output name without extension; fields {dir} {name} {stem} {room} {group} '
        '(default "{dir}/{name}.{stem}")',
        "report": "true writes report.html (and PNGs) into the output folder at the end of a run; "
        "needs the plots extra (default false)",
        "allow_output_in_sources": "true lets the output folder lie inside a source's folder (default false: "
        "refused, so renders never mix with the originals)",
    },
    "rooms.NAME": dict(_ROOM_KEYS),
    "mix": {
        "wet_db": "gain of the wet stem, dB (-120 to +24; default -12)",
        "dry_db": "gain of the dry stem, dB (-120 to +24; default 0)",
        "distance_m": "instead of wet_db: talker distance, m; sets the room's distance and "
        "wet_db = dry_db + 20·log10(distance / critical distance)",
        "channels": '"same" as the source, or 2 to render a mono source in stereo (default "same")',
    },
    "loudness": {
        "preset": '"off" (default), "ebu-r128", "atsc-a85", "podcast-stereo", "podcast-mono" or '
        '"speech-streaming" (targets and sources in the README)',
        "target_lufs": "integrated loudness of the mix after rendering, LUFS (-70 to 0; overrides the preset)",
        "ceiling_dbtp": "highest true peak of the mix, dBTP (-30 to 0; overrides the preset)",
        "normalize": '"file" (one gain per file) or "group" (one gain per [[sources]] group) (default "file")',
        "over_ceiling": '"limit" (true-peak limiter), "lower" (less gain, shortfall reported) or "fail" '
        '(default "limit")',
    },
    "sources": {
        "files": "list of globs relative to the job file; ** matches folders recursively (required)",
        "room": "a room of [rooms] or a built-in room (required)",
        "wet_db": "overrides [mix] wet_db for this group",
        "dry_db": "overrides [mix] dry_db for this group",
        "distance_m": "overrides [mix] distance_m for this group",
        "channels": "overrides [mix] channels for this group",
    },
}

DEFAULT_WET_DB = -12.0
DEFAULT_DRY_DB = 0.0


@dataclass(frozen=True)
class LoudnessSpec:
    """The resolved ``[loudness]`` table (``target_lufs`` None: keep the level)."""

    preset: str = "off"
    target_lufs: Optional[float] = None
    ceiling_dbtp: Optional[float] = None
    tolerance_lu: Optional[float] = None
    normalize: str = "file"
    over_ceiling: str = "limit"

    @property
    def active(self) -> bool:
        """True when anything changes the level (a target or a ceiling)."""
        return self.target_lufs is not None or self.ceiling_dbtp is not None


@dataclass(frozen=True)
class SourceGroup:
    """One ``[[sources]]`` table, resolved against ``[mix]``.

    ``wet_db`` is None when ``distance_m`` sets it from the room.
    """

    index: int
    files: Tuple[str, ...]
    room: str
    wet_db: Optional[float]
    dry_db: float
    distance_m: Optional[float]
    channels: Optional[int]  # None = same as the source


@dataclass(frozen=True)
class Job:
    """A validated job file."""

    path: Path
    text_sha256: str
    name: str
    output_dir: Path
    stems: Tuple[str, ...]
    format: str
    subtype: str
    tail: str
    tail_floor_db: float
    name_pattern: str
    allow_output_in_sources: bool
    rooms: Dict[str, Room]
    groups: Tuple[SourceGroup, ...]
    loudness: LoudnessSpec = LoudnessSpec()
    report: bool = False

    @property
    def base_dir(self) -> Path:
        """Folder of the job file: globs and ``output`` are relative to it."""
        return self.path.parent

    def room_for(self, group: SourceGroup) -> Room:
        """The room a group renders in (its ``distance_m`` applied)."""
        room = self.rooms.get(group.room) or CATALOGUE[group.room]
        if group.distance_m is not None:
            try:
                room = room.replace(distance_m=group.distance_m)
            except RoomError as e:
                raise JobError(
                    f"{self.path}: sources[{group.index}].distance_m = {group.distance_m!r}: {e.expected}"
                ) from None
        return room


def _clean(text):
    """A string for a one-line message: control characters escaped."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in str(text))


def _show(value):
    if isinstance(value, str):
        return f'"{_clean(value)}"'
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_show(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{…}"
    return repr(value)


class _Checker:
    def __init__(self, path):
        self.path = path

    def fail(self, key, value, expected):
        raise JobError(f"{self.path}: {_clean(key)} = {_show(value)}: {_clean(expected)}")

    def fail_key(self, key, expected):
        raise JobError(f"{self.path}: {_clean(key)}: {_clean(expected)}")

    def table(self, key, value):
        if not isinstance(value, dict):
            self.fail(key, value, "must be a table")
        return value

    def known(self, key, table, allowed):
        for k in table:
            if k not in allowed:
                near = ", ".join(sorted(allowed))
                self.fail_key(f"{key}.{k}" if key else k, f"unknown key (allowed here: {near})")

    def string(self, key, value, *, choices=None):
        if not isinstance(value, str) or not value:
            self.fail(key, value, "must be a non-empty string")
        if choices is not None and value not in choices:
            self.fail(key, value, "must be one of " + ", ".join(f'"{c}"' for c in choices))
        return value

    def number(self, key, value, *, lo, hi, unit):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            self.fail(key, value, f"must be a number ({unit})")
        if not lo <= value <= hi:
            self.fail(key, value, f"must be from {lo:g} to {hi:g} {unit}")
        return float(value)


def _parse_room(check, name, table):
    key = f"rooms.{name}"
    check.table(key, table)
    check.known(key, table, _ROOM_KEYS)
    fields = {k: v for k, v in table.items() if k != "base"}
    for k, v in fields.items():
        if isinstance(v, list):
            fields[k] = tuple(v)
    try:
        if "base" in table:
            base = check.string(f"{key}.base", table["base"])
            if base not in CATALOGUE:
                check.fail(f"{key}.base", base, "must be a built-in room: " + ", ".join(sorted(CATALOGUE)))
            room = CATALOGUE[base].replace(name=name, **fields)
        else:
            room = Room(name=name, **fields)
    except RoomError as e:
        if e.field is None:
            raise JobError(f"{check.path}: {key}: {e}") from None
        field = e.field.split("[")[0]
        shown = fields.get(field, e.value) if field in fields else e.value
        if "[" in e.field:
            shown = e.value
        raise JobError(f"{check.path}: {key}.{e.field} = {_show(shown)}: {e.expected}") from None
    except TypeError as e:  # e.g. a list where a number was expected deep inside
        raise JobError(f"{check.path}: {key}: {e}") from None
    return room


def _parse_channels(check, key, value):
    if value == "same":
        return None
    if isinstance(value, bool) or value != 2:
        check.fail(key, value, 'must be "same" or 2')
    return 2


def _parse_gains(check, key, table, defaults):
    out = dict(defaults)
    if "wet_db" in table and "distance_m" in table:
        check.fail_key(key, "give wet_db or distance_m, not both")
    if "wet_db" in table:
        out["wet_db"] = check.number(f"{key}.wet_db", table["wet_db"], lo=-120.0, hi=24.0, unit="dB")
        out["distance_m"] = None
    if "distance_m" in table:
        out["distance_m"] = check.number(f"{key}.distance_m", table["distance_m"], lo=0.05, hi=1000.0, unit="m")
        out["wet_db"] = None
    if "dry_db" in table:
        out["dry_db"] = check.number(f"{key}.dry_db", table["dry_db"], lo=-120.0, hi=24.0, unit="dB")
    if "channels" in table:
        out["channels"] = _parse_channels(check, f"{key}.channels", table["channels"])
    return out


def _parse_loudness(check, table):
    from .delivery import NORMALIZE, OVER_CEILING, PRESETS

    check.known("loudness", table, SCHEMA["loudness"])
    name = check.string("loudness.preset", table.get("preset", "off"), choices=tuple(PRESETS))
    preset = PRESETS[name]
    target, ceiling, tolerance = preset.target_lufs, preset.ceiling_dbtp, preset.tolerance_lu
    if "target_lufs" in table:
        target = check.number("loudness.target_lufs", table["target_lufs"], lo=-70.0, hi=0.0, unit="LUFS")
        tolerance = tolerance if tolerance is not None else 0.2
    if "ceiling_dbtp" in table:
        ceiling = check.number("loudness.ceiling_dbtp", table["ceiling_dbtp"], lo=-30.0, hi=0.0, unit="dBTP")
    return LoudnessSpec(
        preset=name,
        target_lufs=target,
        ceiling_dbtp=ceiling,
        tolerance_lu=tolerance,
        normalize=check.string("loudness.normalize", table.get("normalize", "file"), choices=NORMALIZE),
        over_ceiling=check.string("loudness.over_ceiling", table.get("over_ceiling", "limit"), choices=OVER_CEILING),
    )


def _check_pattern(check, pattern):
    try:
        parsed = [(f, spec, conv) for _, f, spec, conv in string.Formatter().parse(pattern) if f is not None]
    except ValueError as e:
        check.fail("job.name_pattern", pattern, f"is not a valid pattern ({e})")
    names = [f for f, _, _ in parsed]
    for f, spec, conv in parsed:
        if spec or conv:
            check.fail("job.name_pattern", pattern, f"{{{f}}}: conversions (!) and format specs (:) are not allowed")
    for n in names:
        if n not in PATTERN_FIELDS:
            check.fail(
                "job.name_pattern", pattern, f"unknown field {{{n}}}: use " + " ".join(f"{{{f}}}" for f in PATTERN_FIELDS)
            )
    if "stem" not in names:
        check.fail("job.name_pattern", pattern, "must contain {stem}, or the stems would overwrite each other")
    if "name" not in names:
        check.fail("job.name_pattern", pattern, "must contain {name}, or the sources would overwrite each other")
    if os.path.isabs(pattern) or pattern.startswith(("/", "\\")):
        check.fail("job.name_pattern", pattern, "must be relative to the output folder")
    return pattern


def parse_job(text, *, path):
    """Validate a job file's text.

    Parameters
    ----------
    text : str
        The TOML text.
    path : str or Path
        Where it came from: relative paths in the job are relative to its folder,
        and every message names it.

    Returns
    -------
    Job
    """
    path = Path(path)
    check = _Checker(path)
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise JobError(f"{path}: not valid TOML: {e}") from None
    check.known("", data, ("job", "rooms", "mix", "loudness", "sources"))

    job_t = check.table("job", data.get("job", {}))
    check.known("job", job_t, SCHEMA["job"])
    name = check.string("job.name", job_t.get("name", path.stem))
    output = check.string("job.output", job_t.get("output", f"out/{name}"))
    stems = job_t.get("stems", list(STEMS))
    if not isinstance(stems, list) or not stems or any(s not in STEMS for s in stems) or len(set(stems)) != len(stems):
        check.fail("job.stems", stems, 'must be a non-empty list of distinct names from "mix", "wet", "dry"')
    fmt = check.string("job.format", job_t.get("format", "wav"), choices=FORMATS)
    subtype = check.string("job.subtype", job_t.get("subtype", "same"), choices=SUBTYPES)
    if fmt == "flac" and subtype == "FLOAT":
        check.fail("job.subtype", subtype, 'FLAC holds no floating point: use "PCM_24" or format = "wav"')
    tail = check.string("job.tail", job_t.get("tail", "extend"), choices=TAILS)
    floor = check.number("job.tail_floor_db", job_t.get("tail_floor_db", -90.0), lo=-150.0, hi=-20.0, unit="dB")
    pattern = _check_pattern(check, check.string("job.name_pattern", job_t.get("name_pattern", "{dir}/{name}.{stem}")))
    report = job_t.get("report", False)
    if not isinstance(report, bool):
        check.fail("job.report", report, "must be true or false")
    allow_in_sources = job_t.get("allow_output_in_sources", False)
    if not isinstance(allow_in_sources, bool):
        check.fail("job.allow_output_in_sources", allow_in_sources, "must be true or false")

    rooms_t = check.table("rooms", data.get("rooms", {}))
    rooms = {}
    for room_name in sorted(rooms_t):
        if not room_name or any(c in room_name for c in "/\\\0") or room_name in (".", ".."):
            check.fail_key(f"rooms.{room_name}", "a room name must not contain / or \\ (it names files)")
        rooms[room_name] = _parse_room(check, room_name, rooms_t[room_name])

    mix_t = check.table("mix", data.get("mix", {}))
    check.known("mix", mix_t, SCHEMA["mix"])
    defaults = _parse_gains(
        check, "mix", mix_t, {"wet_db": DEFAULT_WET_DB, "dry_db": DEFAULT_DRY_DB, "distance_m": None, "channels": None}
    )

    loudness = _parse_loudness(check, check.table("loudness", data.get("loudness", {})))

    sources_t = data.get("sources")
    if sources_t is None:
        check.fail_key("sources", "a job needs at least one [[sources]] table")
    if not isinstance(sources_t, list) or not all(isinstance(s, dict) for s in sources_t) or not sources_t:
        check.fail("sources", sources_t, "must be one or more [[sources]] tables")
    if len(sources_t) > MAX_GROUPS:
        check.fail_key("sources", f"{len(sources_t)} groups: at most {MAX_GROUPS}")
    groups = []
    for i, s in enumerate(sources_t):
        key = f"sources[{i}]"
        check.known(key, s, SCHEMA["sources"])
        if "files" not in s:
            check.fail_key(f"{key}.files", "required: a list of globs")
        files = s["files"]
        if isinstance(files, str):
            files = [files]
        if not isinstance(files, list) or not files or not all(isinstance(f, str) and f for f in files):
            check.fail(f"{key}.files", files, "must be a non-empty list of glob strings")
        if len(files) > MAX_PATTERNS:
            check.fail_key(f"{key}.files", f"{len(files)} globs: at most {MAX_PATTERNS}")
        if "room" not in s:
            check.fail_key(f"{key}.room", "required: a room of [rooms] or a built-in room")
        room = check.string(f"{key}.room", s["room"])
        if room not in rooms and room not in CATALOGUE:
            known = sorted(rooms) + sorted(CATALOGUE)
            check.fail(f"{key}.room", room, "must be a room of [rooms] or a built-in room: " + ", ".join(known))
        gains = _parse_gains(check, key, s, defaults)
        groups.append(
            SourceGroup(
                index=i,
                files=tuple(files),
                room=room,
                wet_db=gains["wet_db"],
                dry_db=gains["dry_db"],
                distance_m=gains["distance_m"],
                channels=gains["channels"],
            )
        )
    job = Job(
        path=path,
        text_sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
        name=name,
        output_dir=Path(os.path.normpath(path.parent / output)),
        stems=tuple(stems),
        format=fmt,
        subtype=subtype,
        tail=tail,
        tail_floor_db=floor,
        name_pattern=pattern,
        allow_output_in_sources=allow_in_sources,
        rooms=rooms,
        groups=tuple(groups),
        loudness=loudness,
        report=report,
    )
    for g in job.groups:  # distance_m must fit the group's room
        job.room_for(g)
    return job


def load_job(path):
    """Read and validate a job file (see :func:`parse_job`)."""
    path = Path(path)
    try:
        raw = path.read_bytes()
    except OSError as e:
        raise JobError(f"{path}: cannot read the job file ({e.strerror or e})") from None
    if len(raw) > 4 * 1024 * 1024:
        raise JobError(f"{path}: {len(raw)} bytes: a job file may be at most 4 MiB")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        raise JobError(f"{path}: not UTF-8 text ({e})") from None
    return parse_job(text, path=path)
