"""The render of one source: stream it through its room and write the stems.

Runs in a worker (or in-process with ``--jobs 1``).  Memory does not grow with
the source's length: the source is read in blocks, convolved by streamed
overlap-save (:mod:`render.convolve`), and the stems are written block by
block to temporary files that are renamed into place only when every stem is
complete.

Alignment: output frame 0 is source frame 0 (no latency, no pre-roll).
``dry``, ``wet`` and ``mix`` have exactly the same length and ``mix = dry + wet``.

Two ways through:

* **One pass** (no loudness target, and either no ceiling or a limiter for it):
  convolve → (limiter) → dither → write, metering the mix as it is written.
* **Two passes** (a loudness target, or a ceiling handled by lowering the gain
  or failing the file): :func:`measure_task` convolves, meters the mix and
  keeps the wet signal in a float temporary; the batch decides the gain (per
  file or per group); :func:`render_task` with ``gain_db`` then reads the
  source and the temporary, applies the gain (and limiter), dithers and writes.
  With a target and the limiter, :func:`makeup_gain_db` first probes the gain
  that makes up what limiting takes off (limiter and meter only, nothing
  written), so the stems are written once.

The gain and the limiter's gain curve are applied to ``dry`` and ``wet``
alike.  For integer outputs ``dry`` and ``wet`` are dithered and ``mix`` is
their exact sum on the integer grid, so the stems null against the mix to
the last bit (unless the mix clips, which is counted).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import time
from collections import OrderedDict
from pathlib import Path

import numpy as np
import soundfile as sf

from . import __version__, audio_io, convolve, dither, limiter, loudness, riff, truepeak
from .errors import AudioInputError, OutputError, RenderError
from .response_cache import cached_synthesize
from .units import db_to_gain, gain_to_db

__all__ = ["render_task", "measure_task", "makeup_gain_db", "kernel_for", "whole_size_for", "stream_block_frames",
           "CUT_FADE_S", "TEMP_DIR", "temp_path_for"]

#: Fade of the wet stem at the end of the source with ``tail = "cut"``, in seconds.
CUT_FADE_S = 0.05
#: Folder (inside the output folder) of the two-pass renders' temporaries.
TEMP_DIR = ".render-tmp"

_KERNELS: "OrderedDict[tuple, convolve.Kernel]" = OrderedDict()
#: Prepared kernels a process keeps: at most this many, holding at most _KERNEL_CACHE_BYTES (the
#: newest is always kept).  Our choice: short sources get kernels sized to their length
#: (:func:`render.convolve.whole_fft_size`), so a worker of a folder of dialogue lines meets a few
#: sizes per room; 64 MiB is five stereo kernels of a 2.5 s room at 48 kHz.
_KERNEL_CACHE_SIZE = 8
_KERNEL_CACHE_BYTES = 64 * 2**20


#: Folder (inside the output folder) where the batch leaves each response as float64 ``.npy``,
#: so that workers that did not plan (a Dask cluster) map it instead of synthesising it again.
RESPONSES_DIR = ".render-responses"


def response_store_path(output_dir, *, room, rate_hz, channels, tail_floor_db):
    """Where the batch stores a response for its workers (named by everything that shapes it)."""
    from .synthesis import ENGINE_VERSION

    ident = f"{ENGINE_VERSION}|{room.fingerprint()}|{float(rate_hz)!r}|{channels}|{float(tail_floor_db)!r}"
    name = hashlib.sha256(ident.encode("utf-8")).hexdigest()[:32]
    return Path(output_dir) / RESPONSES_DIR / f"{name}.npy"


def kernel_for(task, output_dir=None, *, fft_size=None):
    """The prepared (wet-gain-scaled) response of a task, cached per process.

    The response comes from the batch's float64 store in ``output_dir`` when
    it is there (memory-mapped: the same bits as a synthesis), else from
    :func:`render.response_cache.cached_synthesize`.  ``fft_size``: as for
    :func:`render.convolve.prepare_kernel` (default: the streaming size).
    """
    key = (task.room.fingerprint(), float(task.info.rate_hz), task.channels_out, task.tail_floor_db, task.wet_db,
           fft_size)
    kernel = _KERNELS.get(key)
    if kernel is None:
        ir = None
        if output_dir is not None:
            stored = response_store_path(output_dir, room=task.room, rate_hz=task.info.rate_hz,
                                         channels=task.channels_out, tail_floor_db=task.tail_floor_db)
            try:
                ir = np.load(stored, mmap_mode="r", allow_pickle=False)
            except (OSError, ValueError):
                ir = None
        if ir is None or ir.ndim != 2 or ir.shape[1] != task.channels_out:
            ir = cached_synthesize(task.room, rate_hz=float(task.info.rate_hz), channels=task.channels_out,
                                   tail_floor_db=task.tail_floor_db).ir
        if ir.shape[0] - 1 != task.tail_frames:
            raise RenderError(
                f"{task.key}: the room's response has {ir.shape[0] - 1} tail frames, the plan expected "
                f"{task.tail_frames} (planned with another version of the engine?)"
            )
        kernel = convolve.prepare_kernel(np.asarray(ir) * db_to_gain(task.wet_db), fft_size=fft_size)
        _KERNELS[key] = kernel
        while len(_KERNELS) > 1 and (len(_KERNELS) > _KERNEL_CACHE_SIZE or
                                     sum(k.nbytes for k in _KERNELS.values()) > _KERNEL_CACHE_BYTES):
            _KERNELS.popitem(last=False)
    else:
        _KERNELS.move_to_end(key)
    return kernel


def _kept_tail(task):
    """Tail frames kept after the source: the response's, or none with ``tail = "cut"``."""
    return task.tail_frames if task.tail == "extend" else 0


