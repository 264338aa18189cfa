"""Tests for vesselgeom.centerline: batching, threads and tracing components together change no result.

Independent references used below:
- Each branch's trace depends only on that branch, the mask and the settings (the contract stated in
  :func:`vesselgeom.centerline.trace_centerlines`), so the reference for a branch traced in a batch is
  the same branch traced alone, and results must match bit for bit; likewise for branches of several
  components traced together (:func:`vesselgeom.centerline.trace_components`), whose reference is
  each component traced alone.
- Straight tubes of the tree phantom have the analytic length of :func:`vesselgeom.phantoms.straight`
  (the distance between the end points); traced lengths of the free (terminal) branches are compared
  with it.
- Memory is measured with the standard library's :mod:`tracemalloc` (numpy reports its buffers to it).
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from _prepared import prepared_components

from vesselgeom import centerline, crosssection
from vesselgeom.centerline import BranchInput, trace_centerlines
from vesselgeom.crosssection import CrossSection
from vesselgeom.phantoms import network_phantom, random_rotation, tree_phantom
from vesselgeom.radius import BoundaryDistance
from vesselgeom.settings import Settings

FIELDS = ("arc", "points", "radius", "measured", "extension_mm")
FRAME_FIELDS = ("tangent", "normal", "binormal", "curvature", "torsion")


def _tree_inputs(seed: int = 0):
    """Branches of a depth-3 tree phantom as skeleton-like polylines (1 mm steps, jittered by 0.3 mm)."""
    ph = tree_phantom(3, spacing=(0.8, 0.9, 1.0), rotation=random_rotation(seed), seed=seed)
    rng = np.random.default_rng(seed)
    inputs = []
    for i, c in enumerate(ph.curves):
        n = int(np.ceil((c.t1 - c.t0) / 1.0)) + 1
        pts = c.r(np.linspace(c.t0, c.t1, n)) + rng.uniform(-0.3, 0.3, (n, 3))
        # the root starts free, the leaves end free; all other ends are at junctions
        inputs.append(BranchInput(pts, False, i == 0, i > 0 and i not in (1, 4)))
    section = CrossSection(ph.mask, ph.affine)
    boundary = BoundaryDistance(ph.mask, ph.affine)
    voxel = float(np.mean(np.linalg.norm(ph.affine[:3, :3], axis=0)))
    return ph, inputs, section, boundary, voxel


def _assert_same(a, b):
    assert (a is None) == (b is None)
    if a is None:
        return
    for f in FIELDS:
        np.testing.assert_array_equal(getattr(a, f), getattr(b, f), err_msg=f)
    for f in FRAME_FIELDS:
        np.testing.assert_array_equal(getattr(a.frame, f), getattr(b.frame, f), err_msg=f)
    assert (a.step_mm, a.scale_mm, a.degree, a.closed) == (b.step_mm, b.scale_mm, b.degree, b.closed)


def test_batched_equals_each_branch_alone(monkeypatch):
    # reference: every branch traced alone; batches of any size give the same bits
    ph, inputs, section, boundary, voxel = _tree_inputs(1)
    settings = Settings()
    inputs = inputs * 3  # the same branches several times, so batches mix them differently
    alone = [
        trace_centerlines([b], section=section, boundary=boundary, voxel_mm=voxel, settings=settings)[0]
        for b in inputs
    ]
    for points, branches in ((10**9, 10**9), (60, 10**9), (10**9, 2)):
        monkeypatch.setattr(centerline, "_BATCH_POINTS", points)
        monkeypatch.setattr(centerline, "_BATCH_BRANCHES", branches)
        assert len(centerline._batches(inputs)) > (1 if points < 10**9 or branches < 10**9 else 0)
        together = trace_centerlines(
            inputs, section=section, boundary=boundary, voxel_mm=voxel, settings=settings
        )
        for a, b in zip(alone, together, strict=True):
            _assert_same(a, b)
    # the traces are not degenerate: leaves are straight tubes of the analytic length (phantom truth),
    # within the extension and smoothing error of a jittered polyline
    for truth, cl in zip(ph.branches, alone, strict=False):
        assert cl is not None
        assert cl.length_mm == pytest.approx(truth.length_mm, rel=0.1)


@pytest.mark.parametrize("threads", [1, 2, 3])
def test_threads_do_not_change_results(monkeypatch, threads):
    # reference: the single-threaded trace; mask sampling and radius queries split among threads must
    # give the same bits
    _ph, inputs, section, boundary, voxel = _tree_inputs(2)
    settings = Settings()
    monkeypatch.setattr(crosssection, "_THREADS", 1)
    ref = trace_centerlines(inputs, section=section, boundary=boundary, voxel_mm=voxel, settings=settings)
    monkeypatch.setattr(crosssection, "_THREADS", threads)
    monkeypatch.setattr(crosssection, "_PARALLEL_SAMPLES", 1)
    got = trace_centerlines(inputs, section=section, boundary=boundary, voxel_mm=voxel, settings=settings)
    for a, b in zip(ref, got, strict=True):
        _assert_same(a, b)


def _extra_memory(inputs, section, boundary, voxel) -> float:
    """tracemalloc peak during the trace minus what the results keep, in bytes."""
    tracemalloc.start()
    try:
        out = trace_centerlines(
            inputs, section=section, boundary=boundary, voxel_mm=voxel, settings=Settings()
        )
        kept, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert all(cl is not None for cl in out)
    return peak - kept


def test_temporary_memory_bounded_by_batch(monkeypatch):
    # tracemalloc (standard library): with a bound on the batch, the temporaries of 32 copies of the
    # branches are about those of 4 copies; without it they grow with the number traced at once
    _ph, inputs, section, boundary, voxel = _tree_inputs(3)
    monkeypatch.setattr(crosssection, "_THREADS", 1)

    def extra(copies: int) -> float:
        return _extra_memory(inputs * copies, section, boundary, voxel)

    monkeypatch.setattr(centerline, "_BATCH_POINTS", 300)
    assert extra(32) < 1.3 * extra(4)
    monkeypatch.setattr(centerline, "_BATCH_POINTS", 10**9)
    assert extra(32) > 3.0 * extra(4)


def test_group_median_matches_numpy():
    # numpy reference: np.median of each group's non-NaN values, bit for bit (NaN for none)
    rng = np.random.default_rng(0)
    for _ in range(50):
        lens = rng.integers(0, 12, rng.integers(1, 20))
        vals = rng.normal(size=lens.sum()) * 10 ** rng.uniform(-4, 4, lens.sum())
        vals[rng.random(len(vals)) < 0.15] = np.nan
        gid = np.repeat(np.arange(len(lens)), lens)
        got = centerline._group_median(vals, gid, len(lens))
        bounds = np.r_[0, np.cumsum(lens)]
        for i in range(len(lens)):
            v = vals[bounds[i] : bounds[i + 1]]
            v = v[~np.isnan(v)]
            if v.size:
                assert got[i] == np.median(v)
            else:
                assert np.isnan(got[i])


@pytest.mark.parametrize("at_junction", [False, True])
@pytest.mark.parametrize(("ring_radius", "traced"), [(1.7, False), (12.0, True)])
def test_loop_below_the_smoothing_scale_is_not_fitted(ring_radius, traced, at_junction):
    # A loop of circumference 2 pi R with R below the smoothing scale (here the 2-voxel floor, since the
    # tube radius is 1 voxel) is rejected, whether closed or an open path that leaves and re-enters one
    # junction; a ring of R = 12 with the same tube is traced, and its curvature is the circle's 1 / R
    # (textbook closed form), to 3 %.
    from vesselgeom.phantoms import ring, tube_phantom

    ph = tube_phantom(ring(ring_radius), 1.0)
    t = np.linspace(0, 2 * np.pi, max(int(2 * np.pi * ring_radius), 8), endpoint=False)
    path = ring(ring_radius).r(t)  # world mm, as the phantom places it
    if at_junction:  # from the junction round and back to it, both ends at the junction (not free)
        branch = BranchInput(np.vstack([path, path[:1]]), False, False, False)
    else:
        branch = BranchInput(path, True, False, False)
    (cl,) = trace_centerlines(
        [branch],
        section=CrossSection(ph.mask, ph.affine),
        boundary=BoundaryDistance(ph.mask, ph.affine),
        voxel_mm=1.0,
        settings=Settings(),
    )
    assert (cl is not None) == traced
    if traced:
        k = cl.frame.curvature[cl.measured]
        assert abs(np.mean(k) * ring_radius - 1.0) < 0.03


def _cut_one_by_one(branches, r_flat, scales, settings):
    """The junction cut written branch by branch, straight from its definition (the reference)."""
    paths, targets, at = [], {}, 0
    for i, b in enumerate(branches):
        path, r = b.path, r_flat[at : at + len(b.path)]
        at += len(b.path)
        if b.closed or len(path) < 4 or settings.junction_cut_radii <= 0:
            paths.append(path)
            continue
        lo, hi = 0, len(path)
        for side, free in ((0, b.free_start), (1, b.free_end)):
            if free:
                continue
            node = path[0] if side == 0 else path[-1]
            r_node = r[0] if side == 0 else r[-1]
            cut = (r_node if np.isfinite(r_node) else 0.0) + settings.junction_cut_radii * scales[i]
            far = [float(np.linalg.norm(p - node)) >= cut for p in path]
            if side == 0:
                new_lo, new_hi = (far.index(True) if any(far) else len(path)), hi
            else:
                new_lo, new_hi = lo, (len(path) - far[::-1].index(True) if any(far) else 0)
            kept = path[new_lo:new_hi]
            if len(kept) >= 4 and np.linalg.norm(kept[-1] - kept[0]) >= 2 * scales[i]:
                lo, hi = new_lo, new_hi
                targets[(i, side)] = node
        paths.append(path[lo:hi])
    return paths, targets


@pytest.mark.parametrize("seed", range(4))
def test_junction_cut_of_a_batch_equals_branch_by_branch(seed):
    # reference: the cut's definition applied to each branch alone (above); random branches with every
    # combination of free/junction ends, closed ones, NaN radii, 0-3 point paths and curved paths
    # whose far points come back near the node
    rng = np.random.default_rng(seed)
    branches, radii = [], []
    for _ in range(60):
        n = int(rng.integers(0, 30))  # empty paths too (the batch code guards them)
        t = np.linspace(0, rng.uniform(1, 4) * np.pi, n)
        path = np.stack([np.cos(t), np.sin(t), rng.uniform(-0.2, 0.2) * t], axis=1) * rng.uniform(2, 8)
        path += rng.normal(scale=0.2, size=path.shape)
        branches.append(
            BranchInput(path, bool(rng.random() < 0.1), bool(rng.random() < 0.4), bool(rng.random() < 0.4))
        )
        r = rng.uniform(0.5, 3, n)
        r[rng.random(n) < 0.1] = np.nan
        radii.append(r)
    scales = rng.uniform(0.5, 3, len(branches))
    for cut_radii in (1.0, 0.0, 3.0):
        settings = Settings(junction_cut_radii=cut_radii)
        r_flat = np.concatenate(radii)
        got_paths, got_targets = centerline._cut_near_junctions(branches, r_flat, scales, settings)
        ref_paths, ref_targets = _cut_one_by_one(branches, r_flat, scales, settings)
        for g, r in zip(got_paths, ref_paths, strict=True):
            np.testing.assert_array_equal(g, r)
        assert got_targets.keys() == ref_targets.keys()
        for key, node in ref_targets.items():
            np.testing.assert_array_equal(got_targets[key], node)
        if cut_radii == 1.0:  # the cases are not trivial: some ends cut, some refused
            assert 5 < len(ref_targets) < sum(not (b.free_start and b.free_end) for b in branches)


def _network_components(seed: int = 2, oblique: bool = False):
    """(CrossSection, BoundaryDistance, branches) of every component of a small network of many parts.

    ``oblique``: the same voxels on rotated axes (a rotated, anisotropic affine).
    """
    mask, affine = network_phantom((96, 96, 96), n_trees=14, depth=3, seed=seed, spacing=(0.7, 0.8, 1.1))
    if oblique:
        affine = affine.copy()
        affine[:3, :3] = random_rotation(seed) @ np.diag([0.7, 0.8, 1.1])
    settings = Settings()
    out = [
        (CrossSection(comp.mask, aff), boundary, inputs)
        for comp, aff, boundary, _, inputs in prepared_components(mask, affine, settings)
    ]
    return out, float(np.mean([0.7, 0.8, 1.1])), settings


@pytest.mark.parametrize("oblique", [False, True])
def test_components_traced_together_equal_each_alone(monkeypatch, oblique):
    # reference: each component's branches traced alone with its own sampler (trace_centerlines); traced
    # together in shared batches (also small ones that split components), every bit must be the same
    groups, voxel, settings = _network_components(oblique=oblique)
    assert len(groups) >= 5 and sum(len(g[2]) for g in groups) >= 20
    alone = [
        trace_centerlines(list(br), section=sec, boundary=bd, voxel_mm=voxel, settings=settings)
        for sec, bd, br in groups
    ]
    owners_per_batch = []
    real = centerline._trace_batch

    def spy(branches, *args):
        owners_per_batch.append({b.owner for b in branches})
        return real(branches, *args)

    monkeypatch.setattr(centerline, "_trace_batch", spy)
    for points in (10**9, 40):
        monkeypatch.setattr(centerline, "_BATCH_POINTS", points)
        owners_per_batch.clear()
        together = centerline.trace_components(groups, voxel_mm=voxel, settings=settings)
        if points == 10**9:  # one batch mixes the components
            assert max(len(o) for o in owners_per_batch) >= 2
        else:  # small batches split a component over several
            seen = [o for batch in owners_per_batch for o in batch]
            assert len(seen) > len(set(seen))
        assert [len(t) for t in together] == [len(g[2]) for g in groups]
        for ref_lines, got_lines in zip(alone, together, strict=True):
            for a, b in zip(ref_lines, got_lines, strict=True):
                _assert_same(a, b)
    # not vacuous: most branches were traced
    assert sum(cl is not None for lines in alone for cl in lines) >= 0.9 * sum(len(g[2]) for g in groups)
    assert centerline.trace_components([], voxel_mm=voxel, settings=settings) == []
