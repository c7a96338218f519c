"""Early reflections of a shoebox room by the image-source method.

Allen & Berkley, "Image method for efficiently simulating small-room
acoustics", JASA 65(4), 943–950, 1979: every wall reflection is replaced by a
mirror image of the source; an image reached through ``n`` reflections arrives
after ``d / c`` seconds with amplitude ``β^n / d`` (relative to ``1/d`` spreading),
where ``β = sqrt(1 - α)`` is the walls' pressure reflection coefficient.

Pure functions, no I/O.

>>> images = image_sources(size_m=(4.0, 3.0, 2.5), source_m=(1.0, 1.0, 1.2),
...                        listener_m=(3.0, 1.5, 1.2), max_order=1)
>>> len(images.orders), int(images.orders.min()), int(images.orders.max())
(6, 1, 1)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import ParameterError

__all__ = ["ImageSet", "image_sources", "fractional_delay_taps", "reflection_coefficient"]

#: Half-length of the windowed-sinc fractional delay, in taps on each side.
SINC_HALF_TAPS = 16


@dataclass(frozen=True)
class ImageSet:
    """Image sources of one source/listener pair (the direct path excluded).

    Attributes
    ----------
    distances_m : ndarray, shape (n,)
        Image-to-listener distance in metres.
    orders : ndarray of int, shape (n,)
        Number of wall reflections of each image.
    direct_m : float
        Source-to-listener distance in metres.
    """

    distances_m: np.ndarray
    orders: np.ndarray
    direct_m: float


def _axis_images(n_max, length, src):
    # Image coordinate for index n along one axis, and its reflection count |n|.
    n = np.arange(-n_max, n_max + 1)
    coord = np.where(n % 2 == 0, n * length + src, (n + 1) * length - src)
    return n, coord


def image_sources(*, size_m, source_m, listener_m, max_order, max_distance_m=None):
    """All image sources up to ``max_order`` reflections (and optionally a distance).

    Parameters
    ----------
    size_m : (float, float, float)
        Room length, width, height in metres.
    source_m, listener_m : (float, float, float)
        Positions inside the room, metres from the corner.
    max_order : int
        Largest number of reflections, 0 to 30.
    max_distance_m : float, optional
        Leave out images farther than this from the listener.
    """
    if not (isinstance(max_order, int) and 0 <= max_order <= 30):
        raise ParameterError(f"max_order = {max_order!r}: must be a whole number from 0 to 30")
    axes = [_axis_images(max_order, size_m[i], source_m[i]) for i in range(3)]
    (nx, x), (ny, y), (nz, z) = axes
    ox, oy, oz = np.meshgrid(np.abs(nx), np.abs(ny), np.abs(nz), indexing="ij")
    px, py, pz = np.meshgrid(x, y, z, indexing="ij")
    orders = (ox + oy + oz).ravel()
    dist = np.sqrt(
        (px.ravel() - listener_m[0]) ** 2 + (py.ravel() - listener_m[1]) ** 2 + (pz.ravel() - listener_m[2]) ** 2
    )
    keep = (orders >= 1) & (orders <= max_order)
    if max_distance_m is not None:
        keep &= dist <= max_distance_m
    order_idx = np.argsort(dist[keep], kind="stable")
    return ImageSet(
        distances_m=dist[keep][order_idx],
        orders=orders[keep][order_idx].astype(np.int64),
        direct_m=float(math.dist(source_m, listener_m)),
    )


def reflection_coefficient(absorption):
    """Pressure reflection coefficient ``β = sqrt(1 - α)`` for absorption α in [0, 1]."""
    a = np.asarray(absorption, dtype=float)
    if np.any((a < 0) | (a > 1)):
        raise ParameterError(f"absorption = {absorption!r}: must be from 0 to 1")
    return np.sqrt(1.0 - a)


def fractional_delay_taps(delays_frames, amplitudes, *, frames):
    """Sum of band-limited impulses at fractional positions (Blackman-windowed sinc).

    Parameters
    ----------
    delays_frames : ndarray, shape (n,)
        Positions in frames (fractional), ≥ 0.
    amplitudes : ndarray, shape (n,)
        Amplitude of each impulse.
    frames : int
        Length of the output; impulses whose taps fall outside are cut.

    Returns
    -------
    ndarray, shape (frames,)
    """
    out = np.zeros(frames)
    d = np.asarray(delays_frames, dtype=float)
    if d.size == 0:
        return out
    base = np.floor(d).astype(np.int64)
    offsets = np.arange(-SINC_HALF_TAPS + 1, SINC_HALF_TAPS + 1)
    idx = base[:, None] + offsets[None, :]
    x = idx - d[:, None]  # distance of each tap from the impulse, in frames
    window = 0.42 + 0.5 * np.cos(np.pi * x / SINC_HALF_TAPS) + 0.08 * np.cos(2 * np.pi * x / SINC_HALF_TAPS)
    window[np.abs(x) >= SINC_HALF_TAPS] = 0.0
    taps = np.sinc(x) * window * np.asarray(amplitudes, dtype=float)[:, None]
    ok = (idx >= 0) & (idx < frames)
    np.add.at(out, idx[ok], taps[ok])
    return out
