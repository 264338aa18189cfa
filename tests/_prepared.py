"""Test support (not a test module): components of a mask prepared as :mod:`vesselgeom.pipeline` does.

Shared by tests that trace or measure branches without running the whole pipeline.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from vesselgeom.centerline import BranchInput
from vesselgeom.graph import SkeletonGraph, build_graph, prune_spurs
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings
from vesselgeom.skeleton import Component, iter_components, thin


def prepared_components(
    mask: np.ndarray, affine: np.ndarray, settings: Settings
) -> Iterator[tuple[Component, np.ndarray, BoundaryDistance, SkeletonGraph, list[BranchInput]]]:
    """Per component that thins to more than one voxel: (component, its crop's affine, radius function,
    pruned graph, branch inputs in world mm), as the pipeline makes them."""
    for comp in iter_components(mask, min_voxels=settings.min_component_voxels):
        aff = affine.copy()
        aff[:3, 3] = affine[:3, :3] @ comp.offset + affine[:3, 3]
        skel = thin(comp.mask)
        if skel.sum() < 2:
            continue
        boundary = BoundaryDistance(comp.mask, aff)
        graph = prune_spurs(
            build_graph(skel), linear=aff[:3, :3], radius_at=boundary.at_index, ratio=settings.prune_ratio
        )
        inputs = []
        for b in graph.branches:
            _, free = graph.branch_kind(b)
            inputs.append(BranchInput(b.path @ aff[:3, :3].T + aff[:3, 3], b.closed, free[0], free[1]))
        yield comp, aff, boundary, graph, inputs