def whole_size_for(task):
    """The transform size that convolves the task's whole source at once, or None: streamed.

    :func:`render.convolve.whole_fft_size` for the source's length, the
    room's response and the kept tail: a pure function of the plan.
    """
    return convolve.whole_fft_size(task.tail_frames + 1, input_frames=task.info.frames, tail_frames=_kept_tail(task))


def stream_block_frames(task):
    """New input frames per transform when the task's source is streamed (overlap-save)."""
    n = task.tail_frames + 1
    return convolve.choose_fft_size(n) - n + 1


def temp_path_for(task, output_dir):
    """Where the two-pass render keeps a task's wet signal between the passes."""
    return Path(output_dir) / TEMP_DIR / f"{task.settings_sha256[:24]}.wet.wav"


class _Queue:
    """Frames waiting to be paired with frames that arrive later (no copies beyond one block).

    ``pop`` returns a view into a pushed block when one block holds all the
    frames asked for, so callers must not write into what they pushed or popped.
    """

    def __init__(self, channels):
        self.blocks = []
        self.offset = 0
        self.channels = channels

    def push(self, block):
        if block.shape[0]:
            self.blocks.append(block)

    def pop(self, frames):
        if self.blocks and self.blocks[0].shape[0] - self.offset >= frames:
            # Served by the head block alone: a view, no copy.
            head, start = self.blocks[0], self.offset
            self.offset += frames
            if self.offset == head.shape[0]:
                self.blocks.pop(0)
                self.offset = 0
            return head[start : start + frames]
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


#: A source sample this close to full scale counts as clipped (within a 16-bit step).
_FULL_SCALE = 1.0 - 2.0**-15


class _SourceCheck:
    """Looks at every source block: refuses NaN or infinite samples, notes DC and clipping."""

    def __init__(self, task):
        self.task = task
        self.frames = 0
        self.total = np.zeros(task.info.channels)
        self.full_scale = 0

    def __call__(self, block):
        if block.shape[0]:
            top, bottom = float(block.max()), float(block.min())  # NaN propagates, no temporaries
            if not (math.isfinite(top) and math.isfinite(bottom)):
                bad = int(np.argwhere(~np.isfinite(block))[0][0])
                raise AudioInputError(f"{self.task.key}: NaN or infinite sample at frame {self.frames + bad}: "
                                      "expected finite audio")
            if max(top, -bottom) >= _FULL_SCALE:
                self.full_scale += int(np.count_nonzero(np.abs(block) >= _FULL_SCALE))
            # Column by column: 30x faster than sum(axis=0) over (frames, 2), with numpy's pairwise sum.
            # (Not a product with ones: BLAS would start threads that spin on the other cores.)
            for c in range(block.shape[1]):
                self.total[c] += block[:, c].sum()
        self.frames += block.shape[0]
        return block

    def notes(self):
        out = []
        if self.frames:
            dc = np.abs(self.total / self.frames).max()
            if dc > 10 ** (-40 / 20):
                out.append(f"source has a DC offset of {gain_to_db(dc):.1f} dBFS")
        if self.full_scale:
            out.append(f"source already clipped: {self.full_scale} samples at full scale")
        return out


