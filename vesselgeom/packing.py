"""Tracing the branches of many small components in one batch: their crops packed side by side.

Tracing has a fixed cost per call (a few thousand numpy calls, ~10 ms) besides its cost per branch, so
a mask of thousands of small fragments would spend most of its time on it (4,080 one-branch fragments:
47 s of tracing alone, 4.4 s packed; ``benchmarks/results.md``). Here small components' crops are
placed one after another along the first axis of one array, separated by empty planes, and their
branches, moved by the same translation as their crop, are traced together by
:func:`vesselgeom.centerline.trace_centerlines`; the traced points are moved back.

Why a component's trace does not see its neighbours (``tests/test_packing.py`` checks the result):

- Discs (recentring) have radius 1.5 max(r, voxel) + voxel around a centre on the branch, r the
  distance from the centre to the nearest background voxel. Inside a crop r is at most half the crop's
  smallest extent (its faces are background), so a disc reaches at most ``_reach_mm`` beyond its crop;
  the empty planes between two crops are wider than the larger of their two reaches.
- Distances to the nearest background voxel (radii) are found among the component's own outer boundary
  within r, closer than any other crop's.
- Rays (end extension) are sampled beyond that reach, but only up to their first sample below 0.5
  counts (``_extend_free_ends_many``), and a ray leaving its component crosses the crop's own empty
  border first; a change to that exit rule must revisit packing.

So every sample that counts is the one taken in the component's own crop, up to the rounding of the
translation (~1e-14 of the coordinates). That rounding can tip a float32 mask sample's last bit: on
4,080 fragments (``benchmarks/bench_fragments.py``) positions and lengths agree with tracing each
component alone to 7e-8 mm, curvature to 1e-9 /mm, torsion (a third derivative) to 1e-6 /mm (4e-7 of
its value). A small component's numbers can therefore differ in their 7th-8th significant digit with
the components it is packed with (e.g. after cropping the image); the same input and settings always
give the same tables.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np

from .centerline import BranchInput, Centerline, trace_centerlines
from .crosssection import CrossSection
from .errors import InputError
from .radius import BoundaryDistance
from .settings import Settings

__all__ = ["PACK_BATCH_VOXELS", "PACK_MAX_VOXELS", "PackLayout", "trace_packed"]

#: Components whose crop holds at most this many voxels are packed (64^3); larger ones are traced alone.
PACK_MAX_VOXELS = 64**3
#: The packed array (crops and the planes between them) holds at most this many voxels, unless a single
#: crop needs more; callers start a new batch when adding a crop would exceed it (16 Mi voxels, 16 MB).
PACK_BATCH_VOXELS = 16 * 2**20


def _plane_spacing(linear: np.ndarray) -> np.ndarray:
    """World distance (mm) between consecutive index planes along each axis (shear-aware)."""
    return 1.0 / np.linalg.norm(np.linalg.inv(linear), axis=1)


class PackLayout:
    """Where crops go in a packed array, crop by crop: first-axis starts and the array's shape.

    Parameters
    ----------
    linear : (3, 3) float array
        The crops' common index -> world linear map (mm).
    voxel_mm : float
        Mean voxel size (mm), as given to tracing (sets its minimum disc radius).
    """

    def __init__(self, linear: np.ndarray, voxel_mm: float) -> None:
        self._h = _plane_spacing(np.asarray(linear, float))
        self._diagonal = float(np.linalg.norm(np.asarray(linear, float).sum(axis=1)))  # (1, 1, 1) in mm
        self._voxel = float(voxel_mm)
        self.starts: list[int] = []
        self._end = 0  # first free plane
        self._width = (0, 0)
        self._last_reach = 0.0

    def _reach_mm(self, shape: Sequence[int]) -> float:
        """How far beyond its crop a disc of this crop can reach (mm).

        A centre inside the crop is at most half the crop's smallest extent from a face, and a face's
        nearest background voxel centre at most one voxel diagonal from the foot of the perpendicular.
        """
        r_max = float(np.min(np.asarray(shape) * self._h)) / 2 + self._diagonal
        return 1.5 * max(r_max, self._voxel) + self._voxel

    def _placed(self, shape: Sequence[int]) -> tuple[int, int, tuple[int, int]]:
        """(start, end, width) if ``shape`` were added now."""
        reach = self._reach_mm(shape)
        start = 0
        if self.starts:
            start = self._end + int(np.ceil(max(reach, self._last_reach) / self._h[0])) + 2
        width = (max(self._width[0], int(shape[1])), max(self._width[1], int(shape[2])))
        return start, start + int(shape[0]), width

    def size_with(self, shape: Sequence[int]) -> int:
        """Voxels of the packed array if a crop of ``shape`` were added."""
        _, end, width = self._placed(shape)
        return end * width[0] * width[1]

    def add(self, shape: Sequence[int]) -> int:
        """Place a crop of ``shape``; returns its first-axis start."""
        start, self._end, self._width = self._placed(shape)
        self._last_reach = self._reach_mm(shape)
        self.starts.append(start)
        return start

    @property
    def shape(self) -> tuple[int, int, int]:
        return (self._end, *self._width)


def trace_packed(
    groups: Sequence[tuple[np.ndarray, np.ndarray, list[BranchInput]]],
    *,
    voxel_mm: float,
    settings: Settings,
) -> list[list[Centerline | None]]:
    """Trace the branches of several components together; one list of centrelines per component.

    Parameters
    ----------
    groups : sequence of (mask, affine, inputs)
        Per component: its crop (3D bool, with a background border), the crop's index -> world affine
        (mm; all with the same linear part, as crops of one image are) and its branches in world mm.
    voxel_mm, settings
        As for :func:`vesselgeom.centerline.trace_centerlines`.

    Returns
    -------
    list of lists
        For each group, its branches' centrelines (None where tracing failed), in world mm of that
        component, in order.
    """
    if not groups:
        return []
    linear = np.asarray(groups[0][1], float)[:3, :3]
    for _, aff, _ in groups:
        if not np.array_equal(np.asarray(aff, float)[:3, :3], linear):
            raise InputError(
                "<array>: packed crops have different voxel axes (affine linear parts); pack crops of one "
                "image only"
            )
    layout = PackLayout(linear, voxel_mm)
    starts = [layout.add(m.shape) for m, _, _ in groups]
    packed = np.zeros(layout.shape, bool)
    for (mask, _, _), z in zip(groups, starts, strict=True):
        packed[z : z + mask.shape[0], : mask.shape[1], : mask.shape[2]] = mask
    packed_affine = np.asarray(groups[0][1], float).copy()
    # group g's world point p lies at p + shift[g] in the packed array's world
    shifts = [
        linear @ np.array([z, 0.0, 0.0]) + packed_affine[:3, 3] - np.asarray(aff, float)[:3, 3]
        for (_, aff, _), z in zip(groups, starts, strict=True)
    ]
    inputs = [
        dataclasses.replace(b, path=b.path + shift)
        for (_, _, branches), shift in zip(groups, shifts, strict=True)
        for b in branches
    ]
    lines = trace_centerlines(
        inputs,
        section=CrossSection(packed, packed_affine),
        boundary=BoundaryDistance(packed, packed_affine),
        voxel_mm=voxel_mm,
        settings=settings,
    )
    out, at = [], 0
    for (_, _, branches), shift in zip(groups, shifts, strict=True):
        part = lines[at : at + len(branches)]
        at += len(branches)
        out.append([None if cl is None else dataclasses.replace(cl, points=cl.points - shift) for cl in part])
    return out
