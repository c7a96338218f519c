"""The ``render`` command line: a thin layer over the library.

Exit codes (also in the README):

==== =========================================================
0    everything asked for was done
1    a batch ran but some files failed (see the manifest)
2    usage error (unknown option, missing argument)
3    the job file is invalid
4    an input (audio file or response) cannot be read
5    an output cannot be written
6    a parameter is out of range or a measurement is impossible
130  interrupted (Ctrl-C)
==== =========================================================
"""

from __future__ import annotations

import argparse
import json
import os
import sys

from . import __version__
from .errors import AnalysisError, AudioInputError, JobError, OutputError, ParameterError, RenderError

__all__ = ["main", "build_parser", "EXIT_CODES"]

EXIT_OK = 0
EXIT_PARTIAL = 1
EXIT_USAGE = 2
EXIT_JOB = 3
EXIT_INPUT = 4
EXIT_OUTPUT = 5
EXIT_PARAMETER = 6
EXIT_INTERRUPTED = 130

#: Exit code by meaning, for the README and its drift test.
EXIT_CODES = {
    "ok": EXIT_OK,
    "some files failed": EXIT_PARTIAL,
    "usage error": EXIT_USAGE,
    "invalid job file": EXIT_JOB,
    "unreadable input": EXIT_INPUT,
    "unwritable output": EXIT_OUTPUT,
    "parameter out of range or measurement impossible": EXIT_PARAMETER,
    "interrupted": EXIT_INTERRUPTED,
}


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit code 2, no usage dump
        self.exit(EXIT_USAGE, f"render: {message} (see 'render {self.prog.split()[-1]} --help')\n"
                  if " " in self.prog else f"render: {message} (see 'render --help')\n")