def _dry(block, task):
    dry = block * db_to_gain(task.dry_db)
    if dry.shape[1] != task.channels_out:
        dry = np.repeat(dry, task.channels_out, axis=1)
    return dry


def _convolved(task, output_dir, check=None):
    """(dry, wet) blocks, aligned, ``task.frames_out`` frames in all, cut fade applied.

    A short source is read whole and convolved in one transform
    (:func:`whole_size_for`), a longer one streamed block by block.
    """
    info = task.info
    total_in = info.frames
    fade = min(int(round(CUT_FADE_S * info.rate_hz)), total_in) if task.tail == "cut" else 0
    whole = whole_size_for(task)
    kernel = kernel_for(task, output_dir, fft_size=whole)
    queue = _Queue(task.channels_out)
    done = 0

    def pair(wet):
        nonlocal done
        n = wet.shape[0]
        dry = queue.pop(n)
        if task.tail == "cut":
            n = max(0, min(n, total_in - done))
            wet, dry = wet[:n], dry[:n]
            if fade and n:
                pos = done + np.arange(n) - (total_in - fade)
                ramp = np.where(pos >= 0, 0.5 + 0.5 * np.cos(np.pi * (pos + 1) / fade), 1.0)
                wet = wet * ramp[:, None]
        done += n
        return dry, wet

    if whole is not None:
        blocks = list(audio_io.read_blocks(task.source, block_frames=total_in))
        x = np.concatenate(blocks) if len(blocks) > 1 else (blocks[0] if blocks else np.zeros((0, info.channels)))
        del blocks
        if x.shape[0] != total_in:
            raise AudioInputError(f"{task.key}: read {x.shape[0]} frames, the file's header says {total_in}")
        if check is not None:
            check(x)
        queue.push(_dry(x, task))
        wet = convolve.convolve_whole(x, kernel=kernel, tail_frames=_kept_tail(task))
        del x
        yield pair(wet)
        return
    state = convolve.initial_state(kernel, channels=info.channels)
    for block in audio_io.read_blocks(task.source, block_frames=kernel.block_frames):
        if check is not None:
            check(block)
        queue.push(_dry(block, task))
        wet, state = convolve.convolve_block(block, state, kernel=kernel)
        if wet.shape[0]:
            yield pair(wet)
        del block, wet  # the last (partial) block lives on in the queue and the state: no third copy
    if state.frames_in != total_in:
        raise AudioInputError(f"{task.key}: read {state.frames_in} frames, the file's header says {total_in}")
    for last in convolve.flush_blocks(state, kernel=kernel, tail_frames=_kept_tail(task)):
        yield pair(last)


def _from_temporary(task, temp, block_frames, check=None):
    """(dry, wet) blocks from the source and the wet temporary of :func:`measure_task`."""
    with sf.SoundFile(str(temp)) as wet_file:
        if wet_file.frames != task.frames_out:
            raise RenderError(f"{task.key}: temporary {temp} has {wet_file.frames} frames, expected {task.frames_out}")
        done = 0
        for block in audio_io.read_blocks(task.source, block_frames=block_frames):
            if check is not None:
                check(block)
            dry = _dry(block, task)
            wet = wet_file.read(dry.shape[0], dtype="float64", always_2d=True)
            done += dry.shape[0]
            yield dry, wet
        while done < task.frames_out:
            n = min(block_frames, task.frames_out - done)
            wet = wet_file.read(n, dtype="float64", always_2d=True)
            yield np.zeros((n, task.channels_out)), wet
            done += n


class _Meter:
    """Loudness and true peak of one signal, block by block."""

    def __init__(self, rate_hz, channels):
        self.loud = loudness.meter_init(rate_hz=rate_hz, channels=channels)
        self.peak = truepeak.truepeak_init(rate_hz=rate_hz, channels=channels)

    def update(self, block):
        self.loud = loudness.meter_update(block, self.loud)
        self.peak = truepeak.truepeak_update(block, self.peak)

    def result(self):
        lr = loudness.meter_result(self.loud)
        tp = truepeak.truepeak_result(self.peak)
        return {
            "integrated_lufs": _round(lr.integrated_lufs),
            "momentary_max_lufs": _round(lr.momentary_max_lufs),
            "short_term_max_lufs": _round(lr.short_term_max_lufs),
            "loudness_range_lu": _round(lr.loudness_range_lu),
            "true_peak_dbtp": _round(tp.true_peak_dbtp),
            "sample_peak_dbfs": _round(tp.sample_peak_dbfs),
            "reason": lr.reason,
        }

    def hops(self):
        """Per-100 ms weighted energies (for group loudness), as a list."""
        return self.loud.hop_energies().tolist()


