"""Plain-text tables for the terminal (formatting only: no DSP, no I/O)."""

from __future__ import annotations

from .acoustics import OCTAVE_BANDS_HZ

__all__ = ["rooms_table", "format_table", "plan_table"]


def _band_label(f):
    return f"{f / 1000:g}k" if f >= 1000 else f"{f:g}"


def format_table(header, rows, *, align=None):
    """A fixed-width table: ``header`` and ``rows`` are lists of strings."""
    widths = [max(len(str(r[i])) for r in [header, *rows]) for i in range(len(header))]
    align = align or ["<"] + [">"] * (len(header) - 1)
    lines = ["  ".join(f"{str(h):{a}{w}}" for h, a, w in zip(header, align, widths))]
    lines.append("  ".join("-" * w for w in widths))
    for r in rows:
        lines.append("  ".join(f"{str(c):{a}{w}}" for c, a, w in zip(r, align, widths)))
    return "\n".join(lines)


def rooms_table(rooms):
    """The room catalogue: decay per octave band (s), size, volume, r_c, Schroeder frequency.

    >>> from render.room import Room
    >>> print(rooms_table({"box": Room(name="box", decay_s=0.5, size_m=(4.0, 3.0, 2.5))}).splitlines()[3][:22])
    box   0.50  0.50  0.50
    """
    header = ["room"] + [_band_label(f) for f in OCTAVE_BANDS_HZ] + [
        "size m", "V m³", "S m²", "mfp m", "A m²", "r_c m", "f_S Hz", "dist m"]
    rows = []
    for name in sorted(rooms):
        r = rooms[name]
        rows.append(
            [name]
            + [f"{t:.2f}" for t in r.band_targets_s]
            + [
                "×".join(f"{v:g}" for v in r.size_m),
                f"{r.volume_m3:.0f}",
                f"{r.surface_m2:.0f}",
                f"{r.mean_free_path_m:.2f}",
                f"{r.sabine_absorption_m2:.1f}",
                f"{r.critical_distance_m:.2f}",
                f"{r.schroeder_frequency_hz:.0f}",
                f"{r.distance_m:.1f}",
            ]
        )
    title = ("Reverberation time T60 per octave band (s), 125 Hz - 8 kHz; V volume, S surface, mfp mean free "
             "path 4V/S, A Sabine absorption 0.161 V/T, r_c critical distance, f_S Schroeder frequency")
    return title + "\n" + format_table(header, rows)


def _size(n):
    for unit in ("B", "KB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000.0


def plan_table(plan):
    """What ``render check`` prints: sources, rooms, outputs, predicted sizes and tails."""
    from .audio_io import predicted_bytes

    job = plan.job
    lines = [f"job {job.name}: {job.path}", f"output folder: {job.output_dir}", ""]
    rows = []
    total = 0
    for t in plan.tasks:
        if t.error is not None:
            rows.append([t.key, t.room_name, "-", "-", "-", "-", f"ERROR: {t.error}"])
            continue
        per_stem = predicted_bytes(frames=t.frames_out, channels=t.channels_out, subtype=t.subtype, format=t.format)
        total += per_stem * len(t.outputs)
        rows.append(
            [
                t.key,
                t.room_name,
                f"{t.info.rate_hz} Hz/{t.info.channels}→{t.channels_out} ch/{t.subtype}",
                f"{t.tail_frames / t.info.rate_hz:.2f} s",
                f"{t.wet_db:+.1f}/{t.dry_db:+.1f} dB",
                _size(per_stem * len(t.outputs)),
                ", ".join(rel for _, rel in t.outputs),
            ]
        )
    header = ["source", "room", "format", "tail", "wet/dry", "size", "outputs"]
    lines.append(format_table(header, rows, align=["<", "<", "<", ">", ">", ">", "<"]))
    bad = sum(1 for t in plan.tasks if t.error is not None)
    lines.append("")
    lines.append(f"{len(plan.tasks)} sources ({bad} unreadable), {len(plan.rooms)} room responses, "
                 f"{_size(total)} of stems predicted")
    return "\n".join(lines)
