"""Tracing the branches of many small components in one batch: their crops packed side by side.

Tracing has a fixed cost per call (a few thousand numpy calls, ~10 ms) besides its cost per branch, so
a mask of thousands of small fragments would spend most of its time on it (4,080 one-branch fragments:
47 s of tracing alone, 4.4 s packed; ``benchmarks/results.md``). Here small components' crops are placed one after another
along the first axis of one array, separated by empty planes wider than anything tracing reaches from a
component (its crop's largest extent), and their branches, moved by the same translation as their crop,
are traced together by :func:`vesselgeom.centerline.trace_centerlines`; the traced points are moved
back. Every sample a branch's trace takes (mask values on discs and rays, distances to the nearest
background voxel) is the same as in its own crop, up to the rounding of the translation (~1e-14 of the
coordinates), which can tip a float32 mask sample's rounding: on 4,080 fragments
(``benchmarks/bench_fragments.py``) positions and lengths agree with tracing each component alone to
7e-8 mm, curvature to 1e-9 /mm, torsion (a third derivative) to 1e-6 /mm (4e-7 of its value).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence

import numpy as np

from .centerline import BranchInput, Centerline, trace_centerlines
from .crosssection import CrossSection
from .radius import BoundaryDistance
from .settings import Settings

__all__ = ["PACK_BATCH_VOXELS", "PACK_MAX_VOXELS", "trace_packed"]

#: Components whose crop holds at most this many voxels are packed (64^3); larger ones are traced alone.
PACK_MAX_VOXELS = 64**3
#: Crop voxels packed into one array at most (its size, with the gaps, is a few times this).
PACK_BATCH_VOXELS = 4 * 2**20


def _layout(
    shapes: Sequence[tuple[int, int, int]], linear: np.ndarray
) -> tuple[list[int], tuple[int, int, int]]:
    """First-axis position of each crop in the packed array, and the packed array's shape.

    The empty planes between two crops span at least the larger crop's largest extent in mm (the
    farthest any disc or distance query of a component reaches beyond its crop is less than that), plus
    two planes.
    """
    spacing = np.linalg.norm(linear, axis=0)  # mm per index step along each axis
    starts, z = [], 0
    for i, shape in enumerate(shapes):
        if i:
            extent_mm = max(
                float(np.max(np.asarray(shapes[i - 1]) * spacing)), float(np.max(np.asarray(shape) * spacing))
            )
            z += int(np.ceil(extent_mm / spacing[0])) + 2
        starts.append(z)
        z += shape[0]
    return starts, (z, max(s[1] for s in shapes), max(s[2] for s in shapes))


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
            raise ValueError("trace_packed: the crops' affines must share their linear part")
    starts, shape = _layout([m.shape for m, _, _ in groups], linear)
    packed = np.zeros(shape, bool)
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