def _unlink(path):
    try:
        os.unlink(path)
    except OSError:
        pass


def _round(value, digits=4):
    return None if value is None else round(float(value), digits)


def measure_task(task, *, output_dir):
    """First pass of a two-pass render: convolve, meter the mix, keep the wet signal.

    Returns
    -------
    dict
        ``before`` (the mix's loudness and true peak at unit gain), ``hops``
        (per-100 ms weighted energies, for group loudness) and ``hop_frames``.
    """
    temp = temp_path_for(task, output_dir)
    temp.parent.mkdir(parents=True, exist_ok=True)
    meter = _Meter(task.info.rate_hz, task.channels_out)
    container = audio_io.wav_container(frames=task.frames_out, channels=task.channels_out, subtype="DOUBLE")
    with audio_io.BlockWriter(temp, rate_hz=task.info.rate_hz, channels=task.channels_out, format=container,
                              subtype="DOUBLE", durable=False) as w:
        for dry, wet in _convolved(task, output_dir, _SourceCheck(task)):
            meter.update(dry + wet)
            w.write(wet)
    return {"before": meter.result(), "hops": meter.hops(), "hop_frames": meter.loud.hop_frames}


def _source_metadata(task):
    if task.info.format not in ("WAV", "RF64"):
        return None, ()
    try:
        meta = riff.read_metadata(task.source)
    except AudioInputError as e:
        return None, (f"broadcast metadata not carried over: {e}",)
    if task.format not in ("WAV", "RF64"):
        found = [n for n, v in (("bext", meta.bext), ("iXML", meta.ixml)) if v is not None]
        return None, ((f"source's {' and '.join(found)} not carried over: {task.format} output has no place "
                       "for them",) if found else ())
    return meta, meta.notes


def _carry_metadata(task, path, meta, *, stem, after):
    chunks = []
    if meta.bext is not None:
        bits = {"PCM_16": 16, "PCM_24": 24, "PCM_32": 32, "FLOAT": 32, "DOUBLE": 64}.get(task.subtype, 24)
        line = riff.coding_history_line(
            rate_hz=int(task.info.rate_hz), bits=bits, channels=task.channels_out,
            text=f"render {__version__} {stem} stem, room {task.room_name}",
        )
        history = meta.bext.coding_history
        if history and not history.endswith("\r\n"):
            history += "\r\n"
        fields = {"coding_history": history + line, "version": max(2, meta.bext.version)}
        # Loudness fields describe the file itself: only the mix is metered, so the dry and wet
        # stems say "not set" rather than repeat the source's figures.
        fields.update(loudness_value_lufs=None, loudness_range_lu=None, max_true_peak_level_dbtp=None,
                      max_momentary_loudness_lufs=None, max_short_term_loudness_lufs=None)
        if stem == "mix" and after is not None:
            fields.update(
                loudness_value_lufs=after["integrated_lufs"],
                loudness_range_lu=after["loudness_range_lu"],
                max_true_peak_level_dbtp=after["true_peak_dbtp"],
                max_momentary_loudness_lufs=after["momentary_max_lufs"],
                max_short_term_loudness_lufs=after["short_term_max_lufs"],
            )
        chunks.append(("bext", dataclasses.replace(meta.bext, **fields).to_bytes()))
    if meta.ixml is not None:
        chunks.append(("iXML", meta.ixml))
    if chunks:
        riff.insert_chunks(path, chunks)


#: With a target and the limiter, limiting takes loudness off the mix.  Before anything is
#: written, probes (limiter and loudness meter only, nothing written) find the gain at which the
#: limited mix reads within MAKEUP_PROBE_LU of the target (at most MAKEUP_PROBES probes, secant
#: steps); the written mix is checked again and, should it still miss by more than
#: MAKEUP_TOLERANCE_LU, written again with the difference added (at most MAKEUP_PASSES writes).
MAKEUP_TOLERANCE_LU = 0.05
MAKEUP_PROBE_LU = 0.02
MAKEUP_PROBES = 4
MAKEUP_PASSES = 3


