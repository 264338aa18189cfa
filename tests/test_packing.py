"""Tests for vesselgeom.packing: small components traced together, packed side by side.

Reference: each component traced alone in its own crop by
:func:`vesselgeom.centerline.trace_centerlines` (the contract of :func:`vesselgeom.packing.trace_packed`:
the same samples, so the same centrelines up to the rounding of the translation). The pipeline's
absolute accuracy on analytic phantoms is checked elsewhere (tests/test_pipeline.py); here packing must
not change any number by more than 1e-6 (mm, 1/mm, or unit-vector components). The translation changes
coordinates by their rounding (~1e-14 of ~100 mm), but mask samples are float32 (rounded to ~6e-8 of
their value), so a sample can round the other way and move, e.g., where a ray leaves the mask. Seen on
4,080 fragments (``benchmarks/bench_fragments.py``): 7e-8 mm in positions and lengths, 9.6e-7 /mm in
torsion (a third derivative, 4e-7 of its value); far below any measured precision.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import packing, pipeline
from vesselgeom.centerline import BranchInput, trace_centerlines
from vesselgeom.crosssection import CrossSection
from vesselgeom.graph import build_graph, prune_spurs
from vesselgeom.phantoms import network_phantom
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings
from vesselgeom.skeleton import iter_components, thin

ATOL = 1e-6


def _components(spacing=(0.7, 0.8, 1.1)):
    """(crop, affine, branch inputs) of every component of a small network with many components."""
    mask, affine = network_phantom((96, 96, 96), n_trees=14, depth=3, seed=2, spacing=spacing)
    settings = Settings()
    out = []
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
        out.append((comp.mask, aff, inputs))
    voxel = float(np.mean(np.linalg.norm(affine[:3, :3], axis=0)))
    return out, voxel, settings


def _assert_close(a, b):
    assert (a is None) == (b is None)
    if a is None:
        return
    assert len(a.arc) == len(b.arc)
    for f in ("arc", "points", "radius", "extension_mm"):
        np.testing.assert_allclose(getattr(b, f), getattr(a, f), rtol=0, atol=ATOL, err_msg=f)
    for f in ("tangent", "normal", "binormal", "curvature", "torsion"):
        np.testing.assert_allclose(getattr(b.frame, f), getattr(a.frame, f), rtol=0, atol=ATOL, err_msg=f)
    np.testing.assert_array_equal(a.measured, b.measured)
    assert (a.closed, a.degree) == (b.closed, b.degree)
    assert b.scale_mm == pytest.approx(a.scale_mm, abs=ATOL)


def test_packed_trace_equals_each_component_alone():
    groups, voxel, settings = _components()
    assert len(groups) >= 5 and sum(len(g[2]) for g in groups) >= 20
    alone = [
        trace_centerlines(
            inputs,
            section=CrossSection(mask, aff),
            boundary=BoundaryDistance(mask, aff),
            voxel_mm=voxel,
            settings=settings,
        )
        for mask, aff, inputs in groups
    ]
    packed = packing.trace_packed(groups, voxel_mm=voxel, settings=settings)
    assert [len(p) for p in packed] == [len(g[2]) for g in groups]
    for ref_lines, got_lines in zip(alone, packed, strict=True):
        for a, b in zip(ref_lines, got_lines, strict=True):
            _assert_close(a, b)
    # not a vacuous comparison: most branches were traced
    assert sum(cl is not None for lines in packed for cl in lines) >= 0.9 * sum(len(g[2]) for g in groups)


def test_layout_leaves_room_for_the_larger_neighbour():
    linear = np.diag([0.5, 1.0, 2.0])
    starts, shape = packing._layout([(4, 5, 6), (10, 3, 3), (2, 2, 2)], linear)
    # gap after crop 0: the larger extent of crops 0 and 1 in mm is max(6 x 2, 3 x 2, 10 x 0.5) = 12 mm,
    # 24 planes of 0.5 mm, plus 2
    assert starts == [0, 4 + 24 + 2, 4 + 26 + 10 + 12 + 2]
    assert shape == (starts[-1] + 2, 5, 6)


def test_crops_of_different_grids_are_refused():
    mask = np.zeros((5, 5, 5), bool)
    with pytest.raises(ValueError, match="linear part"):
        packing.trace_packed(
            [(mask, np.eye(4), []), (mask, np.diag([2.0, 1.0, 1.0, 1.0]), [])],
            voxel_mm=1.0,
            settings=Settings(),
        )
    assert packing.trace_packed([], voxel_mm=1.0, settings=Settings()) == []


def test_pipeline_tables_with_and_without_packing(monkeypatch):
    # reference: the same mask analysed with every component traced alone (packing switched off)
    mask, affine = network_phantom((96, 96, 96), n_trees=14, depth=3, seed=2, spacing=(0.7, 0.8, 1.1))
    packed_components = []
    real = pipeline.trace_packed

    def spy(groups, **kw):
        packed_components.append(len(groups))
        return real(groups, **kw)

    monkeypatch.setattr(pipeline, "trace_packed", spy)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", vg.VesselgeomWarning)
        packed = vg.analyze(mask, affine=affine)
        n_packed = sum(packed_components)
        monkeypatch.setattr(pipeline, "PACK_MAX_VOXELS", 0)
        alone = vg.analyze(mask, affine=affine)
    assert n_packed >= 5 and sum(packed_components) == n_packed  # packed, then not at all
    for got, ref in zip(
        (packed.branches, packed.points, packed.junctions),
        (alone.branches, alone.points, alone.junctions),
        strict=True,
    ):
        assert list(got.columns) == list(ref.columns) and len(got) == len(ref) > 0
        for col in ref.columns:
            if ref[col].dtype.kind == "f":
                np.testing.assert_allclose(got[col], ref[col], rtol=0, atol=ATOL, err_msg=col)
            else:
                assert got[col].equals(ref[col]), col
    assert packed.branches["component_id"].nunique() >= 5
