"""Branch geometry in parallel tasks, each reading one sub-volume per group of nearby branches.

Every branch needs the box around its skeleton path plus a margin of :data:`MARGIN_RADII` times its
largest radius plus :data:`MARGIN_VOXELS` voxels: recentring samples discs of 1.5 radii plus a voxel, and
a terminal end is extended to where the mask ends, about a radius beyond the retracted skeleton.
:func:`group_branches` splits the branches into spatial groups whose boxes together fit in a box of at
most ``max_box_voxels`` (a branch whose own box is larger is a group alone). A task reads each group's
box once and labels its 26-connected pieces; the branches whose paths lie in the same pieces share one
mask (those pieces alone, holes filled: the in-memory pipeline traces each component on its own mask)
and are traced together by the in-memory pipeline's code (:func:`vesselgeom.centerline.trace_centerlines`
with :class:`~vesselgeom.crosssection.CrossSection` and :class:`~vesselgeom.radius.BoundaryDistance`),
which treats each branch of a batch independently of the others.

What a branch sees is therefore its component as far as it is connected within the group's box, which
holds the branch's own box: parts of the component that join it only outside the group's box are left
out, as are other components, and beyond the box's faces (at least the branch's margin away) there is
background. A task holds one group's box at a time: the mask, its int32 labels, and each mask's crop
with its background labels (int32) while holes are filled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from vesselgeom import labelling
from vesselgeom.centerline import BranchInput, Centerline, trace_centerlines
from vesselgeom.chunked.allocator import prefer_mmap
from vesselgeom.chunked.sources import LazyVolume
from vesselgeom.crosssection import CrossSection, single_threaded
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings

__all__ = [
    "MARGIN_RADII",
    "MARGIN_VOXELS",
    "BranchJob",
    "branch_box",
    "branch_boxes",
    "group_branches",
    "trace_group",
    "trace_groups",
]

#: Box margin around a branch's path, in its largest radius, plus a few voxels (see module docstring).
MARGIN_RADII = 4.0
MARGIN_VOXELS = 4

_FULL = np.ones((3, 3, 3), dtype=bool)


@dataclass(frozen=True)
class BranchJob:
    """One branch to trace: its path in global index space, its ends, and its largest radius (mm)."""

    path: np.ndarray
    closed: bool
    free_start: bool
    free_end: bool
    max_radius_mm: float


def branch_box(job: BranchJob, affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index box ``[lo, hi)`` a branch needs: its path's bounding box plus the margin."""
    lo, hi = branch_boxes([job], affine)
    return lo[0], hi[0]