#: A mix of at most this many bytes, held as float32, stays in memory across the make-up probes; a
#: longer one is read again from the source and the temporary for each probe (our choice: short
#: takes, such as dialogue lines, are the common case; 32 MiB is 2.9 min of 48 kHz stereo).  The
#: probes only aim the gain, so float32's 1e-7 relative rounding is immaterial: the written mix is
#: computed and metered in float64.
PROBE_IN_MEMORY_BYTES = 32 * 2**20


def _probe_lufs(blocks, *, gain, limit, rate_hz, channels):
    """Integrated loudness of the limited mix at linear ``gain`` (no dither, nothing written).

    ``blocks`` yields the unit-gain mix (float64).  The limiter sees the mix
    times the gain, what the writing pass gives it up to rounding (that pass
    scales dry and wet apart, in float64), so its gain curve and the reading
    agree with the written mix to far below the make-up tolerance; the meter
    reads before dither.
    """
    lim = limiter.limiter_init(rate_hz=rate_hz, channels=channels, ceiling_dbtp=limit)
    loud = loudness.meter_init(rate_hz=rate_hz, channels=channels)
    pending = _Queue(channels)
    for mix in blocks:
        if gain != 1.0:
            mix = mix * gain
        pending.push(mix)
        g, lim = limiter.limiter_update(mix, lim)
        if g.shape[0]:
            loud = loudness.meter_update(pending.pop(g.shape[0]) * g[:, None], loud)
    g, lim = limiter.limiter_flush(lim)
    if g.shape[0]:
        loud = loudness.meter_update(pending.pop(g.shape[0]) * g[:, None], loud)
    return loudness.meter_result(loud).integrated_lufs


def makeup_gain_db(task, temp, *, gain_db, limit, target_lufs, block_frames):
    """The gain, dB, at which the limited mix reads ``target_lufs`` (within :data:`MAKEUP_PROBE_LU`).

    Starts from ``gain_db`` (target minus the unlimited mix's loudness) and
    probes: each probe runs the limiter and the loudness meter over the whole
    mix at one gain.  The first step adds the shortfall; later steps are
    secant steps through the last two probes (limiting takes more loudness
    off as the gain rises, so the slope is at most 1).  The unit-gain mix is
    held in memory (float32) between probes when it takes at most
    :data:`PROBE_IN_MEMORY_BYTES`.

    Returns
    -------
    gain_db : float
        The probed gain whose reading is closest to the target.
    probes : int
        Probes run, 1 .. :data:`MAKEUP_PROBES`.
    """
    held = None
    if task.frames_out * task.channels_out * 4 <= PROBE_IN_MEMORY_BYTES:
        held = np.empty((task.frames_out, task.channels_out), dtype=np.float32)
        at = 0
        for dry, wet in _from_temporary(task, temp, block_frames=block_frames):
            if at + dry.shape[0] > held.shape[0]:
                raise AudioInputError(f"{task.key}: the source now has more frames than when it was planned "
                                      f"({task.frames_out} in the output): expected the planned file")
            np.add(dry, wet, out=held[at : at + dry.shape[0]])
            at += dry.shape[0]

    def blocks():
        if held is not None:
            return (held[i : i + block_frames].astype(np.float64) for i in range(0, held.shape[0], block_frames))
        return (dry + wet for dry, wet in _from_temporary(task, temp, block_frames=block_frames))

    tried = []
    trial = float(gain_db)
    for probe in range(1, MAKEUP_PROBES + 1):
        lufs = _probe_lufs(blocks(), gain=db_to_gain(trial), limit=limit, rate_hz=task.info.rate_hz,
                           channels=task.channels_out)
        if lufs is None:  # nothing above the gates: no reading to aim with
            return trial, probe
        tried.append((trial, lufs))
        miss = target_lufs - lufs
        if abs(miss) <= MAKEUP_PROBE_LU:
            return trial, probe
        step = miss
        if len(tried) >= 2:
            (g0, l0), (g1, l1) = tried[-2], tried[-1]
            slope = (l1 - l0) / (g1 - g0) if g1 != g0 else 1.0
            step = miss / min(1.0, max(slope, 0.25))
        trial = trial + step
    best = min(tried, key=lambda t: abs(target_lufs - t[1]))
    return best[0], MAKEUP_PROBES


