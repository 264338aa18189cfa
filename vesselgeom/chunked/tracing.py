"""Branch geometry in parallel tasks, each reading only the sub-volume its branch needs.

A task traces its branches one at a time with the in-memory pipeline's code
(:func:`vesselgeom.centerline.trace_centerlines` with :class:`~vesselgeom.crosssection.CrossSection` and
:class:`~vesselgeom.radius.BoundaryDistance`). Each branch gets the box around its skeleton path plus a
margin of :data:`MARGIN_RADII` times its largest radius plus :data:`MARGIN_VOXELS` voxels: recentring
samples discs of 1.5 radii plus a voxel, and a terminal end is extended to where the mask ends, about a
radius beyond the retracted skeleton. In the box, the mask keeps the 26-connected pieces that hold the
branch's voxels (the in-memory pipeline sees one component at a time), holes filled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from vesselgeom.centerline import BranchInput, Centerline, trace_centerlines
from vesselgeom.chunked.sources import LazyVolume
from vesselgeom.crosssection import CrossSection
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings

__all__ = ["MARGIN_RADII", "MARGIN_VOXELS", "BranchJob", "branch_box", "trace_jobs"]

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
    """Index box ``[lo, hi)`` a branch reads: its path's bounding box plus the margin."""
    spacing = np.linalg.norm(np.asarray(affine)[:3, :3], axis=0)
    margin_mm = MARGIN_RADII * job.max_radius_mm + MARGIN_VOXELS * float(spacing.max())
    margin = np.ceil(margin_mm / spacing).astype(int)
    lo = np.floor(job.path.min(axis=0)).astype(int) - margin
    hi = np.ceil(job.path.max(axis=0)).astype(int) + margin + 1
    return lo, hi


def _trace_one(vol: LazyVolume, job: BranchJob, *, voxel_mm: float, settings: Settings) -> Centerline | None:
    lo, hi = branch_box(job, vol.affine)
    m = vol.read_box(lo, hi)
    labels, _ = ndimage.label(m, structure=_FULL)
    inside = np.rint(job.path - lo).astype(int)
    ids = np.unique(labels[tuple(inside.T)])
    ids = ids[ids > 0]
    piece = np.isin(labels, ids)
    del labels, m
    if settings.fill_holes:
        piece = ndimage.binary_fill_holes(piece)
    aff = vol.affine.copy()
    aff[:3, 3] = vol.affine[:3, :3] @ lo + vol.affine[:3, 3]
    world = job.path @ vol.affine[:3, :3].T + vol.affine[:3, 3]
    section = CrossSection(piece, aff)
    boundary = BoundaryDistance(piece, aff)
    branch = BranchInput(world, job.closed, job.free_start, job.free_end)
    return trace_centerlines(
        [branch], section=section, boundary=boundary, voxel_mm=voxel_mm, settings=settings
    )[0]


def trace_jobs(
    vol: LazyVolume, jobs: list[BranchJob], *, voxel_mm: float, settings: Settings
) -> list[Centerline | None]:
    """Trace a batch of branches, one sub-volume at a time (one Dask task)."""
    return [_trace_one(vol, job, voxel_mm=voxel_mm, settings=settings) for job in jobs]
