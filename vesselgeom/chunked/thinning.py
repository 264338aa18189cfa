"""Per-chunk work on a lazily read mask: the depth survey, and thinning with a halo keeping core voxels.

The volume is cut into cubic chunks (the *core* of each task). Every task reads its core plus a *halo* of
voxels on every side, so thinning near the core's faces sees the vessel as it continues across the seam,
and keeps only the skeleton voxels of its core. Thinning (Lee, Kashyap and Chu 1994, as in
:func:`vesselgeom.skeleton.thin`) peels the object layer by layer in raster order, so what a cut at the
halo's edge changes stays within a few vessel depths of it: with a halo of
:data:`HALO_DEPTHS` times the largest depth the core's skeleton is the whole volume's, voxel for voxel, on
every network we measured (``tests/chunked``). Parts of the box outside the image are background, as the
in-memory pipeline pads each component with background.

Memory: a task holds a few bytes per voxel of its box (:data:`BYTES_PER_VOXEL`), never the volume.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from vesselgeom import labelling
from vesselgeom.chunked.allocator import prefer_mmap
from vesselgeom.chunked.sources import LazyVolume
from vesselgeom.radius import BoundaryDistance
from vesselgeom.skeleton import thin

__all__ = [
    "HALO_DEPTHS",
    "BYTES_PER_VOXEL",
    "Survey",
    "CoreSkeleton",
    "chunk_boxes",
    "survey_chunk",
    "thin_chunk",
    "default_halo",
    "task_bytes_per_voxel",
]

#: Default halo, in multiples of the largest depth (city-block distance to background, in voxels) found
#: by the survey. On a 128^3 network a halo of one depth left 2 of 862 skeleton voxels different from
#: thinning the whole volume at once, two depths the same, three depths none (``tests/chunked``).
HALO_DEPTHS = 3

#: Peak bytes a thinning task holds per voxel of its box beyond the raw image values (mask, filled mask,
#: thinning's padded copy, 26-connected labels as int32, the boundary search), measured with tracemalloc
#: on boxes of a network; the raw values add twice their item size (the box and the decoded storage
#: chunks). Used to check a memory budget: see :func:`task_bytes_per_voxel`.
BYTES_PER_VOXEL = 12


def task_bytes_per_voxel(itemsize: int) -> int:
    """Estimated peak bytes per box voxel of a thinning task on an image of ``itemsize`` bytes."""
    return BYTES_PER_VOXEL + 2 * int(itemsize)


_FULL = np.ones((3, 3, 3), dtype=bool)
_CROSS = ndimage.generate_binary_structure(3, 1)


def chunk_boxes(shape: tuple[int, int, int], chunk_size: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """The chunk cores ``[lo, hi)`` (index space) tiling ``shape``, in raster order of their corners."""
    counts = [-(-int(s) // chunk_size) for s in shape]
    out = []
    for idx in np.ndindex(*counts):
        lo = np.array(idx) * chunk_size
        out.append((lo, np.minimum(lo + chunk_size, shape)))
    return out


def default_halo(depth: int) -> int:
    """The halo (voxels) for a largest depth of ``depth`` voxels: ``HALO_DEPTHS * depth``, at least 2."""
    return max(HALO_DEPTHS * int(depth), 2)


@dataclass(frozen=True)
class Survey:
    """What the cheap first pass learns about one chunk.

    ``depth`` is the largest city-block distance (voxels) from a core foreground voxel to the background;
    it bounds the Euclidean radius in voxels from above. ``saturated``: the depth reached the probe
    margin, so it may be larger (the caller repeats with a wider probe).
    """

    foreground: int
    depth: int
    saturated: bool


def _read(vol: LazyVolume, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The mask of ``[lo, hi)``, clipped to one background voxel beyond the image; returns (mask, lo)."""
    a = np.maximum(lo, -1)
    b = np.minimum(hi, np.asarray(vol.shape) + 1)
    return vol.read_box(a, b), a


