"""The render of one source: stream it through its room and write the stems.

Runs in a worker (or in-process with ``--jobs 1``).  Memory does not grow with
the source's length: the source is read in blocks, convolved by streamed
overlap-save (:mod:`render.convolve`), and the stems are written block by
block to temporary files that are renamed into place only when every stem is
complete.

Alignment: output frame 0 is source frame 0 (no latency, no pre-roll).
``dry``, ``wet`` and ``mix`` have exactly the same length and ``mix = dry + wet``
sample by sample before quantisation.
"""

from __future__ import annotations

import time
from collections import OrderedDict
from pathlib import Path

import numpy as np

from . import audio_io, convolve
from .errors import OutputError, RenderError
from .synthesis import synthesize
from .units import db_to_gain, gain_to_db

__all__ = ["render_task", "CUT_FADE_S", "kernel_for"]

#: Fade of the wet stem at the end of the source with ``tail = "cut"``, in seconds.
CUT_FADE_S = 0.05

_KERNELS: "OrderedDict[tuple, convolve.Kernel]" = OrderedDict()
_KERNEL_CACHE_SIZE = 8


def kernel_for(task):
    """The prepared (wet-gain-scaled) response of a task, cached per process."""
    key = (task.room.fingerprint(), float(task.info.rate_hz), task.channels_out, task.tail_floor_db, task.wet_db)
    kernel = _KERNELS.get(key)
    if kernel is None:
        response = synthesize(
            task.room, rate_hz=float(task.info.rate_hz), channels=task.channels_out, tail_floor_db=task.tail_floor_db
        )
        if response.tail_frames != task.tail_frames:
            raise RenderError(
                f"{task.key}: the room's response has {response.tail_frames} tail frames, the plan expected "
                f"{task.tail_frames} (planned with another version of the engine?)"
            )
        kernel = convolve.prepare_kernel(response.ir * db_to_gain(task.wet_db))
        _KERNELS[key] = kernel
        while len(_KERNELS) > _KERNEL_CACHE_SIZE:
            _KERNELS.popitem(last=False)
    else:
        _KERNELS.move_to_end(key)
    return kernel


class _DryQueue:
    """Dry frames waiting for their wet counterparts (no copies beyond one block)."""

    def __init__(self, channels):
        self.blocks = []
        self.offset = 0
        self.channels = channels

    def push(self, block):
        if block.shape[0]:
            self.blocks.append(block)

    def pop(self, frames):
        out = np.zeros((frames, self.channels))
        filled = 0
        while filled < frames and self.blocks:
            head = self.blocks[0]
            take = min(frames - filled, head.shape[0] - self.offset)
            out[filled : filled + take] = head[self.offset : self.offset + take]
            filled += take
            self.offset += take
            if self.offset == head.shape[0]:
                self.blocks.pop(0)
                self.offset = 0
        return out


def render_task(task, *, output_dir):
    """Render one planned source and write its stems.

    Parameters
    ----------
    task : render.plan.Task
        A task without ``error``.
    output_dir : str or Path
        The job's output folder (``task.outputs`` are relative to it).

    Returns
    -------
    dict
        The manifest entry's render facts: per stem ``path``, ``sha256``,
        ``frames``, ``peak_dbfs``, ``clipped_samples``; ``input_sha256``;
        ``render_s``.
    """
    started = time.perf_counter()
    info = task.info
    kernel = kernel_for(task)
    dry_gain = db_to_gain(task.dry_db)
    out_ch = task.channels_out
    total_in = info.frames
    total_out = task.frames_out
    fade_frames = min(int(round(CUT_FADE_S * info.rate_hz)), total_in) if task.tail == "cut" else 0
    integer_output = task.subtype.startswith("PCM")
    stems = dict(task.outputs)
    for _, rel in task.outputs:
        (Path(output_dir) / rel).parent.mkdir(parents=True, exist_ok=True)
    writers = {
        stem: audio_io.BlockWriter(
            Path(output_dir) / rel, rate_hz=info.rate_hz, channels=out_ch, format=task.format, subtype=task.subtype
        )
        for stem, rel in task.outputs
    }
    clipped = {stem: 0 for stem in stems}
    peaks = {stem: 0.0 for stem in stems}
    state = convolve.initial_state(kernel, channels=info.channels)
    dry_queue = _DryQueue(out_ch)
    written = 0

    def emit(wet):
        nonlocal written
        n = wet.shape[0]
        if n == 0:
            return
        dry = dry_queue.pop(n)
        if task.tail == "cut":
            n = max(0, min(n, total_in - written))
            wet, dry = wet[:n], dry[:n]
            if fade_frames:
                idx = written + np.arange(n)
                pos = idx - (total_in - fade_frames)
                ramp = np.where(pos >= 0, 0.5 + 0.5 * np.cos(np.pi * (pos + 1) / fade_frames), 1.0)
                wet = wet * ramp[:, None]
        parts = {"dry": dry, "wet": wet}
        if "mix" in stems:
            parts["mix"] = dry + wet
        for stem, w in writers.items():
            block = parts[stem]
            peak = max(float(block.max()), -float(block.min())) if block.size else 0.0
            peaks[stem] = max(peaks[stem], peak)
            if integer_output and peak > 1.0:
                clipped[stem] += int(np.count_nonzero(np.abs(block) > 1.0))
                block = np.clip(block, -1.0, 1.0)
            w.write(block)
        written += n

    try:
        for block in audio_io.read_blocks(task.source, block_frames=kernel.block_frames):
            dry = block * dry_gain
            if dry.shape[1] != out_ch:
                dry = np.repeat(dry, out_ch, axis=1)
            dry_queue.push(dry)
            wet, state = convolve.convolve_block(block, state, kernel=kernel)
            emit(wet)
        if state.frames_in != total_in:
            raise RenderError(f"{task.key}: read {state.frames_in} frames, the file's header says {total_in}")
        tail_frames = task.tail_frames if task.tail == "extend" else 0
        emit(convolve.flush(state, kernel=kernel, tail_frames=tail_frames))
        if written != total_out:
            raise OutputError(f"{task.key}: wrote {written} frames, expected {total_out}")
        for w in writers.values():
            w.commit()
    except BaseException:
        for w in writers.values():
            w.abort()
        raise
    result = {"stems": {}, "input_sha256": audio_io.sha256_file(task.source)}
    for stem, rel in task.outputs:
        result["stems"][stem] = {
            "path": rel,
            "sha256": audio_io.sha256_file(Path(output_dir) / rel),
            "frames": written,
            "peak_dbfs": round(gain_to_db(peaks[stem]), 3),
            "clipped_samples": clipped[stem],
        }
    result["render_s"] = round(time.perf_counter() - started, 4)
    return result
