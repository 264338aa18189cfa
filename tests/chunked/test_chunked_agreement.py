"""Chunked and in-memory runs agree: counts, total length, per-branch metrics, ends away from chunk seams.

The reference is ``vesselgeom.analyze`` on the whole mask (the in-memory pipeline, itself validated on
analytic phantoms in ``tests/test_pipeline.py``). Acceptance thresholds are those of the chunked-processing
issue: same branch and junction counts, total length within 1 %, per-branch metrics within 2 % (median over
branches matched by their nearest start/end points).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import phantoms as P

pytest.importorskip("dask")

from vesselgeom.chunked import LazyVolume, analyze_chunked  # noqa: E402
from vesselgeom.chunked.thinning import HALO_DEPTHS  # noqa: E402

METRICS = (
    "length_mm",
    "chord_mm",
    "mean_radius_mm",
    "mean_curvature_per_mm",
    "total_curvature_rad",
    "sum_of_angles_per_mm",
)


def _ends(df):
    s = df[["start_x_mm", "start_y_mm", "start_z_mm"]].to_numpy(float)
    e = df[["end_x_mm", "end_y_mm", "end_z_mm"]].to_numpy(float)
    return s, e


def _match(ref, got):
    """Index into ``got`` of the branch nearest each ``ref`` branch by (start, end), either way round."""
    rs, re_ = _ends(ref)
    gs, ge = _ends(got)
    same = np.maximum(
        np.linalg.norm(rs[:, None] - gs[None], axis=2), np.linalg.norm(re_[:, None] - ge[None], axis=2)
    )
    flip = np.maximum(
        np.linalg.norm(rs[:, None] - ge[None], axis=2), np.linalg.norm(re_[:, None] - gs[None], axis=2)
    )
    cost = np.minimum(same, flip)
    return cost.argmin(axis=1), cost.min(axis=1)


def assert_agree(ref, got):
    """The acceptance checks of the issue, one by one."""
    assert len(got.branches) == len(ref.branches)
    assert len(got.junctions) == len(ref.junctions)
    total_ref, total_got = ref.branches.length_mm.sum(), got.branches.length_mm.sum()
    assert abs(total_got - total_ref) <= 0.01 * total_ref
    idx, dist = _match(ref.branches, got.branches)
    assert len(set(idx.tolist())) == len(idx)  # one-to-one
    for name in METRICS:
        a = ref.branches[name].to_numpy(float)
        b = got.branches[name].to_numpy(float)[idx]
        ok = np.isfinite(a) & np.isfinite(b) & (np.abs(a) > 1e-9)
        rel = np.abs(b[ok] - a[ok]) / np.abs(a[ok])
        assert np.median(rel) <= 0.02, name
    return dist


def _lazy(ph):
    return LazyVolume(ph.mask, (), ph.mask.shape, ph.affine)


PHANTOMS = {
    "helix": lambda: P.tube_phantom(P.helix(turns=2), 2.5),
    "helix_rotated": lambda: P.tube_phantom(
        P.helix(turns=1.5), 2.0, spacing=(0.8, 0.8, 1.0), rotation=P.random_rotation(3, flip=True)
    ),
    "sinusoid": lambda: P.tube_phantom(P.sinusoid(), 2.0),
    "y": lambda: P.y_phantom(2.5),
    "tree": lambda: P.tree_phantom(3, root_radius_mm=3.0),
}


@pytest.mark.parametrize("name", sorted(PHANTOMS))
def test_phantoms_chunked_equal_in_memory(name):
    ph = PHANTOMS[name]()
    ref = vg.analyze(ph.mask, affine=ph.affine)
    got = analyze_chunked(_lazy(ph), chunk_size=24, scheduler="synchronous")
    dist = assert_agree(ref, got)
    # the truth of the phantom is met as well as in memory: as many branches as drawn curves,
    # less the merges at junctions (vesselgeom.phantoms: n_junctions)
    assert (got.junctions.degree >= 3).sum() == ph.n_junctions
    assert dist.max() < 1e-6  # with a halo of 3 depths the skeletons are voxel-identical here


@pytest.fixture(scope="module")
def network():
    mask, affine = P.network_phantom((96, 96, 96), n_trees=4, depth=4)
    ref = vg.analyze(mask, affine=affine)
    runs = {c: analyze_chunked(mask, spacing=1.0, chunk_size=c, scheduler="synchronous") for c in (32, 40)}
    return mask, ref, runs


def test_network_chunked_equal_in_memory(network):
    _, ref, runs = network
    assert len(ref.branches) >= 15  # a real network, not a trivial tube
    for got in runs.values():
        assert_agree(ref, got)


def test_two_chunk_sizes_agree(network):
    _, _, runs = network
    assert_agree(runs[32], runs[40])


def test_no_branch_ends_on_a_chunk_face(network):
    """A free end near a seam must be a real end of the vessel (also an end in the in-memory run)."""
    _, ref, runs = network
    ref_free = _free_end_points(ref)
    for size, got in runs.items():
        free = _free_end_points(got)
        assert len(free) == len(ref_free)
        # distance of each end (index space: spacing 1 mm, origin 0) to the nearest chunk face,
        # faces at k * size - 0.5
        to_face = np.abs((free + 0.5) - size * np.round((free + 0.5) / size)).min(axis=1)
        near = to_face < 2.0
        for p in free[near]:
            assert np.linalg.norm(ref_free - p, axis=1).min() < 1.0, (size, p)
        assert np.linalg.norm(free[:, None] - ref_free[None], axis=2).min(axis=1).max() < 1.0


def _free_end_points(res):
    """Centreline end points (mm) at end nodes (nodes that are not junctions)."""
    junction_nodes = set(res.junctions.node_id.tolist())
    s, e = _ends(res.branches)
    pts = []
    for i, row in enumerate(res.branches.itertuples()):
        for node, p in ((row.start_node, s[i]), (row.end_node, e[i])):
            if row.kind != "loop" and node not in junction_nodes:
                pts.append(p)
    return np.array(pts)


def test_run_json_records_chunking(network, tmp_path):
    _, _, runs = network
    got = runs[32]
    assert got.run["mode"] == "chunked"
    ch = got.run["chunking"]
    assert ch["chunk_size"] == 32 and ch["chunks"] == 27  # ceil(96 / 32)^3
    assert ch["halo"] == HALO_DEPTHS * ch["largest_depth_voxels"]
    # the network's largest radius is 5 voxels (network_phantom radius_voxels=(1, 5)); the city-block
    # depth bounds the Euclidean one from above and by at most sqrt(3) for a round tube
    assert 5 <= ch["largest_depth_voxels"] <= 5 * np.sqrt(3) + 1
    out = got.write(tmp_path / "out", exports=True)
    run = json.loads((out / "run.json").read_text())
    assert run["mode"] == "chunked" and run["counts"]["branches"] == len(got.branches)
    assert (out / "branches.csv").read_text().count("\n") == len(got.branches) + 1


def test_empty_mask_is_an_input_error():
    with pytest.raises(vg.InputError, match="mask is empty"):
        analyze_chunked(np.zeros((20, 20, 20), bool), spacing=1.0, chunk_size=10, scheduler="synchronous")


def test_points_table_is_mapped_from_the_scratch_folder_and_equals_memory(tmp_path):
    # reference: the in-memory run's points table. With voxel-identical skeletons (phantom above) the
    # branches come in the same order, so their point rows agree row for row.
    ph = PHANTOMS["tree"]()
    ref = vg.analyze(ph.mask, affine=ph.affine)
    got = analyze_chunked(_lazy(ph), chunk_size=24, scheduler="synchronous", scratch_dir=tmp_path)
    assert list(tmp_path.iterdir()) == []  # the temporary point files are gone
    values = got.points["arc_mm"].to_numpy()
    while not isinstance(values, np.memmap):  # the column is a view of a memory map, not a copy
        values = values.base
        assert values is not None
    idx, dist = _match(ref.branches, got.branches)
    assert dist.max() < 1e-6 and np.array_equal(idx, np.arange(len(idx)))
    assert len(got.points) == len(ref.points)
    for col in ("branch_id", "arc_mm", "x_mm", "curvature_per_mm", "torsion_per_mm", "radius_mm"):
        np.testing.assert_allclose(got.points[col], ref.points[col], rtol=1e-9, atol=1e-9, err_msg=col)


def test_missing_scratch_folder_is_an_input_error(tmp_path):
    with pytest.raises(vg.InputError, match="scratch folder does not exist"):
        analyze_chunked(
            np.ones((8, 8, 8), bool),
            spacing=1.0,
            chunk_size=8,
            scheduler="synchronous",
            scratch_dir=tmp_path / "no",
        )


def test_a_failing_run_leaves_no_point_files_open(tmp_path, monkeypatch):
    from vesselgeom.chunked import run

    def fail(*args, **kwargs):
        raise RuntimeError("stop after tracing")

    monkeypatch.setattr(run, "_add_junctions", fail)
    ph = PHANTOMS["y"]()
    # the traceback is kept alive (as an interactive session keeps the last one), and with it the frames
    with pytest.raises(RuntimeError, match="stop after tracing") as failure:
        analyze_chunked(_lazy(ph), chunk_size=24, scheduler="synchronous", scratch_dir=tmp_path)
    assert failure.tb is not None
    assert list(tmp_path.iterdir()) == []
    fds = [os.readlink(fd) for fd in Path("/proc/self/fd").iterdir() if _readable_link(fd)]
    assert not [f for f in fds if f.startswith(str(tmp_path) + "/")]  # closed, even with the traceback alive


def _readable_link(fd) -> bool:
    try:
        os.readlink(fd)
    except OSError:
        return False
    return True