def survey_chunk(vol: LazyVolume, lo: np.ndarray, hi: np.ndarray, *, probe: int, fill_holes: bool) -> Survey:
    """Foreground count and largest depth of one chunk core, read with ``probe`` voxels of margin.

    The depth is counted by repeated 6-connected erosion (each removes the voxels at city-block distance
    1 from the background), which needs only boolean arrays. Depths up to ``probe`` are exact: the box's
    edge is farther than that from every core voxel.
    """
    prefer_mmap()  # also in worker processes of a distributed cluster
    lo, hi = np.asarray(lo), np.asarray(hi)
    m, blo = _read(vol, lo - probe, hi + probe)
    core = tuple(slice(int(a - o), int(b - o)) for a, b, o in zip(lo, hi, blo, strict=True))
    count = int(np.count_nonzero(m[core]))
    if count == 0:
        return Survey(0, 0, False)
    if fill_holes:
        m = labelling.fill_holes(m)
    depth = 0
    while depth <= probe and m[core].any():
        m = ndimage.binary_erosion(m, _CROSS, border_value=0)
        depth += 1
    return Survey(count, depth, depth > probe)


@dataclass(frozen=True)
class CoreSkeleton:
    """The skeleton voxels of one chunk core.

    Attributes
    ----------
    coords : (n, 3) int32 array
        Global voxel indices.
    radius : (n,) float32 array, mm
        Distance from each voxel centre to the nearest background voxel centre.
    at_edge : (n,) bool array
        The voxel's connected component (within the task's box) touches the edge of the image.
    """

    coords: np.ndarray
    radius: np.ndarray
    at_edge: np.ndarray

    @staticmethod
    def empty() -> CoreSkeleton:
        return CoreSkeleton(np.zeros((0, 3), np.int32), np.zeros(0, np.float32), np.zeros(0, bool))


def thin_chunk(
    vol: LazyVolume,
    lo: np.ndarray,
    hi: np.ndarray,
    *,
    halo: int,
    min_voxels: float,
    fill_holes: bool,
) -> CoreSkeleton:
    """Thin one chunk with its halo and keep the skeleton voxels of its core.

    Components that lie wholly inside the box are dropped when smaller than ``min_voxels`` (as the
    in-memory pipeline drops them); a component reaching the box's edge is larger than the box can show
    and is kept.
    """
    prefer_mmap()  # also in worker processes of a distributed cluster
    lo, hi = np.asarray(lo), np.asarray(hi)
    m, blo = _read(vol, lo - halo, hi + halo)
    core = tuple(slice(int(a - o), int(b - o)) for a, b, o in zip(lo, hi, blo, strict=True))
    if not m[core].any():
        return CoreSkeleton.empty()
    if fill_holes:
        m = labelling.fill_holes(m)
    skel = thin(m)
    local = np.argwhere(skel[core]) + (lo - blo)
    del skel
    if not len(local):
        return CoreSkeleton.empty()
    labels, _ = ndimage.label(m, structure=_FULL)
    lab = labels[tuple(local.T)]
    ids = np.unique(lab)
    shape = np.asarray(vol.shape)
    keep = np.ones(len(local), bool)
    edge = np.zeros(len(local), bool)
    boxes = ndimage.find_objects(labels)
    counts = np.bincount(labels.ravel())
    for i in ids.tolist():
        box = boxes[i - 1]
        start = np.array([s.start for s in box]) + blo
        stop = np.array([s.stop for s in box]) + blo
        reaches_box = np.any(start == blo) or np.any(stop == blo + np.asarray(m.shape))
        on_edge = bool(np.any(start <= 0) or np.any(stop >= shape))
        sel = lab == i
        if not reaches_box and counts[i] < min_voxels:
            keep &= ~sel
        edge |= sel & on_edge
    del labels
    local, edge = local[keep], edge[keep]
    if not len(local):
        return CoreSkeleton.empty()
    aff = vol.affine.copy()
    aff[:3, 3] = vol.affine[:3, :3] @ blo + vol.affine[:3, 3]
    radius = BoundaryDistance(m, aff).at_index(local).astype(np.float32)
    return CoreSkeleton((local + blo).astype(np.int32), radius, edge)
