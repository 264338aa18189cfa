"""Sub-voxel recentring: centroid of the mask's cross-section in the plane normal to the tangent.

Skeleton voxels sit up to half a voxel off the true axis, with correlated errors, which ruins curvature
estimates. Averaging the mask over the whole cross-section (trilinear interpolation of the mask on a disc
of sample points normal to the current tangent) moves each centreline point onto the centre of the
vessel's section to a small fraction of a voxel. Sampling is done for many points of many branches at
once, in chunks shared among a few threads (scipy's interpolation releases the GIL); every point's result
is the same whatever the chunks and threads.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from typing import TypeVar

import numpy as np
from scipy import ndimage

__all__ = ["CrossSection", "normal_basis", "single_threaded"]

# threads for the heavy calls that release the GIL (mask sampling here, k-d tree queries in radius.py):
# the usable cores, at most 4 (callers that already run one process per core may set this to 1)
_THREADS = max(1, min(4, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else 1))

_PARALLEL_SAMPLES = 50_000  # fewer mask samples are not worth starting threads

_T = TypeVar("_T")
_R = TypeVar("_R")


_local = threading.local()


def _threads() -> int:
    """Threads this thread may use: ``_THREADS``, or 1 inside :func:`single_threaded`."""
    return getattr(_local, "threads", None) or _THREADS


@contextmanager
def single_threaded() -> Iterator[None]:
    """Within this block, on the calling thread, sampling and radius queries use no extra threads.

    For code that is itself one of many parallel tasks (chunked tracing on Dask), where extra threads
    per task would oversubscribe the cores. Results do not depend on the thread count.
    """
    before = getattr(_local, "threads", None)
    _local.threads = 1
    try:
        yield
    finally:
        _local.threads = before


def _parallel_map(fn: Callable[[_T], _R], items: Iterable[_T]) -> list[_R]:
    """``[fn(x) for x in items]``, on ``_THREADS`` threads when there is more than one item."""
    items = list(items)
    if len(items) < 2 or _threads() < 2:
        return [fn(x) for x in items]
    with ThreadPoolExecutor(max_workers=_threads()) as pool:
        return list(pool.map(fn, items))


def normal_basis(tangents: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Two unit vectors spanning the plane normal to each (n, 3) unit tangent."""
    t = np.asarray(tangents, float)
    helper = np.where(np.abs(t[:, [0]]) < 0.9, [[1.0, 0.0, 0.0]], [[0.0, 1.0, 0.0]])
    e1 = np.cross(t, helper)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(t, e1)
    return e1, e2


def _rows_times(points: np.ndarray, lin: np.ndarray) -> np.ndarray:
    """``points @ lin.T`` for (n, 3) rows, each row's result independent of the other rows.

    A BLAS matrix product may round a row differently depending on where it sits in the block, which
    would make a point's result depend on which other points share its batch.
    """
    return points[:, :1] * lin[:, 0] + points[:, 1:2] * lin[:, 1] + points[:, 2:3] * lin[:, 2]


def _disc_grid(samples_per_side: int) -> tuple[np.ndarray, np.float64]:
    """Square grid of ``samples_per_side`` points per side on [-1, 1]^2, kept within the unit disc.

    Returns the points (m, 2) and the area of one grid cell (in units of the disc radius squared).
    """
    g = np.linspace(-1.0, 1.0, samples_per_side)
    a, b = np.meshgrid(g, g, indexing="ij")
    keep = a**2 + b**2 <= 1.0
    return np.stack([a[keep], b[keep]], axis=1), np.float64(
        (g[1] - g[0]) ** 2
    )  # float64 (not float32 products)


