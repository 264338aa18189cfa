"""Tests for vesselgeom.tabulate.TableBuilder: batches give the same tables as one pass.

The reference is the pipeline's own output (:func:`vesselgeom.analyze`) with every branch in one
batch; splitting the tracing and measuring into batches of one or a few branches must not change a
value, since each branch's spline fit and measures depend on that branch alone.
"""

from __future__ import annotations

import gc
import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import vesselgeom as vg
from vesselgeom import pipeline
from vesselgeom.phantoms import network_phantom, y_phantom
from vesselgeom.tables import POINT_COLUMNS


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
    # (smaller than a branch, so runs of one branch span blocks) and mapped back must equal it exactly.
    # One branch failed to trace (None): it has a branch row but no point rows.
    from vesselgeom import pointstore
    from vesselgeom.tabulate import TableBuilder

    monkeypatch.setattr(pointstore, "_BLOCK_ROWS", 5)
    lines, contexts, settings = traced
    lines = list(lines)
    lines[1] = None
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    memory, spilled = TableBuilder(**kw), TableBuilder(**kw, spill_dir=tmp_path)
    starts = list(range(0, len(lines), 3))
    for lo in reversed(starts) if reverse else starts:
        for builder in (memory, spilled):
            builder.add_branches(lines[lo : lo + 3], contexts[lo : lo + 3])
    assert _open_files_in(tmp_path) == len(POINT_COLUMNS)  # rows went to files there...
    assert list(tmp_path.iterdir()) == []  # ...which have no names, so nothing can be left behind
    a = memory.tables(by_branch_id=True)
    b = spilled.tables(by_branch_id=True)
    assert _open_files_in(tmp_path) == len(POINT_COLUMNS)  # the maps' own handles, one per column
    assert _is_mapped(b[1]["arc_mm"].to_numpy())
    assert len(b[1]) == sum(len(cl.arc) for cl in lines if cl is not None)
    assert 2 not in set(b[1]["branch_id"]) and 2 in set(b[0]["branch_id"])
    for x, y in zip(a, b, strict=True):
        pd.testing.assert_frame_equal(x, y, check_exact=True)
    ids = b[1]["branch_id"].to_numpy()
    assert np.all(ids[1:] >= ids[:-1])
    b[1].loc[0, "radius_mm"] = -1.0  # copy-on-write mapping: the table can be changed
    assert b[1].loc[0, "radius_mm"] == -1.0
    del b, x, y, ids  # every view of the table too
    gc.collect()
    assert _open_files_in(tmp_path) == 0  # released with the table: the disk space is free again


def test_spilled_builder_without_rows_and_discard(traced, tmp_path):
    from vesselgeom.tabulate import TableBuilder

    lines, contexts, settings = traced
    kw = dict(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    empty = TableBuilder(**kw, spill_dir=tmp_path)
    branches, points, junctions = empty.tables()
    assert (len(branches), len(points), len(junctions)) == (0, 0, 0)
    assert list(points.columns)[:2] == ["branch_id", "arc_mm"]
    assert _open_files_in(tmp_path) == 0
    failed = TableBuilder(**kw, spill_dir=tmp_path)
    failed.add_branches(lines[:2], contexts[:2])
    assert _open_files_in(tmp_path) == len(POINT_COLUMNS)
    failed.discard()  # a run that stops before its tables frees the files' space at once
    assert _open_files_in(tmp_path) == 0
    with pytest.raises(vg.InputError, match="after the tables were made"):
        failed.add_branches(lines[2:3], contexts[2:3])


def test_builder_refuses_misuse(traced):
    from vesselgeom.measure import BranchContext
    from vesselgeom.tabulate import TableBuilder

    lines, contexts, settings = traced
    builder = TableBuilder(settings=settings, voxel_mm=1.0, coarsest_voxel_mm=1.0)
    with pytest.raises(vg.InputError, match="non-negative"):
        builder.add_branches(lines[:1], [BranchContext(-1, 1, "internal", None, None)])
    builder.add_branches(lines[:2], contexts[:2])
    with pytest.raises(vg.InputError, match="names branch 99"):
        builder.add_junction(1, 1, np.zeros(3), 1.0, [(1, True), (99, False)])
    branches, points, _ = builder.tables()
    assert list(branches["branch_id"]) == [1, 2]  # the refused branch left no row
    assert set(points["branch_id"]) == {1, 2}
    with pytest.raises(vg.InputError, match="already called"):
        builder.tables()


def test_point_store_refuses_unequal_columns_without_writing(tmp_path):
    from vesselgeom.pointstore import SpilledPoints

    store = SpilledPoints(tmp_path)
    good = {c.name: np.arange(3, dtype=float) for c in POINT_COLUMNS}
    good["branch_id"] = np.array([1, 1, 2])
    good["in_summary"] = np.ones(3, bool)
    store.add(good)
    bad = dict(good, radius_mm=np.zeros(2))
    with pytest.raises(vg.InputError, match="radius_mm"):
        store.add(bad)
    cols = store.columns(by_branch_id=True)
    assert store.rows == 3 and len(cols["radius_mm"]) == 3  # the refused batch changed nothing
    np.testing.assert_array_equal(cols["radius_mm"], good["radius_mm"])


def test_scratch_folder_that_cannot_be_written_is_an_input_error(tmp_path):
    from vesselgeom.pointstore import SpilledPoints, check_folder

    with pytest.raises(vg.InputError, match="does not exist"):
        check_folder(tmp_path / "missing")
    if not Path("/proc/sys").is_dir():
        pytest.skip("needs /proc/sys (Linux): a folder where no file can be made, even by root")
    with pytest.raises(vg.InputError, match=r"/proc/sys: cannot write point rows there"):
        check_folder("/proc/sys")
    with pytest.raises(vg.InputError, match="cannot write point rows"):
        SpilledPoints("/proc/sys")


def _open_files_in(folder) -> int:
    """Open file descriptors of this process on files in ``folder`` (Linux /proc/self/fd)."""
    fd_dir = Path("/proc/self/fd")
    if not fd_dir.is_dir():
        pytest.skip("needs /proc/self/fd (Linux)")
    count = 0
    for fd in fd_dir.iterdir():
        try:
            target = os.readlink(fd)
        except OSError:
            continue
        count += target.startswith(str(folder) + "/")
    return count


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
