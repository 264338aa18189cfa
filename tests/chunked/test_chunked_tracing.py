"""Tracing in groups: the same centrelines as the in-memory pipeline, groups that respect their limits,
rows in branch order whatever order tasks finish in, and traced centrelines released as tasks finish.

References: the in-memory pipeline's own steps
(:func:`vesselgeom.skeleton.iter_components` crops, ``thin``, ``build_graph``, ``prune_spurs``,
``trace_centerlines`` on each component's crop, as in ``vesselgeom.pipeline.analyze_volume``) for the
centrelines; :func:`vesselgeom.analyze` for the tables.
"""

from __future__ import annotations

import contextlib
import gc
import weakref

import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import phantoms as P
from vesselgeom.centerline import BranchInput, trace_centerlines
from vesselgeom.crosssection import CrossSection
from vesselgeom.graph import build_graph, prune_spurs
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings
from vesselgeom.skeleton import iter_components, thin

pytest.importorskip("dask")

from vesselgeom.chunked import LazyVolume, analyze_chunked  # noqa: E402
from vesselgeom.chunked import run as chunked_run  # noqa: E402
from vesselgeom.chunked.tracing import (  # noqa: E402
    BranchJob,
    branch_boxes,
    group_branches,
    trace_group,
)


def test_groups_partition_within_limit():
    rng = np.random.default_rng(2)
    lo = rng.integers(0, 200, size=(300, 3))
    hi = lo + rng.integers(5, 40, size=(300, 3))
    hi[7] = lo[7] + 120  # one branch larger than the limit: a group of its own
    keys = rng.integers(0, 4, size=300)
    limit = 60**3
    groups = group_branches(lo, hi, max_box_voxels=limit, keys=keys)
    allidx = np.concatenate(groups)
    assert sorted(allidx.tolist()) == list(range(300))  # each branch in exactly one group
    for g in groups:
        side = hi[g].max(axis=0) - lo[g].min(axis=0)
        assert len(g) == 1 or np.prod(side) <= limit
        assert len(np.unique(keys[g])) == 1
    assert [7] in [g.tolist() for g in groups]
    assert sum(len(g) > 1 for g in groups) > 10  # groups do form
    again = group_branches(lo, hi, max_box_voxels=limit, keys=keys)
    assert all(np.array_equal(a, b) for a, b in zip(groups, again, strict=True))


def _two_components():
    """A Y phantom and a helix side by side in one mask (two components, a junction in one)."""
    y, h = P.y_phantom(2.5), P.tube_phantom(P.helix(turns=1.5), 2.0)
    shape = (y.mask.shape[0] + h.mask.shape[0] + 6, max(y.mask.shape[1], h.mask.shape[1]) + 4, 60)
    mask = np.zeros(shape, bool)
    mask[2 : 2 + y.mask.shape[0], 2 : 2 + y.mask.shape[1], 20 : 20 + y.mask.shape[2]] = y.mask
    x0 = 4 + y.mask.shape[0]
    mask[x0 : x0 + h.mask.shape[0], 2 : 2 + h.mask.shape[1], 2 : 2 + h.mask.shape[2]] = h.mask
    return mask


def test_group_traces_as_the_in_memory_pipeline():
    """Each branch, traced in a group with branches of another component, equals the in-memory trace of
    its component (branches of one component traced in one call on the component's crop) and its own
    trace as a group of one."""
    mask = _two_components()
    settings = Settings()
    affine = np.eye(4)
    jobs, ref = [], []
    for comp in iter_components(mask, min_voxels=0, fill_holes=True):
        aff = affine.copy()
        aff[:3, 3] = comp.offset
        boundary = BoundaryDistance(comp.mask, aff)
        graph = prune_spurs(
            build_graph(thin(comp.mask)),
            linear=np.eye(3),
            radius_at=boundary.at_index,
            ratio=settings.prune_ratio,
        )
        inputs = []
        for b in graph.branches:
            _, free = graph.branch_kind(b)
            inputs.append(BranchInput(b.path + comp.offset, b.closed, free[0], free[1]))
            # a margin (4 x 12 + 4 voxels) taking in the whole component, even in a branch's own box
            jobs.append(BranchJob(b.path + comp.offset, b.closed, free[0], free[1], 12.0))
        ref += trace_centerlines(
            inputs, section=CrossSection(comp.mask, aff), boundary=boundary, voxel_mm=1.0, settings=settings
        )
    assert len(jobs) >= 4  # three branches of the Y and the helix
    vol = LazyVolume(mask, (), mask.shape, affine)
    together = trace_group(vol, jobs, voxel_mm=1.0, settings=settings)
    for i, (r, got) in enumerate(zip(ref, together, strict=True)):
        alone = trace_group(vol, [jobs[i]], voxel_mm=1.0, settings=settings)[0]
        for cl in (got, alone):
            np.testing.assert_allclose(cl.points, r.points, rtol=0, atol=1e-9)
            np.testing.assert_allclose(cl.radius, r.radius, rtol=0, atol=1e-9)
            np.testing.assert_allclose(cl.frame.curvature, r.frame.curvature, rtol=1e-9, atol=1e-12)