def _non_negative(text):
    """A number >= 0 (argparse type)."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r}: expected a finite number >= 0")
    return value


def build_parser():
    """The argument parser (used by :func:`main` and by the README drift test)."""
    parser = _Parser(prog="render", description="Batch, offline room renderer for audio post-production.")
    parser.add_argument("--version", action="version", version=f"render {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("run", help="render every source of a job file")
    p.add_argument("job", metavar="JOB.toml", help="the job file")
    p.add_argument("--jobs", type=int, default=None, metavar="N", help="worker processes (default: all cores; 1 = in this process)")
    p.add_argument("--resume", action="store_true", help="skip sources already rendered with the same input and settings")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.add_argument("--shard", metavar="K/N", help="render only shard K of N (1-based), or 'slurm' for the job array's")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask distributed scheduler at ADDRESS, or 'local' for a cluster on this machine")

    p = sub.add_parser("merge", help="combine the shard manifests of an output folder into manifest.json")
    p.add_argument("output", metavar="OUTDIR", help="the job's output folder")

    p = sub.add_parser("check", help="validate a job file and print its plan; render nothing")
    p.add_argument("job", metavar="JOB.toml", help="the job file")

    p = sub.add_parser("rooms", help="list the built-in rooms")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")

    p = sub.add_parser("ir", help="write a room's impulse response as a 32-bit float WAV")
    p.add_argument("room", metavar="NAME", help="a built-in room, or a room of the job given with --job")
    p.add_argument("--job", metavar="FILE", help="a job file whose [rooms] table defines NAME")
    p.add_argument("--rate", type=int, default=48000, metavar="HZ", help="sample rate in Hz (default 48000)")
    p.add_argument("--channels", type=int, default=2, choices=(1, 2), help="1 or 2 (default 2)")
    p.add_argument("-o", "--output", required=True, metavar="FILE.wav", help="where to write the response")
    p.add_argument("--quiet", action="store_true", help="print nothing but errors")

    p = sub.add_parser("fit", help="describe a room from a recording made in it (impulse response or speech)")
    p.add_argument("recording", metavar="RECORDING.wav", nargs="?", help="a recording made in the room")
    p.add_argument("--name", default="fitted", metavar="ROOM", help="name of the [rooms.NAME] table (default 'fitted')")
    p.add_argument("-o", "--output", metavar="room.toml", help="also write the table to this file")
    p.add_argument("--compare", nargs=2, metavar=("A.wav", "B.wav"), help="the estimates of two recordings side by side")

    p = sub.add_parser("analyze", help="ISO 3382-1 measures of an impulse response")
    p.add_argument("file", metavar="FILE.wav", help="an impulse response (ours or measured)")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--plot", metavar="OUT.png", help="also draw the response, its decay and its bands (needs 'plots')")

    p = sub.add_parser("report", help="write report.html (and PNGs) for a rendered output folder")
    p.add_argument("output", metavar="OUTDIR", help="the job's output folder (with manifest.json)")

    p = sub.add_parser("cache", help="show the response cache, or remove entries from it")
    p.add_argument("--clear", action="store_true", help="remove every entry")
    p.add_argument("--unused-days", type=_non_negative, metavar="D", help="remove the entries not used for D days")
    p.add_argument("--max-mb", type=_non_negative, metavar="MB",
                   help="remove the least recently used entries beyond MB megabytes")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")

    p = sub.add_parser("bench", help="measure speed and memory on material generated here")
    p.add_argument("--minutes", type=float, default=None, metavar="M", help="length of the main test file")
    p.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    return parser


def _cmd_rooms(args):
    from .catalogue import CATALOGUE

    if args.json:
        rows = []
        for name in sorted(CATALOGUE):
            room = CATALOGUE[name]
            rows.append(
                {
                    "name": name,
                    "decay_bands_s": [round(t, 3) for t in room.band_targets_s],
                    "size_m": list(room.size_m),
                    "volume_m3": round(room.volume_m3, 1),
                    "surface_m2": round(room.surface_m2, 1),
                    "mean_free_path_m": round(room.mean_free_path_m, 2),
                    "sabine_absorption_m2": round(room.sabine_absorption_m2, 1),
                    "critical_distance_m": round(room.critical_distance_m, 2),
                    "schroeder_frequency_hz": round(room.schroeder_frequency_hz, 1),
                    "distance_m": round(room.distance_m, 2),
                    "description": room.description,
                    "reference": room.reference,
                }
            )
        print(json.dumps(rows, indent=2))
        return EXIT_OK
    from .report_text import rooms_table

    print(rooms_table(CATALOGUE))
    return EXIT_OK


def _resolve_room(name, job_path):
    from .catalogue import get_room

    if job_path is None:
        return get_room(name)
    from .job import load_job

    job = load_job(job_path)
    if name not in job.rooms:
        raise JobError(f"{job_path}: rooms.{name}: no such room (the job defines: {', '.join(sorted(job.rooms)) or 'none'})")
    return job.rooms[name]


def _cmd_ir(args):
    from .audio_io import write_response
    from .synthesis import synthesize

    room = _resolve_room(args.room, args.job)
    response = synthesize(room, rate_hz=args.rate, channels=args.channels)
    write_response(args.output, response.ir, rate_hz=args.rate)
    if not args.quiet:
        bands = "  ".join(
            f"{f:g} Hz {m:.3f}/{t:.3f} s ({e:+.1f} %)"
            for f, m, t, e in zip(response.bands_hz, response.measured_s, response.target_s, response.error_pct)
        )
        print(f"{args.output}: {room.name}, {args.rate} Hz, {args.channels} ch, "
              f"{response.ir.shape[0] / args.rate:.2f} s")
        print(f"T30 measured/target: {bands}")
    return EXIT_OK


def _cmd_analyze(args):
    from .analysis import analyze
    from .audio_io import read_all

    ir, rate = read_all(args.file)
    result = analyze(ir, rate_hz=float(rate))
    if args.json:
        print(json.dumps({"file": args.file, **result.to_dict()}, indent=2))
    else:
        print(f"{args.file}: {rate} Hz, {ir.shape[1]} ch, {ir.shape[0] / rate:.3f} s")
        print(result.format_table())
    if args.plot:
        from .report_html import analyze_plot

        analyze_plot(args.file, args.plot)
        if not args.json:
            print(f"plot: {args.plot}")
    return EXIT_OK


def _cmd_report(args):
    from .report_html import write_report

    print(write_report(args.output))
    return EXIT_OK


def _cmd_bench(args):
    from .bench import format_bench, run_bench  # noqa: I001

    from .bench import DEFAULT_MINUTES

    results = run_bench(minutes=DEFAULT_MINUTES if args.minutes is None else args.minutes, json_path=args.json)
    print(format_bench(results))
    return EXIT_OK


def _cmd_cache(args):
    import time

    from . import response_cache

    folder = response_cache.cache_dir()
    out = {"folder": None if folder is None else str(folder)}
    if folder is None:
        if args.json:
            print(json.dumps({**out, "entries": 0, "bytes": 0}))
        else:
            value = os.environ.get(response_cache.ENV_VAR)
            why = f"{response_cache.ENV_VAR}={value!r}" if value is not None else "no home folder to keep it in"
            print(f"render: the response cache is off ({why})")
        return EXIT_OK
    if args.clear or args.unused_days is not None or args.max_mb is not None:
        max_bytes = None if args.max_mb is None else int(args.max_mb * 1e6)
        out["pruned"] = response_cache.prune(folder, unused_days=args.unused_days, max_bytes=max_bytes,
                                             everything=args.clear)
    entries = [e for e in response_cache.cache_entries(folder) if e.kind == "entry"]
    out.update(entries=len(entries), bytes=sum(e.size_bytes for e in entries),
               first_used=min((e.used for e in entries), default=None),
               last_used=max((e.used for e in entries), default=None))
    pruned = out.get("pruned")
    code = EXIT_OUTPUT if pruned and pruned["failed"] else EXIT_OK
    if args.json:
        print(json.dumps(out))
        return code
    if pruned is not None:
        print(f"removed {pruned['removed']} file(s), {pruned['removed_bytes'] / 1e6:.1f} MB")
        for path in pruned["failed"]:
            print(f"render: could not remove {path}", file=sys.stderr)
    line = f"{folder}: {out['entries']} response(s), {out['bytes'] / 1e6:.1f} MB"
    if entries:
        first, last = (time.strftime("%Y-%m-%d", time.localtime(t)) for t in (out["first_used"], out["last_used"]))
        line += f", used between {first} and {last}"
    print(line)
    return code


def _cmd_check(args):
    from .job import load_job
    from .plan import plan_job
    from .report_text import plan_table

    plan = plan_job(load_job(args.job))
    print(plan_table(plan))
    return EXIT_OK


def _cmd_run(args):
    if args.scheduler is not None:
        from .process_setup import prestart_scheduler

        prestart_scheduler(args.scheduler)  # before the heavy imports below, which it overlaps
    from .batch import run_plan
    from .job import load_job
    from .plan import plan_job

    if args.jobs is not None and args.jobs < 1:
        raise ParameterError(f"--jobs = {args.jobs}: must be ≥ 1")
    from .shards import parse_shard

    shard = parse_shard(args.shard) if args.shard is not None else None
    plan = plan_job(load_job(args.job))
    result = run_plan(plan, jobs=args.jobs, quiet=args.quiet, resume=args.resume, shard=shard,
                      scheduler=args.scheduler)
    if not args.quiet:
        print(f"{plan.job.output_dir}: {result.rendered} rendered, {result.skipped} skipped, "
              f"{result.failed} failed")
    if plan.job.report and shard is None and not result.interrupted:
        from .report_html import write_report

        path = write_report(plan.job.output_dir)
        if not args.quiet:
            print(f"report: {path}")
    for entry in result.manifest["sources"]:
        if entry["status"] == "failed":
            print(f"render: failed: {entry['error']}", file=sys.stderr)
    if result.interrupted:
        return EXIT_INTERRUPTED
    return EXIT_PARTIAL if result.failed else EXIT_OK


def _cmd_merge(args):
    from pathlib import Path

    from .manifest import merge_shards, write_json_atomic
    from .plan import MANIFEST_NAME

    merged, problems = merge_shards(args.output)
    write_json_atomic(Path(args.output) / MANIFEST_NAME, merged)
    s = merged["summary"]
    print(f"{args.output}: merged {len(merged['merged_from'])} shard manifests: {s['rendered']} rendered, "
          f"{s['skipped']} skipped, {s['failed']} failed")
    for p in problems:
        print(f"render: merge: {p}", file=sys.stderr)
    return EXIT_PARTIAL if problems or s["failed"] else EXIT_OK


def _cmd_fit(args):
    from .audio_io import read_all
    from .fit import compare, fit_recording, format_compare, format_fit, room_table

    if args.compare:
        results = []
        for path in args.compare:
            signal, rate = read_all(path)
            results.append(fit_recording(signal, rate_hz=float(rate)))
        print(f"A = {args.compare[0]}\nB = {args.compare[1]}")
        print(format_compare(compare(results[0], results[1])))
        return EXIT_OK
    if not args.recording:
        raise ParameterError("render fit: give RECORDING.wav, or --compare A.wav B.wav")
    signal, rate = read_all(args.recording)
    result = fit_recording(signal, rate_hz=float(rate))
    print(format_fit(result))
    table = room_table(result, name=args.name)
    print()
    print(table)
    if args.output:
        from pathlib import Path

        try:
            Path(args.output).write_text(table + "\n", encoding="utf-8")
        except OSError as e:
            raise OutputError(f"{args.output}: cannot write ({e.strerror or e})") from None
    return EXIT_OK


_COMMANDS = {
    "report": _cmd_report,
    "bench": _cmd_bench,
    "fit": _cmd_fit,
    "run": _cmd_run,
    "merge": _cmd_merge,
    "check": _cmd_check,
    "rooms": _cmd_rooms,
    "ir": _cmd_ir,
    "analyze": _cmd_analyze,
    "cache": _cmd_cache,
}


def _exit_code(error):
    if isinstance(error, JobError):
        return EXIT_JOB
    if isinstance(error, AudioInputError):
        return EXIT_INPUT
    if isinstance(error, OutputError):
        return EXIT_OUTPUT
    if isinstance(error, (ParameterError, AnalysisError)):
        return EXIT_PARAMETER
    return EXIT_PARAMETER


def main(argv=None):
    """Run the command line; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return EXIT_USAGE
    try:
        return _COMMANDS[args.command](args)
    except RenderError as error:
        print(f"render: {error}", file=sys.stderr)
        return _exit_code(error)
    except KeyboardInterrupt:
        print("render: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


def entry(argv=None):
    """The ``render`` command and ``python -m render``: :func:`main`, then a quick exit.

    Once the command is done, the objects it left are moved out of the
    garbage collector's sight (:func:`gc.freeze`): the interpreter's
    shutdown otherwise spends about 0.2 s collecting what numpy, scipy and
    the render left behind (measured on the build machine), on every run.
    Everything is written and closed by then; shutdown still runs the exit
    handlers and flushes the streams.

    Returns
    -------
    int
        The exit code of :func:`main`.
    """
    import gc

    code = main(argv)
    gc.freeze()
    return code