def render_task(task, *, output_dir, gain_db=0.0, limit=None, two_pass=False, target_lufs=None, _attempt=1):
    """Render one planned source and write its stems.

    Parameters
    ----------
    task : render.plan.Task
        A task without ``error``.
    output_dir : str or Path
        The job's output folder (``task.outputs`` are relative to it).
    gain_db : float
        Gain applied to every stem (the normalisation), dB.
    limit : float, optional
        Ceiling in dBTP for the true-peak limiter on the mix; None: no limiter.
    two_pass : bool
        Read the wet signal from :func:`measure_task`'s temporary instead of
        convolving again (the temporary is removed afterwards).
    target_lufs : float, optional
        With ``two_pass`` and ``limit``: limiting lowers loudness, so the gain
        is first raised by :func:`makeup_gain_db` (probes that write
        nothing); should the written mix still read more than
        :data:`MAKEUP_TOLERANCE_LU` off the target, it is rendered again with
        the difference added (at most :data:`MAKEUP_PASSES` writes).

    Returns
    -------
    dict
        Per stem ``path``, ``sha256``, ``frames``, ``peak_dbfs``,
        ``clipped_samples``; ``input_sha256``; ``after`` (loudness and true
        peak of the written mix); ``limiter_reduction_db``; ``gain_db``;
        ``notes``; ``passes`` (writes, 1 unless the make-up had to write
        again); ``probes`` (make-up probes); ``render_s``.
    """
    started = time.perf_counter()
    info = task.info
    out_ch = task.channels_out
    integer_output = task.subtype.startswith("PCM")
    stems = dict(task.outputs)
    gain = db_to_gain(gain_db)
    meta, notes = _source_metadata(task)
    notes = list(notes)
    temp = temp_path_for(task, output_dir)
    check = _SourceCheck(task)
    probes = 0
    if two_pass:
        block_frames = max(4096, stream_block_frames(task))
        if limit is not None and target_lufs is not None and _attempt == 1:
            try:
                gain_db, probes = makeup_gain_db(task, temp, gain_db=gain_db, limit=limit, target_lufs=target_lufs,
                                                 block_frames=block_frames)
            except BaseException:
                _unlink(temp)
                raise
            gain = db_to_gain(gain_db)
        stream = _from_temporary(task, temp, block_frames=block_frames, check=check)
    else:
        stream = _convolved(task, output_dir, check)
    for _, rel in task.outputs:
        (Path(output_dir) / rel).parent.mkdir(parents=True, exist_ok=True)
    tags = audio_io.read_tags(task.source)
    writers = {
        stem: audio_io.BlockWriter(
            Path(output_dir) / rel, rate_hz=info.rate_hz, channels=out_ch, format=task.format, subtype=task.subtype,
            tags=tags,
        )
        for stem, rel in task.outputs
    }
    clipped = {stem: 0 for stem in stems}
    peaks = {stem: 0.0 for stem in stems}
    meter = _Meter(info.rate_hz, out_ch)
    dithers = {}
    if integer_output:
        for stem in ("mix", "wet", "dry"):
            seed = dither.dither_seed(job_sha256=task.settings_sha256, source_key=task.key, stem=stem)
            dithers[stem] = dither.dither_init(seed, channels=out_ch)
    lim = limiter.limiter_init(rate_hz=info.rate_hz, channels=out_ch, ceiling_dbtp=limit) if limit is not None else None
    pending_dry, pending_wet = _Queue(out_ch), _Queue(out_ch)
    written = 0

    def quantise(stem, block):
        q, dithers[stem] = dither.dither_block(block, dithers[stem], subtype=task.subtype)
        return q

    def write(dry, wet):
        nonlocal written
        n = dry.shape[0]
        if n == 0:
            return
        if integer_output and "dry" in stems and "wet" in stems:
            dry, wet = quantise("dry", dry), quantise("wet", wet)
            mix = dry + wet
        elif integer_output:
            mix = quantise("mix", dry + wet)
            if "dry" in stems:
                dry = quantise("dry", dry)
            if "wet" in stems:
                wet = quantise("wet", wet)
        else:
            mix = dry + wet
        parts = {"dry": dry, "wet": wet, "mix": mix}
        metered = mix
        for stem, w in writers.items():
            block = parts[stem]
            peak = max(float(block.max()), -float(block.min()))
            peaks[stem] = max(peaks[stem], peak)
            if integer_output and peak > 1.0:
                clipped[stem] += int(np.count_nonzero(np.abs(block) > 1.0))
                block = np.clip(block, -1.0, 1.0)
                if stem == "mix":
                    metered = block
            w.write(block)
        if integer_output and "mix" not in writers and max(float(mix.max()), -float(mix.min())) > 1.0:
            metered = np.clip(mix, -1.0, 1.0)
        meter.update(metered)  # what the mix file holds: clipped where an integer format clips
        written += n

    def gained(g):
        curve = g[:, None]
        return pending_dry.pop(g.shape[0]) * curve, pending_wet.pop(g.shape[0]) * curve

    try:
        for dry, wet in stream:
            if gain != 1.0:
                dry, wet = dry * gain, wet * gain
            if lim is None:
                write(dry, wet)
                continue
            pending_dry.push(dry)
            pending_wet.push(wet)
            g, lim = limiter.limiter_update(dry + wet, lim)
            if g.shape[0]:
                write(*gained(g))
        if lim is not None:
            g, lim = limiter.limiter_flush(lim)
            if g.shape[0]:
                write(*gained(g))
        if written != task.frames_out:
            raise OutputError(f"{task.key}: wrote {written} frames, expected {task.frames_out}")
        after = meter.result()
        for w in writers.values():
            w.commit()
    except BaseException:
        for w in writers.values():
            w.abort()
        if two_pass:
            _unlink(temp)
        raise
    try:
        return _finish(task, output_dir, temp, meta, notes, check, after, lim, peaks, clipped, written,
                       gain_db=gain_db, limit=limit, two_pass=two_pass, target_lufs=target_lufs, probes=probes,
                       started=started, _attempt=_attempt)
    except KeyboardInterrupt:
        # Ctrl-C after the stems were committed but before the result reached the manifest: the
        # stems go, so nothing is on disk that the manifest does not list.
        for _, rel in task.outputs:
            _unlink(Path(output_dir) / rel)
        if two_pass:
            _unlink(temp)
        raise


