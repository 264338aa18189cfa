"""Tests for vesselgeom.tabulate.TableBuilder: batches give the same tables as one pass.

The reference is the pipeline's own output (:func:`vesselgeom.analyze`) with every branch in one
batch; splitting the tracing and measuring into batches of one or a few branches must not change a
value, since each branch's spline fit and measures depend on that branch alone.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import vesselgeom as vg
from vesselgeom import pipeline
from vesselgeom.phantoms import network_phantom, y_phantom


@pytest.fixture(scope="module")
def masks():
    y = y_phantom()
    net_mask, net_aff = network_phantom((96, 96, 96), n_trees=3, depth=4, seed=1)
    return {"y": (y.mask, y.affine), "network": (net_mask, net_aff)}


@pytest.mark.parametrize("name", ["y", "network"])
@pytest.mark.parametrize("batch", [1, 2])
def test_batches_give_the_same_tables(masks, name, batch, monkeypatch):
    mask, affine = masks[name]
    whole = vg.analyze(mask, affine=affine)
    monkeypatch.setattr(pipeline, "_BATCH_BRANCHES", batch)
    split = vg.analyze(mask, affine=affine)
    assert len(whole.junctions) > 0 and len(whole.branches) > batch
    for a, b in (
        (whole.branches, split.branches),
        (whole.points, split.points),
        (whole.junctions, split.junctions),
    ):
        pd.testing.assert_frame_equal(a, b, check_exact=True)
    angles = whole.junctions["min_angle_deg"].to_numpy()
    assert np.all(np.isfinite(angles))  # every junction's branches were found across batches


@pytest.fixture(scope="module")
def traced(masks):
    """Centrelines and contexts of the network's largest component, traced in memory."""
    from vesselgeom.centerline import BranchInput, trace_centerlines
    from vesselgeom.crosssection import CrossSection
    from vesselgeom.graph import build_graph
    from vesselgeom.measure import BranchContext
    from vesselgeom.radius import BoundaryDistance
    from vesselgeom.settings import Settings
    from vesselgeom.skeleton import iter_components, thin

    mask, affine = masks["network"]
    settings = Settings()
    comp = max(iter_components(mask, min_voxels=27), key=lambda c: c.mask.sum())
    aff = affine.copy()
    aff[:3, 3] = affine[:3, :3] @ comp.offset + affine[:3, 3]
    graph = build_graph(thin(comp.mask))
    inputs = [
        BranchInput(b.path @ aff[:3, :3].T + aff[:3, 3], b.closed, False, False) for b in graph.branches
    ]
    contexts = [BranchContext(i + 1, 1, "internal", None, None) for i in range(len(inputs))]
    lines = trace_centerlines(
        inputs,
        section=CrossSection(comp.mask, aff),
        boundary=BoundaryDistance(comp.mask, aff),
        voxel_mm=1.0,
        settings=settings,
    )
    assert len(lines) >= 4
    return lines, contexts, settings


def test_batches_added_out_of_order_come_back_in_branch_order(traced):
    # reference: the same centrelines added in branch order; by_branch_id restores that order exactly
    from vesselgeom.tabulate import TableBuilder

    lines, contexts, settings = traced
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    ordered, shuffled = TableBuilder(**kw), TableBuilder(**kw)
    for lo in range(0, len(lines), 2):
        ordered.add_branches(lines[lo : lo + 2], contexts[lo : lo + 2])
    for lo in reversed(range(0, len(lines), 2)):
        shuffled.add_branches(lines[lo : lo + 2], contexts[lo : lo + 2])
    a, b = ordered.tables(), shuffled.tables(by_branch_id=True)
    for x, y in zip(a, b, strict=True):
        pd.testing.assert_frame_equal(x, y, check_exact=True)


@pytest.mark.parametrize("reverse", [False, True])
def test_spilled_points_give_the_same_tables(traced, tmp_path, monkeypatch, reverse):
    # reference: the in-memory builder; points spilled to files, reordered in blocks of 5 rows
    # (smaller than a branch, so runs of one branch span blocks) and mapped back must equal it exactly
    from vesselgeom import pointstore
    from vesselgeom.tabulate import TableBuilder

    monkeypatch.setattr(pointstore, "_BLOCK_ROWS", 5)
    lines, contexts, settings = traced
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    memory, spilled = TableBuilder(**kw), TableBuilder(**kw, spill_dir=tmp_path)
    starts = list(range(0, len(lines), 3))
    for lo in reversed(starts) if reverse else starts:
        for builder in (memory, spilled):
            builder.add_branches(lines[lo : lo + 3], contexts[lo : lo + 3])
    assert any(p.name.startswith("points.") for p in tmp_path.iterdir())  # rows went to disk
    a = memory.tables(by_branch_id=True)
    b = spilled.tables(by_branch_id=True)
    assert list(tmp_path.iterdir()) == []  # files unlinked once mapped
    assert _is_mapped(b[1]["arc_mm"].to_numpy())
    assert len(b[1]) == sum(len(cl.arc) for cl in lines if cl is not None)
    for x, y in zip(a, b, strict=True):
        pd.testing.assert_frame_equal(x, y, check_exact=True)
    ids = b[1]["branch_id"].to_numpy()
    assert np.all(ids[1:] >= ids[:-1])
    b[1].loc[0, "radius_mm"] = -1.0  # copy-on-write mapping: the table can be changed
    assert b[1].loc[0, "radius_mm"] == -1.0


def test_spilled_builder_without_rows_and_discard(traced, tmp_path):
    from vesselgeom.tabulate import TableBuilder

    lines, contexts, settings = traced
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    empty = TableBuilder(**kw, spill_dir=tmp_path)
    branches, points, junctions = empty.tables()
    assert (len(branches), len(points), len(junctions)) == (0, 0, 0)
    assert list(points.columns)[:2] == ["branch_id", "arc_mm"]
    assert list(tmp_path.iterdir()) == []
    failed = TableBuilder(**kw, spill_dir=tmp_path)
    failed.add_branches(lines[:2], contexts[:2])
    assert list(tmp_path.iterdir())
    failed.discard()  # a run that stops before its tables leaves nothing behind
    assert list(tmp_path.iterdir()) == []


def _is_mapped(values: np.ndarray) -> bool:
    """Whether an array's memory belongs to a numpy memmap (walking its chain of bases)."""
    while values is not None:
        if isinstance(values, np.memmap):
            return True
        values = getattr(values, "base", None)
    return False


@pytest.mark.parametrize("typed_rows", [1, 2])
def test_branch_rows_typed_in_blocks_give_the_same_tables(traced, monkeypatch, typed_rows):
    # reference: every row typed at once at the end (a block larger than the table)
    from vesselgeom import tabulate
    from vesselgeom.tabulate import TableBuilder

    lines, contexts, settings = traced
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    once = TableBuilder(**kw)
    for lo in reversed(range(0, len(lines), 3)):
        once.add_branches(lines[lo : lo + 3], contexts[lo : lo + 3])
    monkeypatch.setattr(tabulate, "_TYPED_ROWS", typed_rows)
    blocks = TableBuilder(**kw)
    for lo in reversed(range(0, len(lines), 3)):
        blocks.add_branches(lines[lo : lo + 3], contexts[lo : lo + 3])
    assert len(blocks._branches) >= 2  # several typed blocks were made on the way
    for x, y in zip(once.tables(by_branch_id=True), blocks.tables(by_branch_id=True), strict=True):
        pd.testing.assert_frame_equal(x, y, check_exact=True)
