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
from vesselgeom.errors import InputError
from vesselgeom.graph import build_graph, prune_spurs
from vesselgeom.phantoms import network_phantom
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings
from vesselgeom.skeleton import iter_components, thin

ATOL = 1e-6
TORSION_RTOL = 1e-5  # torsion, a third derivative, amplifies the rounding most (4e-7 of its value seen)


SHEAR = np.array([[0.7, 0.25, 0.0], [0.0, 0.8, -0.2], [0.15, 0.0, 1.1]])  # oblique voxel axes (mm)


def _network(sheared: bool):
    mask, affine = network_phantom((96, 96, 96), n_trees=14, depth=3, seed=2, spacing=(0.7, 0.8, 1.1))
    if sheared:
        affine = affine.copy()
        affine[:3, :3] = SHEAR
    return mask, affine


def _components(sheared: bool = False):
    """(crop, affine, branch inputs) of every component of a small network with many components."""
    mask, affine = _network(sheared)
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
    for f in ("tangent", "normal", "binormal", "curvature"):
        np.testing.assert_allclose(getattr(b.frame, f), getattr(a.frame, f), rtol=0, atol=ATOL, err_msg=f)
    np.testing.assert_allclose(
        b.frame.torsion, a.frame.torsion, rtol=TORSION_RTOL, atol=ATOL, err_msg="torsion"
    )
    np.testing.assert_array_equal(a.measured, b.measured)
    assert (a.closed, a.degree) == (b.closed, b.degree)
    assert b.scale_mm == pytest.approx(a.scale_mm, abs=ATOL)


@pytest.mark.parametrize("sheared", [False, True])
def test_packed_trace_equals_each_component_alone(sheared):
    groups, voxel, settings = _components(sheared)
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


def test_layout_leaves_room_for_the_larger_reach():
    # reach of a crop (mm): 1.5 max(r_max, voxel) + voxel, r_max = half its smallest extent (mm) plus a
    # voxel diagonal; spacing 0.5, 1, 2 mm (diagonal sqrt(0.25 + 1 + 4) = 2.291 mm), voxel 1.1667 mm
    linear = np.diag([0.5, 1.0, 2.0])
    voxel = (0.5 + 1.0 + 2.0) / 3
    layout = packing.PackLayout(linear, voxel)
    diag = np.sqrt(0.25 + 1 + 4)
    shapes = [(4, 5, 6), (10, 3, 3), (2, 2, 2)]
    reach = [
        1.5 * max(min(d * h for d, h in zip(sh, (0.5, 1.0, 2.0), strict=True)) / 2 + diag, voxel) + voxel
        for sh in shapes
    ]
    expected, end = [], 0
    for i, sh in enumerate(shapes):
        start = 0 if i == 0 else end + int(np.ceil(max(reach[i], reach[i - 1]) / 0.5)) + 2
        expected.append(start)
        end = start + sh[0]
    assert layout.size_with(shapes[0]) == 4 * 5 * 6
    assert [layout.add(sh) for sh in shapes] == expected
    assert layout.shape == (end, 5, 6)
    # oblique axes: planes along the first axis are closer than its column's length (0.7 mm here is
    # the column norm of 0.7 alone; the planes of SHEAR are 1 / |row 0 of its inverse| apart)
    h0 = 1 / np.linalg.norm(np.linalg.inv(SHEAR)[0])
    assert h0 < np.linalg.norm(SHEAR[:, 0])
    sheared = packing.PackLayout(SHEAR, 1.0)
    sheared.add((8, 8, 8))
    reach_mm = (
        1.5
        * max(
            8 * np.min(1 / np.linalg.norm(np.linalg.inv(SHEAR), axis=1)) / 2
            + np.linalg.norm(SHEAR.sum(axis=1)),
            1.0,
        )
        + 1.0
    )
    assert sheared.add((8, 8, 8)) == 8 + int(np.ceil(reach_mm / h0)) + 2


def test_crops_of_different_grids_are_refused():
    mask = np.zeros((5, 5, 5), bool)
    with pytest.raises(InputError, match="different voxel axes"):
        packing.trace_packed(
            [(mask, np.eye(4), []), (mask, np.diag([2.0, 1.0, 1.0, 1.0]), [])],
            voxel_mm=1.0,
            settings=Settings(),
        )
    assert packing.trace_packed([], voxel_mm=1.0, settings=Settings()) == []


@pytest.mark.parametrize("batch", ["default", "small batches"])
def test_pipeline_tables_with_and_without_packing(monkeypatch, batch):
    # reference: the same mask analysed with every component traced alone (packing switched off);
    # "small batches": the packed array and the branch count are limited so that batches are flushed
    # while components are still coming (not only before a large one and at the end)
    mask, affine = _network(sheared=False)
    packed_components = []
    real = pipeline.trace_packed

    def spy(groups, **kw):
        packed_components.append(len(groups))
        return real(groups, **kw)

    monkeypatch.setattr(pipeline, "trace_packed", spy)
    if batch == "small batches":
        monkeypatch.setattr(pipeline, "PACK_BATCH_VOXELS", 30_000)
        monkeypatch.setattr(pipeline, "_BATCH_BRANCHES", 3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", vg.VesselgeomWarning)
        packed = vg.analyze(mask, affine=affine)
        calls = list(packed_components)
        monkeypatch.setattr(pipeline, "PACK_MAX_VOXELS", 0)
        alone = vg.analyze(mask, affine=affine)
    assert sum(calls) >= 5 and packed_components == calls  # packed, then not at all
    if batch == "small batches":
        assert len(calls) >= 3
    for got, ref in zip(
        (packed.branches, packed.points, packed.junctions),
        (alone.branches, alone.points, alone.junctions),
        strict=True,
    ):
        assert list(got.columns) == list(ref.columns) and len(got) == len(ref) > 0
        for col in ref.columns:
            if col == "torsion_per_mm" or "torsion" in col:
                np.testing.assert_allclose(got[col], ref[col], rtol=TORSION_RTOL, atol=ATOL, err_msg=col)
            elif ref[col].dtype.kind == "f":
                np.testing.assert_allclose(got[col], ref[col], rtol=0, atol=ATOL, err_msg=col)
            else:
                assert got[col].equals(ref[col]), col
    assert packed.branches["component_id"].nunique() >= 5
