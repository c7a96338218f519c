"""TPDF dither and rounding to a PCM grid, seeded per output file, streaming.

Each sample gets the sum of two independent uniform values in [-0.5, 0.5)
LSB (a triangular density of ±1 LSB peak) before it is rounded to the
nearest multiple of the LSB.  With this dither the first two moments of the
total error (output - input) do not depend on the signal: mean 0, variance
LSB²/12 from the rounding plus LSB²/6 from the dither, LSB²/4 in all
(Lipshitz, Wannamaker & Vanderkooy, JAES 40(5), 1992).

The result is clipped to ``[-1, 1 - LSB]`` and returned as float64 values
that are exact multiples of the LSB, so soundfile's conversion to integers is
exact: libsndfile truncates toward minus infinity on 8/16/24-bit output,
which is harmless for values already on the grid.

Random numbers.  The bit generator is PCG64 (named explicitly, not numpy's
default, which could change).  Each sample consumes exactly one raw 64-bit
output, in frame-major order (frame 0 channel 0, frame 0 channel 1, ...):
bits 8..31 and bits 40..63 are the two uniform 24-bit integers.  So any split
of the stream into blocks gives bit-identical output, and the numbers depend
only on the bit stream, which numpy keeps stable across versions and
platforms (NEP 19), not on a distribution method.  Measured here (numpy
2.4), one raw output costs about as much as one ``Generator.random`` value
(~3.4 ns against ~3.5 ns in float32 and ~4.4 ns in float64) and yields both
uniforms, so the stable stream costs nothing; it is about a third of
:func:`dither_block`'s ~12 ns per sample, the rest being the arithmetic on
pieces that stay in cache.

Seeds.  :func:`dither_seed` hashes the job, the source and the stem, so each
output file has its own reproducible noise, on any machine and in any worker
process (nothing depends on Python's per-process string hashing).

>>> import numpy as np
>>> state = dither_init(dither_seed(job_sha256="0" * 64, source_key="a.wav", stem="wet"), channels=1)
>>> y, state = dither_block(np.full((4, 1), 0.25 + 1e-7), state, subtype="PCM_16")
>>> bool(np.all(y * 2**15 == np.round(y * 2**15))), state.frames
(True, 4)
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any, Dict

import numpy as np

from .errors import ParameterError

__all__ = [
    "DitherState",
    "PCM_BITS",
    "dither_seed",
    "dither_init",
    "dither_block",
    "lsb_for",
]

#: Bits per sample of each PCM subtype that takes dither (soundfile's names).
PCM_BITS = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}
#: Floating-point subtypes: no dither (rounding to float32 is not a fixed grid).
_FLOAT_SUBTYPES = ("FLOAT", "DOUBLE")
#: Prefix of the hashed seed material, so these seeds differ from any other use of the same strings.
_SEED_DOMAIN = b"render.dither.v1"

_MASK24 = 0xFFFFFF
#: The sum of two 24-bit integers, scaled by 2**-24, minus 1: two uniforms in [-0.5, 0.5) added.
_UNIFORM_SCALE = 2.0**-24


def lsb_for(subtype):
    """Size of one least significant bit for a PCM subtype, full scale 1.0.

    >>> lsb_for("PCM_16") == 2.0**-15, lsb_for("PCM_24") == 2.0**-23
    (True, True)
    """
    key = subtype.upper() if isinstance(subtype, str) else subtype
    if key in _FLOAT_SUBTYPES:
        raise ParameterError(
            f"subtype = {subtype!r}: floating-point output takes no dither; expected one of {', '.join(PCM_BITS)}"
        )
    if key not in PCM_BITS:
        raise ParameterError(f"subtype = {subtype!r}: expected one of {', '.join(PCM_BITS)}")
    return 2.0 ** (1 - PCM_BITS[key])


def dither_seed(*, job_sha256, source_key, stem):
    """Seed for one output file's dither, derived from the job, the source and the stem.

    The entropy is the SHA-256 digest, read as a big-endian integer, of
    ``b"render.dither.v1"`` followed by each of the three strings as UTF-8,
    each preceded by its byte length as 8 big-endian bytes (so no two
    different triples give the same bytes).

    Parameters
    ----------
    job_sha256 : str
        The job's hash, 64 hexadecimal digits (case-insensitive).
    source_key : str
        A stable name of the source, e.g. its path relative to the job.
    stem : str
        The stem's name, e.g. ``'wet'``.

    Returns
    -------
    numpy.random.SeedSequence

    >>> a = dither_seed(job_sha256="ab" * 32, source_key="x.wav", stem="wet")
    >>> b = dither_seed(job_sha256="ab" * 32, source_key="x.wav", stem="dry")
    >>> a.entropy == dither_seed(job_sha256="AB" * 32, source_key="x.wav", stem="wet").entropy, a.entropy == b.entropy
    (True, False)
    """
    if not isinstance(job_sha256, str) or len(job_sha256) != 64 or any(
        ch not in "0123456789abcdefABCDEF" for ch in job_sha256
    ):
        raise ParameterError(f"job_sha256 = {job_sha256!r}: expected 64 hexadecimal digits")
    digest = hashlib.sha256(_SEED_DOMAIN)
    for name, value in (("job_sha256", job_sha256.lower()), ("source_key", source_key), ("stem", stem)):
        if not isinstance(value, str):
            raise ParameterError(f"{name} is a {type(value).__name__}: expected a str")
        data = value.encode("utf-8")
        digest.update(len(data).to_bytes(8, "big"))
        digest.update(data)
    return np.random.SeedSequence(int.from_bytes(digest.digest(), "big"))


@dataclass(frozen=True)
class DitherState:
    """What the ditherer remembers between blocks (treat as immutable; picklable).

    Attributes
    ----------
    bit_generator_state : dict
        ``numpy.random.PCG64().state`` after the last block.
    channels : int
    frames : int
        Frames processed so far.
    clipped_samples : int
        Samples (frames x channels) clipped to the grid's range so far.
    """

    bit_generator_state: Dict[str, Any]
    channels: int
    frames: int
    clipped_samples: int


def dither_init(seed_sequence, *, channels):
    """Ditherer state that has processed nothing yet.

    Parameters
    ----------
    seed_sequence : numpy.random.SeedSequence
        Usually from :func:`dither_seed`.
    channels : int
        ``>= 1``.

    Returns
    -------
    DitherState
    """
    if not isinstance(seed_sequence, np.random.SeedSequence):
        raise ParameterError(
            f"seed_sequence is a {type(seed_sequence).__name__}: expected a numpy.random.SeedSequence (dither_seed)"
        )
    if isinstance(channels, bool) or not isinstance(channels, (int, np.integer)) or channels < 1:
        raise ParameterError(f"channels = {channels!r}: must be an integer >= 1")
    return DitherState(
        bit_generator_state=np.random.PCG64(seed_sequence).state, channels=int(channels), frames=0, clipped_samples=0
    )


#: Samples per piece of a block: the raw bits, the noise and the rounded
#: levels of a piece stay in cache between the passes over them.
_CHUNK_SAMPLES = 1 << 15


def _tpdf(bit_generator, count, scratch=None):
    """``count`` TPDF values in LSB, in [-1, 1), from ``count`` raw 64-bit outputs.

    ``scratch`` is an optional triple (uint64, uint64, float64) of flat arrays
    of at least ``count`` values, reused instead of fresh temporaries; the
    result is then a view of the third.
    """
    raw = bit_generator.random_raw(count)  # uint64
    if scratch is None:
        high, low, noise = np.empty(count, np.uint64), np.empty(count, np.uint64), np.empty(count)
    else:
        high, low, noise = (a[:count] for a in scratch)
    np.right_shift(raw, 40, out=high)  # bits 40..63: the top 24 bits, nothing to mask
    np.right_shift(raw, 8, out=low)
    low &= _MASK24  # bits 8..31
    high += low
    # The sum is below 2**25: int64 converts to float exactly (and faster than uint64),
    # and the scaling by 2**-24 and the subtraction of 1 are exact too.
    np.multiply(high.view(np.int64), _UNIFORM_SCALE, out=noise)
    noise -= 1.0
    return noise


def dither_block(block, state, *, subtype):
    """Add TPDF dither, round to the PCM grid of ``subtype``, clip to its range.

    Parameters
    ----------
    block : ndarray, shape (frames, channels)
        Floating-point samples, full scale 1.0, finite; any number of frames.
    state : DitherState
    subtype : {'PCM_16', 'PCM_24', 'PCM_32', 'PCM_S8', 'PCM_U8'}
        soundfile's name of the output's sample format (any case).
        ``'FLOAT'`` and ``'DOUBLE'`` raise :class:`ParameterError`: float
        output takes no dither, so the caller skips this step for it rather
        than have an argument silently ignored.

    Returns
    -------
    quantised : ndarray, shape (frames, channels), float64
        Exact multiples of the LSB (``2**-15`` for PCM_16, ``2**-23`` for
        PCM_24), within ``[-1, 1 - LSB]``.
    new_state : DitherState
        The old state stays valid.  ``clipped_samples`` counts every sample
        whose rounded value fell outside that range.

    Notes
    -----
    The block is processed in pieces of about 32 768 samples, in frame-major
    order, so the noise is the same as for the whole block at once.  Per
    piece: the noise, ``rint(x / LSB + noise)`` written into the output, its
    minimum and maximum, then the scaling by the LSB.  Only a piece whose
    extremes leave the grid's range (or are NaN) takes the slow path: the
    finiteness check on its samples, the count of clipped samples and the clip.
    A NaN or infinite sample always lands there, since it makes its rounded
    level NaN or infinite.
    """
    if not isinstance(state, DitherState):
        raise ParameterError(f"state is a {type(state).__name__}: expected a DitherState from dither_init")
    lsb = lsb_for(subtype)
    if not isinstance(block, np.ndarray):
        raise ParameterError(f"block is a {type(block).__name__}: expected a numpy array of shape (frames, channels)")
    if block.ndim != 2:
        raise ParameterError(f"block.ndim = {block.ndim}: expected a 2-D (frames, channels) array; mono is (n, 1)")
    if block.shape[1] != state.channels:
        raise ParameterError(f"block has {block.shape[1]} channels: expected {state.channels}")
    if not np.issubdtype(block.dtype, np.floating):
        raise ParameterError(f"block.dtype = {block.dtype}: expected floating-point samples (full scale 1.0)")
    frames, channels = block.shape

    bit_generator = np.random.PCG64()
    bit_generator.state = state.bit_generator_state
    steps = 1.0 / lsb  # a power of two: scaling is exact
    low, high = -steps, steps - 1.0
    quantised = np.empty((frames, channels))
    rows = max(1, _CHUNK_SAMPLES // channels)
    size = min(rows, frames) * channels
    scratch = (np.empty(size, np.uint64), np.empty(size, np.uint64), np.empty(size))
    clipped = 0
    for start in range(0, frames, rows):
        stop = min(start + rows, frames)
        part = block[start:stop]
        levels = quantised[start:stop]
        noise = _tpdf(bit_generator, (stop - start) * channels, scratch)
        np.multiply(part, steps, out=levels, dtype=np.float64)
        levels += noise.reshape(stop - start, channels)
        np.rint(levels, out=levels)
        if not (low <= levels.min() and levels.max() <= high):  # also taken for NaN
            if not np.isfinite(part).all():
                raise ParameterError("block contains NaN or infinite samples: expected finite values")
            clipped += int(np.count_nonzero(levels < low) + np.count_nonzero(levels > high))
            np.clip(levels, low, high, out=levels)
        levels *= lsb
    return quantised, DitherState(
        bit_generator_state=bit_generator.state,
        channels=state.channels,
        frames=state.frames + frames,
        clipped_samples=state.clipped_samples + clipped,
    )