def _finish(task, output_dir, temp, meta, notes, check, after, lim, peaks, clipped, written, *, gain_db, limit,
            two_pass, target_lufs, probes, started, _attempt):
    """After the stems are committed: a further make-up pass if needed, metadata, hashes, the result."""
    info = task.info
    if (
        two_pass
        and limit is not None
        and target_lufs is not None
        and after["integrated_lufs"] is not None
        and abs(after["integrated_lufs"] - target_lufs) > MAKEUP_TOLERANCE_LU
        and _attempt < MAKEUP_PASSES
    ):
        again = render_task(task, output_dir=output_dir, gain_db=gain_db + (target_lufs - after["integrated_lufs"]),
                            limit=limit, two_pass=True, target_lufs=target_lufs, _attempt=_attempt + 1)
        again["probes"] += probes
        return again
    if two_pass:
        _unlink(temp)
    if meta is not None:
        for stem, rel in task.outputs:
            _carry_metadata(task, Path(output_dir) / rel, meta, stem=stem, after=after)
    result = {"stems": {}, "input_sha256": audio_io.sha256_file(task.source)}
    for stem, rel in task.outputs:
        result["stems"][stem] = {
            "path": rel,
            "sha256": audio_io.sha256_file(Path(output_dir) / rel),
            "frames": written,
            "peak_dbfs": round(gain_to_db(peaks[stem]), 3),
            "clipped_samples": clipped[stem],
        }
    notes.extend(check.notes())
    if after["integrated_lufs"] is None and after["reason"]:
        notes.append(f"loudness {after['reason']}")
    if any(clipped.values()):
        notes.append("clipped: " + ", ".join(f"{s} {n} samples" for s, n in clipped.items() if n))
    if info.subtype in ("VORBIS", "OPUS", "MPEG_LAYER_III", "MPEG_LAYER_II") or info.format in ("OGG", "MP3", "MPEG"):
        notes.append("lossy source: the encoder's delay can shift the audio against the timeline")
    result["after"] = after
    result["gain_db"] = round(float(gain_db), 4)
    result["limiter_reduction_db"] = round(limiter.limiter_result(lim).max_reduction_db, 3) if lim is not None else 0.0
    result["metadata"] = {
        "bext": meta is not None and meta.bext is not None,
        "ixml": meta is not None and meta.ixml is not None,
    }
    result["notes"] = notes
    result["passes"] = _attempt
    result["probes"] = probes
    result["render_s"] = round(time.perf_counter() - started, 4)
    return result