def branch_boxes(jobs: list[BranchJob], affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index boxes ``[lo, hi)`` of many branches, two (n, 3) int arrays (see :func:`branch_box`)."""
    spacing = np.linalg.norm(np.asarray(affine)[:3, :3], axis=0)
    lo = np.zeros((len(jobs), 3), np.int64)
    hi = np.zeros((len(jobs), 3), np.int64)
    for i, job in enumerate(jobs):
        margin_mm = MARGIN_RADII * job.max_radius_mm + MARGIN_VOXELS * float(spacing.max())
        margin = np.ceil(margin_mm / spacing).astype(np.int64)
        lo[i] = np.floor(job.path.min(axis=0)).astype(np.int64) - margin
        hi[i] = np.ceil(job.path.max(axis=0)).astype(np.int64) + margin + 1
    return lo, hi


def group_branches(
    lo: np.ndarray, hi: np.ndarray, *, max_box_voxels: float, keys: np.ndarray | None = None
) -> list[np.ndarray]:
    """Split branches into spatial groups whose common box holds at most ``max_box_voxels`` voxels.

    Parameters
    ----------
    lo, hi : (n, 3) int arrays
        Each branch's box ``[lo, hi)`` in index space (:func:`branch_boxes`).
    max_box_voxels : float
        Largest volume (voxels) of a group's box; a branch whose own box is larger is a group alone.
    keys : (n,) int array, optional
        Branches with different keys are never grouped together (the component of each branch: a
        group's branches then share one mask and are traced in one call).

    Returns
    -------
    list of int arrays
        Branch indices of each group, ascending within a group; groups by key (ascending), then in the
        order of a recursive halving of the set along the longest side of its box (neighbouring groups
        are near each other). The result depends only on the boxes and keys, not on where or how the
        tasks run.
    """
    lo = np.asarray(lo, np.int64).reshape(-1, 3)
    hi = np.asarray(hi, np.int64).reshape(-1, 3)
    keys = np.zeros(len(lo), np.int64) if keys is None else np.asarray(keys).reshape(-1)
    centre = lo + hi  # twice the centre, exact in integers
    out: list[np.ndarray] = []
    uniq, inverse = np.unique(keys, return_inverse=True)
    order = np.argsort(inverse, kind="stable")
    bounds = np.r_[0, np.cumsum(np.bincount(inverse, minlength=len(uniq)))]
    stack = [order[bounds[k] : bounds[k + 1]] for k in range(len(uniq) - 1, -1, -1)]
    while stack:
        idx = stack.pop()
        if not len(idx):
            continue
        side = hi[idx].max(axis=0) - lo[idx].min(axis=0)
        if len(idx) == 1 or float(np.prod(side.astype(float))) <= max_box_voxels:
            out.append(np.sort(idx))
            continue
        axis = int(np.argmax(side))
        order = idx[np.argsort(centre[idx, axis], kind="stable")]
        half = len(order) // 2
        stack.append(order[half:])  # popped second: the first half comes out first
        stack.append(order[:half])
    return out


def _piece(
    labels: np.ndarray, objects: list, ids: tuple[int, ...], *, fill: bool
) -> tuple[np.ndarray, np.ndarray]:
    """The pieces ``ids`` of a labelled box, cropped to their bounding box plus one voxel of background.

    Returns the mask and the index of its voxel [0, 0, 0] in the box. The rest of the box is background
    for these pieces, so cropping changes nothing; where a piece reaches the box's face, the border
    voxel lies outside the box and is background (beyond the box nothing is known; its faces are at
    least a branch's margin away from every branch traced on it).
    """
    if not ids:
        return np.zeros((3, 3, 3), bool), np.zeros(3, np.int64)
    a = np.min([[s.start for s in objects[i - 1]] for i in ids], axis=0)
    b = np.max([[s.stop for s in objects[i - 1]] for i in ids], axis=0)
    crop = labels[tuple(slice(int(x), int(y)) for x, y in zip(a, b, strict=True))]
    piece = np.zeros(tuple(b - a + 2), bool)
    inner = piece[1:-1, 1:-1, 1:-1]
    if len(ids) == 1:
        np.equal(crop, ids[0], out=inner)
    else:
        inner[...] = np.isin(crop, ids)
    if fill:
        piece = labelling.fill_holes(piece)
    return piece, (a - 1).astype(np.int64)


def trace_group(
    vol: LazyVolume, jobs: list[BranchJob], *, voxel_mm: float, settings: Settings
) -> list[Centerline | None]:
    """Trace a group of nearby branches from one box of the volume.

    The box is the union of the branches' own boxes (:func:`branch_box`). Each branch is traced on the
    26-connected pieces of the box that hold its path voxels (holes filled when ``settings.fill_holes``);
    branches on the same pieces are traced in one call. Returns one centreline (or None) per job, in order.
    """
    if not jobs:
        return []
    lo, hi = branch_boxes(jobs, vol.affine)
    lo, hi = lo.min(axis=0), hi.max(axis=0)
    m = vol.read_box(lo, hi)
    labels, _ = ndimage.label(m, structure=_FULL)
    del m
    keys: dict[tuple[int, ...], list[int]] = {}
    for i, job in enumerate(jobs):
        inside = np.rint(job.path - lo).astype(np.int64)
        ids = np.unique(labels[tuple(inside.T)])
        keys.setdefault(tuple(ids[ids > 0].tolist()), []).append(i)
    objects = ndimage.find_objects(labels)
    linear, shift = vol.affine[:3, :3], vol.affine[:3, 3]
    out: list[Centerline | None] = [None] * len(jobs)
    for ids, members in keys.items():
        piece, offset = _piece(labels, objects, ids, fill=settings.fill_holes)
        aff = vol.affine.copy()
        aff[:3, 3] = linear @ (lo + offset) + shift
        branches = [
            BranchInput(jobs[i].path @ linear.T + shift, jobs[i].closed, jobs[i].free_start, jobs[i].free_end)
            for i in members
        ]
        lines = trace_centerlines(
            branches,
            section=CrossSection(piece, aff),
            boundary=BoundaryDistance(piece, aff),
            voxel_mm=voxel_mm,
            settings=settings,
        )
        del piece
        for i, cl in zip(members, lines, strict=True):
            out[i] = cl
    return out


def trace_groups(
    vol: LazyVolume, groups: list[list[BranchJob]], *, voxel_mm: float, settings: Settings
) -> list[list[Centerline | None]]:
    """Trace several groups one box at a time (one Dask task): :func:`trace_group` for each.

    Single-threaded inside (the tasks themselves run in parallel, one per core).
    """
    prefer_mmap()  # also in worker processes of a distributed cluster
    with single_threaded():
        return [trace_group(vol, jobs, voxel_mm=voxel_mm, settings=settings) for jobs in groups]
