"""Tests for vesselgeom.measure: the batched branch table against the one-branch reference.

Independent references used below:
- ``branch_row`` (one branch at a time, scipy.signal.find_peaks for the inflection count, np.trapezoid,
  np.median, np.linalg.norm) is the reference for ``branch_rows`` / ``branch_columns``; its own
  numbers are checked against closed forms in test_metrics.py and test_pipeline.py.
- ``point_columns`` is the reference for ``point_columns_many``.
- METHODS.md closed forms: a sinusoid over N wavelengths has 2N - 1 interior inflections, a ring
  (closed planar circle) has none and no chord.

The centrelines are traced by the real pipeline stages (components, thinning, graph, pruning, tracing,
as in vesselgeom.pipeline) from voxelised analytic phantoms (vesselgeom.phantoms).
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from _prepared import prepared_components

from vesselgeom import phantoms as P
from vesselgeom.centerline import trace_centerlines
from vesselgeom.crosssection import CrossSection
from vesselgeom.errors import InputError
from vesselgeom.measure import (
    BranchContext,
    branch_columns,
    branch_row,
    branch_rows,
    point_columns,
    point_columns_many,
)
from vesselgeom.settings import Settings

# Floats must agree to 1e-12 relative. Every measure repeats branch_row's arithmetic element by element
# and sums with numpy's own pairwise order, except the chord: branch_row takes np.linalg.norm of one
# 3-vector (a BLAS dot product, which may fuse multiply-adds), the batched form sqrt(x^2 + y^2 + z^2)
# of all chords at once; the two differ by at most a few units in the last place (~1e-16), and so do
# distance_metric and inflection_count_metric, which divide by the chord.
REL = 1e-12


def _trace(mask: np.ndarray, affine: np.ndarray, settings: Settings, first_id: int = 1):
    """Centrelines and contexts of every branch of ``mask``, traced as vesselgeom.pipeline does."""
    voxel_mm = float(np.mean(np.abs(np.diag(affine)[:3])))
    lines, contexts = [], []
    for comp, aff, boundary, graph, inputs in prepared_components(mask, affine, settings):
        for b in graph.branches:
            kind, _ = graph.branch_kind(b)
            bid = first_id + len(contexts)
            # context flags vary so that their joining with the measured flags is exercised
            flags = ("touches_image_edge",) if bid % 3 == 0 else ()
            contexts.append(BranchContext(bid, comp.component_id, kind, b.start, b.end, flags))
        lines += trace_centerlines(
            inputs,
            section=CrossSection(comp.mask, aff),
            boundary=boundary,
            voxel_mm=voxel_mm,
            settings=settings,
        )
    return lines, contexts, voxel_mm


def _phantoms():
    yield "helix", P.tube_phantom(P.helix(10.0, 3.0, turns=2), 2.0)
    yield "sinusoid", P.tube_phantom(P.sinusoid(4.0, 40.0, periods=3), 2.0)
    yield "ring", P.tube_phantom(P.ring(12.0), 2.0)
    yield "straight", P.tube_phantom(P.straight(40.0, direction=(1, 2, 3)), 2.0)
    yield "y", P.y_phantom(2.0)
    yield "tree", P.tree_phantom(3, seed=2)


@pytest.fixture(scope="module")
def traced():
    """(name, lines, contexts, voxel_mm, settings) per case, all on 1 mm grids."""
    cases = []
    default = Settings()
    for name, ph in _phantoms():
        cases.append((name, *_trace(ph.mask, ph.affine, default), default))
    mask, affine = P.network_phantom((96, 96, 96), n_trees=3, depth=4, seed=1)
    cases.append(("network", *_trace(mask, affine, default), default))
    # trims longer than every branch: each measured stretch shrinks to its middle sample
    long_trims = Settings(end_trim_radii=50.0)
    for name, ph in _phantoms():
        if name in ("sinusoid", "y"):
            cases.append((f"{name}_trimmed", *_trace(ph.mask, ph.affine, long_trims), long_trims))
    return cases


def _assert_same(key: str, a, b) -> None:
    """Same type; ints, text and None equal; floats both NaN or within REL of each other."""
    assert type(a) is type(b), (key, a, b)
    if isinstance(a, float):
        assert np.isnan(a) == np.isnan(b), (key, a, b)
        if not np.isnan(a):
            assert abs(a - b) <= REL * max(abs(a), abs(b)), (key, a, b)
    else:
        assert a == b, (key, a, b)


def _assert_rows_equal(ref: list[dict], new: list[dict]) -> None:
    assert len(ref) == len(new)
    for r, q in zip(ref, new, strict=True):
        assert list(r) == list(q)  # same keys, same order
        for key, a in r.items():
            _assert_same(key, a, q[key])


def test_branch_rows_match_branch_row(traced):
    # Reference: branch_row one branch at a time, on every traced branch of every phantom, with one
    # failed fit (None) added to each case and a coarse voxel limit so radius flags occur too.
    seen = {"closed": 0, "none": 0, "single_measured": 0, "inflections": 0, "flags": set()}
    for _name, lines, contexts, voxel_mm, settings in traced:
        # tracing marks every sample of a loop as measured; branch_row's loop integrals ignore the mask,
        # so a loop with a partial mask checks that the batched form does so too
        loops = [
            dataclasses.replace(cl, measured=np.arange(len(cl.arc)) % 3 > 0)
            for cl in lines
            if cl is not None and cl.closed
        ]
        extra = [BranchContext(900 + i, 1, "loop", None, None) for i in range(len(loops))]
        lines = [*lines, *loops, None]
        contexts = [*contexts, *extra, BranchContext(999, 1, "internal", 4, None, ("touches_image_edge",))]
        for coarsest in (None, 1.5):
            kw = dict(settings=settings, voxel_mm=voxel_mm, coarsest_voxel_mm=coarsest)
            ref = [branch_row(cl, ctx, **kw) for cl, ctx in zip(lines, contexts, strict=True)]
            new = branch_rows(lines, contexts, **kw)
            _assert_rows_equal(ref, new)
            cols = branch_columns(lines, contexts, **kw)
            assert list(cols) == list(ref[0])  # a fitted row's keys, in order
            for key, values in cols.items():
                assert len(values) == len(ref)
                for a, b in zip((r[key] for r in ref), values, strict=True):
                    _assert_same(key, a, b)
            for r in ref:
                seen["flags"].update(f for f in r["flags"].split(";") if f)
        for cl, r in zip(lines, ref, strict=True):
            seen["closed"] += cl is not None and cl.closed
            seen["none"] += cl is None
            seen["single_measured"] += cl is not None and int(cl.measured.sum()) == 1
            seen["inflections"] += r["inflection_count"]
    # the cases the comparison must have covered
    assert seen["closed"] >= 1 and seen["none"] >= 1 and seen["single_measured"] >= 1
    assert seen["inflections"] >= 5
    assert {"fit_failed", "touches_image_edge", "short", "radius_below_validated"} <= seen["flags"]


def test_branch_rows_closed_forms(traced):
    # METHODS.md: 3 wavelengths of a sinusoid have 5 interior inflections; a ring (closed loop) has
    # no chord, so its distance metric is undefined (Bullitt et al. 2003), and no inflection.
    by_name = {c[0]: c for c in traced}
    _, lines, contexts, voxel_mm, settings = by_name["sinusoid"]
    (row,) = branch_rows(lines, contexts, settings=settings, voxel_mm=voxel_mm)
    assert row["inflection_count"] == 5
    _, lines, contexts, voxel_mm, settings = by_name["ring"]
    (row,) = branch_rows(lines, contexts, settings=settings, voxel_mm=voxel_mm)
    assert np.isnan(row["chord_mm"]) and np.isnan(row["distance_metric"])
    assert row["inflection_count"] == 0
    # the ring's length is its circumference 2 pi R (R = 12 mm) to within a voxel
    assert abs(row["length_mm"] - 2 * np.pi * 12.0) < 1.0


def test_branch_rows_order_and_empty(traced):
    # Rows follow the input order whatever it is: reversing the input reverses the rows.
    _, lines, contexts, voxel_mm, settings = next(c for c in traced if c[0] == "network")
    kw = dict(settings=settings, voxel_mm=voxel_mm)
    fwd = branch_rows(lines, contexts, **kw)
    back = branch_rows(lines[::-1], contexts[::-1], **kw)
    _assert_rows_equal(fwd[::-1], back)
    assert branch_rows([], [], **kw) == []
    failed = branch_rows([None], contexts[:1], **kw)
    _assert_rows_equal([branch_row(None, contexts[0], **kw)], failed)
    assert np.isnan(failed[0]["length_mm"]) and failed[0]["flags"].endswith("fit_failed")


def test_branch_rows_errors(traced):
    _, lines, contexts, voxel_mm, settings = traced[0]
    with pytest.raises(InputError, match="contexts"):
        branch_rows(lines, contexts[:0], settings=settings, voxel_mm=voxel_mm)
    # a centreline with no measured sample cannot be summarised (branch_row fails on it too)
    bare = dataclasses.replace(lines[0], measured=np.zeros_like(lines[0].measured))
    with pytest.raises(InputError, match="no measured sample"):
        branch_rows([bare], contexts[:1], settings=settings, voxel_mm=voxel_mm)


def test_point_columns_many_match(traced):
    # Reference: point_columns of each traced branch, concatenated in order (None contributes nothing).
    for _name, lines, contexts, _voxel_mm, _settings in traced:
        ids = [c.branch_id for c in contexts] + [999]
        lines = [*lines, None]
        parts = [point_columns(cl, b) for cl, b in zip(lines, ids, strict=True) if cl is not None]
        many = point_columns_many(lines, ids)
        assert list(many) == list(parts[0])
        for key in parts[0]:
            ref = np.concatenate([p[key] for p in parts])
            assert many[key].dtype == ref.dtype
            np.testing.assert_array_equal(many[key], ref)
    empty = point_columns_many([None], [1])
    assert all(len(v) == 0 for v in empty.values()) and list(empty) == list(parts[0])
    with pytest.raises(InputError, match="branch ids"):
        point_columns_many([None], [])