class CrossSection:
    """Samples a mask on discs normal to a curve.

    Parameters
    ----------
    mask : 3D bool array
        Foreground of one component (with a background border).
    affine : (4, 4) float array
        Index -> world mm for this array.
    samples_per_side : int
        The disc is sampled on a square grid of this many points per side (points outside the disc are
        dropped). Default 17.
    """

    def __init__(self, mask: np.ndarray, affine: np.ndarray, *, samples_per_side: int = 17) -> None:
        # 0/1 bytes (a view, no copy, of a bool mask); interpolated in double, returned as float32
        m = np.asarray(mask)
        self._data = m.view(np.uint8) if m.dtype == bool else (m != 0).astype(np.uint8)
        self._affine = np.asarray(affine, float)
        self._inv = np.linalg.inv(self._affine)
        self._grid, self._cell = _disc_grid(samples_per_side)

    def sample(self, points_mm: np.ndarray) -> np.ndarray:
        """Trilinear mask values (0..1) at (..., 3) world points; 0 outside the array."""
        pts = np.asarray(points_mm, float)
        ijk = _rows_times(pts.reshape(-1, 3), self._inv[:3, :3]) + self._inv[:3, 3]
        out = np.empty(len(ijk), np.float32)
        parts = _threads() if len(ijk) >= _PARALLEL_SAMPLES else 1
        bounds = np.linspace(0, len(ijk), parts + 1).astype(int).tolist()

        def run(i: int) -> None:
            lo, hi = bounds[i], bounds[i + 1]
            ndimage.map_coordinates(
                self._data, ijk[lo:hi].T, order=1, mode="constant", cval=0.0, output=out[lo:hi]
            )

        _parallel_map(run, range(parts))
        return out.reshape(pts.shape[:-1])

    def centroids(
        self,
        centres: np.ndarray,
        tangents: np.ndarray,
        disc_radii: np.ndarray,
        *,
        chunk: int = 1024,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Cross-section centroids and equivalent-area radii.

        Parameters
        ----------
        centres : (n, 3) float array, mm
            Current centreline points.
        tangents : (n, 3) float array
            Unit tangents there.
        disc_radii : (n,) float array, mm
            Radius of the sampled disc; it should exceed the vessel radius.
        chunk : int
            Discs sampled at once (bounds the temporaries); chunks are shared among threads.

        Returns
        -------
        centroids : (n, 3) float array, mm
            Mask-weighted centroid of each disc (in its plane); the centre itself where the disc is empty.
        area_radius : (n,) float array, mm
            sqrt(area / pi) of the mask's section within the disc.

        Notes
        -----
        Disc points are built directly in index space (the affine is linear), and the weighted mean
        offset is rho (e1 sum(w a) + e2 sum(w b)) / sum(w) for grid coordinates (a, b). Every disc's
        result is independent of the others (and of the chunking and threads).
        """
        return self._centroids_on_grid(
            np.asarray(centres, float), tangents, np.asarray(disc_radii, float), self._grid, self._cell, chunk
        )

    def _centroids_on_grid(
        self,
        centres: np.ndarray,
        tangents: np.ndarray,
        radii: np.ndarray,
        grid: np.ndarray,
        cell: float,
        chunk: int,
    ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`centroids` with the disc sampled at ``grid`` (m, 2) points of cell area ``cell``."""
        out = centres.copy()
        area_r = np.zeros(len(centres))
        e1, e2 = normal_basis(tangents)
        lin = self._inv[:3, :3]
        c_ijk = _rows_times(centres, lin) + self._inv[:3, 3]
        e1_ijk, e2_ijk = _rows_times(e1, lin), _rows_times(e2, lin)
        ga, gb = grid[:, 0], grid[:, 1]
        n = len(centres)
        threads = _threads() if n * len(ga) >= _PARALLEL_SAMPLES else 1
        size = max(1, min(chunk, -(-n // threads)))
        starts = list(range(0, n, size))
        workers = min(threads, len(starts))
        # every thread's work arrays are made here: memory that threads allocate themselves stays
        # reserved for them (one malloc arena per thread), out of reach of the rest of the process
        bufs = [
            (np.empty((3, size, len(ga))), np.empty((size, len(ga))), np.empty((size, len(ga)), np.float32))
            for _ in range(workers)
        ]

        def run(worker: int) -> None:
            ijk_all, tmp_all, w_all = bufs[worker]
            for lo in starts[worker::workers]:
                sl = slice(lo, lo + size)
                rho = radii[sl, None]
                m = len(rho)
                ijk, tmp, w = ijk_all[:, :m], tmp_all[:m], w_all[:m]
                for d in range(3):  # c + rho (a e1 + b e2), in place
                    np.multiply(e1_ijk[sl, d, None], ga, out=ijk[d])
                    np.multiply(e2_ijk[sl, d, None], gb, out=tmp)
                    ijk[d] += tmp
                    ijk[d] *= rho
                    ijk[d] += c_ijk[sl, d, None]
                ndimage.map_coordinates(self._data, ijk, order=1, mode="constant", cval=0.0, output=w)
                wsum = w.sum(axis=1)  # float32, as the mask values
                np.copyto(tmp, w)  # the float64 copy that w @ ga would make
                # row by row (a BLAS product's rounding can depend on a row's place in the block)
                sa, sb = np.einsum("ij,j->i", tmp, ga), np.einsum("ij,j->i", tmp, gb)
                safe = np.where(wsum > 0, wsum, 1.0)
                r = rho[:, 0]
                shift = r[:, None] * (sa[:, None] * e1[sl] + sb[:, None] * e2[sl]) / safe[:, None]
                out[sl] = centres[sl] + shift
                area = wsum * cell * r**2
                area_r[sl] = np.sqrt(area / np.pi)

        _parallel_map(run, range(workers))
        return out, area_r