def test_branch_boxes_hold_path_and_margin():
    path = np.array([[10.0, 20.0, 30.0], [14.0, 18.0, 35.0]])
    job = BranchJob(path, False, True, True, 2.0)
    lo, hi = branch_boxes([job], np.diag([0.5, 0.5, 1.0, 1.0]))
    # margin: 4 x 2 mm + 4 x 1 mm (coarsest voxel) = 12 mm: 24 voxels of 0.5 mm, 12 voxels of 1 mm
    np.testing.assert_array_equal(lo[0], [10 - 24, 18 - 24, 30 - 12])
    np.testing.assert_array_equal(hi[0], [14 + 24 + 1, 20 + 24 + 1, 35 + 12 + 1])


@pytest.fixture(scope="module")
def network():
    mask, affine = P.network_phantom((96, 96, 96), n_trees=4, depth=4)
    return mask, vg.analyze(mask, affine=affine)


def _small_tasks(monkeypatch):
    """One group of branches per task, so results arrive in many pieces."""
    monkeypatch.setattr(chunked_run, "BRANCHES_PER_TASK", 1)


def test_rows_in_branch_order_whatever_order_tasks_finish(network, monkeypatch):
    """Tasks delivered last-first give the same tables as tasks in order (and as the in-memory run)."""
    mask, ref = network
    _small_tasks(monkeypatch)
    in_order = analyze_chunked(mask, spacing=1.0, chunk_size=32, scheduler="synchronous")

    def backwards(stream):
        return lambda func, vol, calls, **kwargs: reversed(list(stream(func, vol, calls, **kwargs)))

    _wrap_stream(monkeypatch, backwards)
    backwards = analyze_chunked(mask, spacing=1.0, chunk_size=32, scheduler="synchronous")
    assert in_order.branches.equals(backwards.branches)
    assert in_order.points.equals(backwards.points)
    assert in_order.junctions.equals(backwards.junctions)
    assert in_order.branches.branch_id.tolist() == ref.branches.branch_id.tolist()
    assert len(in_order.points) == len(ref.points)


def test_threads_equal_synchronous(network, monkeypatch):
    mask, _ = network
    _small_tasks(monkeypatch)
    a = analyze_chunked(mask, spacing=1.0, chunk_size=32, scheduler="synchronous")
    b = analyze_chunked(mask, spacing=1.0, chunk_size=32, scheduler="threads")
    assert a.branches.equals(b.branches) and a.points.equals(b.points) and a.junctions.equals(b.junctions)


def test_traced_centrelines_are_released_as_tasks_finish(network, monkeypatch):
    """The client measures each task's centrelines and drops them before the next task's arrive."""
    mask, _ = network
    _small_tasks(monkeypatch)
    refs: list[list[weakref.ref]] = []
    alive_at_each_step: list[int] = []

    def watched(stream):
        def spy(func, vol, calls, **kwargs):
            for i, result in stream(func, vol, calls, **kwargs):
                gc.collect()
                alive_at_each_step.append(sum(r() is not None for step in refs for r in step))
                refs.append([weakref.ref(cl) for group in result for cl in group if cl is not None])
                yield i, result
                del result

        return spy

    _wrap_stream(monkeypatch, watched)
    res = analyze_chunked(mask, spacing=1.0, chunk_size=32, scheduler="synchronous")
    assert len(refs) >= 3  # results arrived in several tasks
    assert sum(len(r) for r in refs) == res.branches.length_mm.notna().sum() >= 15
    # when a task's result arrives, no centreline of an earlier task is still alive
    assert alive_at_each_step == [0] * len(refs)


def _wrap_stream(monkeypatch, wrap):
    """Make analyze_chunked's executor hand out ``wrap(stream)`` instead of its task stream."""
    real = chunked_run.executor

    @contextlib.contextmanager
    def executor(scheduler, budget):
        with real(scheduler, budget) as (compute, stream, info):
            yield compute, wrap(stream), info

    monkeypatch.setattr(chunked_run, "executor", executor)
