"""End-to-end accuracy of ``vesselgeom.analyze`` on voxelised analytic phantoms.

Truth comes from the closed forms (do Carmo 1976; METHODS.md) through ``vesselgeom.phantoms``, whose
numbers are themselves checked against sympy in ``test_phantoms.py``. Tolerances are the acceptance
targets of the core-pipeline issue; the direction of known errors is written beside each.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import phantoms as P
from vesselgeom import pipeline
from vesselgeom.validation import Case, curve_for, run_case

# radius >= 2 voxels along every axis, anisotropy up to 2:1, rotated, flipped and permuted affines
GRID = [
    ((1.0, 1.0, 1.0), 0, False, False),
    ((0.5, 0.5, 1.0), 1, True, False),
    ((1.0, 0.5, 1.0), 2, True, True),
]


def _case(curve, spacing, seed, flip, permute, radius_voxels=2.0):
    return run_case(Case(curve, radius_voxels, spacing, seed, flip=flip, permute=permute))


@pytest.mark.parametrize("curve", ["helix_right", "helix_left"])
@pytest.mark.parametrize("spacing,seed,flip,permute", GRID)
def test_helix_curvature_torsion_length_dm(curve, spacing, seed, flip, permute):
    # Helix closed forms: kappa = a/(a^2+b^2), tau = +-b/(a^2+b^2), DM over whole turns sqrt(a^2+b^2)/b
    # (do Carmo 1976; Bullitt et al. 2003). Thinning retracts ends (length short); extension undoes it.
    row = _case(curve, spacing, seed, flip, permute)
    assert row["n_branches"] == 1 and row["n_junctions"] == 0
    assert abs(row["curvature_err"]) <= 0.03
    assert abs(row["torsion_err"]) <= 0.08
    assert np.sign(row["torsion_abs_per_mm"]) == np.sign(row["true_torsion_per_mm"])
    assert abs(row["dm_err"]) <= 0.02
    # length within one tube radius + 1 %
    true_len = row["length_err_mm"] / row["length_err"] if row["length_err"] else np.inf
    assert abs(row["length_err_mm"]) <= 2.0 * max(spacing) + 0.01 * true_len
    assert row["inflections"] == 0


@pytest.mark.parametrize("spacing,seed,flip,permute", GRID)
def test_sinusoid_inflections_and_planarity(spacing, seed, flip, permute):
    # N periods of a sinusoid have 2N-1 interior inflections (METHODS.md); planar curve: tau = 0.
    row = _case("sinusoid", spacing, seed, flip, permute)
    assert row["n_branches"] == 1
    assert row["inflections"] == row["inflections_true"] == 5
    assert abs(row["torsion_abs_per_mm"]) <= 0.1 * row["curvature_abs_per_mm"]
    assert abs(row["dm_err"]) <= 0.02


@pytest.mark.parametrize("spacing,seed,flip,permute", GRID)
def test_sinusoid_mean_curvature(spacing, seed, flip, permute):
    # mean_curvature_per_mm covers the points marked in_summary (ends trimmed by about a radius), so it
    # is compared with the analytic mean of |kappa| over that same stretch (curve_truth on the sub-range,
    # checked against 4 N arctan(k) per N wavelengths in test_phantoms.py); target 3 %.
    row = _case("sinusoid", spacing, seed, flip, permute)
    assert abs(row["curvature_err"]) <= 0.03


@pytest.mark.parametrize("spacing,seed,flip,permute", GRID)
def test_ring_is_one_closed_branch(spacing, seed, flip, permute):
    # Circle of radius R: kappa = 1/R, closed, no chord, so the distance metric is undefined (NaN).
    row = _case("ring", spacing, seed, flip, permute)
    assert row["n_branches"] == 1 and row["n_junctions"] == 0
    assert row["kind"] == "loop"
    assert abs(row["curvature_err"]) <= 0.03
    assert np.isnan(row["dm"])


@pytest.mark.parametrize("spacing,seed,flip,permute", GRID)
def test_straight_tube_distance_metric(spacing, seed, flip, permute):
    # A straight segment has DM = 1 (Bullitt et al. 2003).
    row = _case("straight", spacing, seed, flip, permute)
    assert row["n_branches"] == 1
    assert abs(row["dm"] - 1.0) <= 0.01
    assert row["inflections"] == 0


@pytest.mark.parametrize("seed", [0, 1])
def test_y_bifurcation_topology(seed):
    # Three straight arms meeting at one point: three branches, one junction of degree 3.
    ph = P.y_phantom(2.0, spacing=(0.5, 0.5, 0.5), rotation=P.random_rotation(seed, flip=bool(seed)))
    res = vg.analyze(ph.mask, affine=ph.affine)
    assert len(res.branches) == 3
    assert len(res.junctions) == 1
    assert res.junctions.loc[0, "degree"] == 3
    assert set(res.branches["kind"]) == {"terminal"}
    assert sorted(map(int, res.junctions.loc[0, "branch_ids"].split(";"))) == sorted(
        res.branches["branch_id"]
    )


def test_same_helix_under_flipped_affine_gives_same_metrics():
    # The same physical (right-handed) helix stored under two affines, one with a flipped axis: world
    # geometry is identical, so every metric agrees within 1 % and torsion keeps its sign.
    curve = curve_for("helix_right", 2.0)
    rot = P.random_rotation(7)
    a = P.tube_phantom(curve, 2.0, spacing=(0.5, 0.5, 0.5), rotation=rot)
    b = P.tube_phantom(curve, 2.0, spacing=(0.5, 0.5, 0.5), rotation=rot @ np.diag([1, -1, 1]))
    assert np.linalg.det(a.affine[:3, :3]) * np.linalg.det(b.affine[:3, :3]) < 0
    ra, rb = (vg.analyze(p.mask, affine=p.affine).branches.iloc[0] for p in (a, b))
    for col in ["length_mm", "distance_metric", "mean_curvature_per_mm", "mean_torsion_per_mm"]:
        assert rb[col] == pytest.approx(ra[col], rel=0.01), col
    assert ra["mean_torsion_per_mm"] > 0 and rb["mean_torsion_per_mm"] > 0


def test_identical_tables_for_identical_input(tmp_path):
    ph = P.tree_phantom(3, spacing=(0.6, 0.6, 0.6))
    paths = []
    for name in ("a", "b"):
        out = vg.analyze(ph.mask, affine=ph.affine).write(tmp_path / name)
        paths.append(out)
    for table in ("branches.csv", "points.csv", "junctions.csv", "columns.json"):
        assert (paths[0] / table).read_bytes() == (paths[1] / table).read_bytes(), table


def test_tree_counts_and_outputs(tmp_path):
    # A binary tree of depth 3: 7 branches and 3 junctions of degree 3 by construction.
    ph = P.tree_phantom(3, spacing=(0.5, 0.5, 0.5))
    res = vg.analyze(ph.mask, affine=ph.affine)
    assert len(res.branches) == 7
    assert len(res.junctions) == 3
    assert (res.junctions["degree"] == 3).all()
    assert (res.branches["kind"] == "internal").sum() == 2
    # every branch's points are in points.csv and their arc lengths end at the branch length
    last = res.points.groupby("branch_id")["arc_mm"].max()
    assert np.allclose(last.values, res.branches.set_index("branch_id").loc[last.index, "length_mm"])
    out = res.write(tmp_path / "tree")
    assert {p.name for p in out.iterdir()} == {
        "branches.csv",
        "points.csv",
        "junctions.csv",
        "columns.json",
        "run.json",
        "centerlines.vtp",
        "branch_labels.nii.gz",
        "qc.png",
    }


def test_mask_without_branches_gives_empty_tables(tmp_path):
    # A blob too small to hold a branch: tables with headers and no rows, not a crash.
    mask = np.zeros((12, 12, 12), bool)
    mask[5:7, 5:7, 5:7] = True
    with pytest.warns(vg.VesselgeomWarning, match="single voxel"):
        res = vg.analyze(mask, spacing=1.0, min_component_voxels=1)
    assert len(res.branches) == 0 and list(res.branches.columns)[0] == "branch_id"
    out = res.write(tmp_path / "empty")
    assert (out / "branches.csv").read_text().startswith("branch_id,")
    assert (out / "centerlines.vtp").exists() and (out / "qc.png").exists()
    assert len((out / "branches.csv").read_text().splitlines()) == 1


def test_specks_thinned_to_one_voxel_give_one_warning():
    # Twelve 2x2x2 specks, each thinning to one voxel: one warning naming the count and the first ten
    # component ids (not twelve warnings), and one entry in run.json.
    mask = np.zeros((12, 12, 60), bool)
    for k in range(12):
        mask[5:7, 5:7, 5 * k : 5 * k + 2] = True
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = vg.analyze(mask, spacing=1.0, min_component_voxels=1)
    msgs = [str(w.message) for w in caught if issubclass(w.category, vg.VesselgeomWarning)]
    assert len(msgs) == 1
    assert "12 components 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, ... (2 more) thinned to a single voxel" in msgs[0]
    assert [w for w in res.run["warnings"] if "single voxel" in w] == [msgs[0].split(": ", 1)[1]]
    assert len(res.branches) == 0


def test_empty_mask_is_an_input_error():
    with pytest.raises(vg.InputError, match="empty"):
        vg.analyze(np.zeros((5, 5, 5), bool), spacing=1.0)


def test_run_json_records_provenance(tmp_path):
    import json

    ph = P.tube_phantom(P.straight(20.0), 2.0, spacing=(0.5, 0.5, 1.0))
    out = vg.analyze(ph.mask, affine=ph.affine, prune_ratio=2.0).write(tmp_path / "r")
    run = json.loads((out / "run.json").read_text())
    assert run["settings"]["prune_ratio"] == 2.0
    assert run["input"]["voxel_size_mm"] == pytest.approx([0.5, 0.5, 1.0])
    assert len(run["input"]["sha256"]) == 64
    assert "Research use only" in run["caution"]
    assert set(run["timings_seconds"]) >= {"thin", "graph", "trace"}


def test_edge_flag_marks_only_branches_cut_by_the_field_of_view():
    # A Y whose parent arm is cut by the image face: only that branch is truncated.
    ph = P.y_phantom(2.0, spacing=(0.5, 0.5, 0.5))
    # the parent arm runs towards -x (the first index axis here): cut the volume 10 mm into it
    cut = int(round(10.0 / 0.5))
    res = vg.analyze(ph.mask[cut:], affine=ph.affine)
    flagged = res.branches["flags"].str.contains("touches_image_edge")
    assert len(res.branches) == 3 and flagged.sum() == 1
    parent = res.branches.loc[flagged].iloc[0]
    assert min(parent["start_x_mm"], parent["end_x_mm"]) < -15.0  # the arm towards -x


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_y_bifurcation_angles_and_straight_arms(seed):
    # Murray's-law symmetric optimum (Murray 1926, METHODS.md): daughters at 37.47 degrees from the
    # parent's direction, so 74.9 degrees between them and 142.5 degrees between parent and each daughter
    # (measured between directions pointing away from the junction). Arms are straight: curvature ~ 0.
    ph = P.y_phantom(2.0, spacing=(0.5, 0.5, 0.5), rotation=P.random_rotation(seed, flip=bool(seed % 2)))
    res = vg.analyze(ph.mask, affine=ph.affine)
    angles = sorted(float(p.split(":")[1]) for p in res.junctions.loc[0, "angles_deg"].split(";"))
    assert angles[0] == pytest.approx(74.9, abs=3.0)
    assert angles[1] == pytest.approx(142.5, abs=3.0) and angles[2] == pytest.approx(142.5, abs=3.0)
    assert (res.branches["max_curvature_per_mm"] < 0.02).all()
    assert (res.branches["inflection_count"] == 0).all()


def test_free_ends_at_edge_follows_its_definition():
    # Reference: the definition itself, worked by hand. Image of shape (20, 30, 40), crop at offset
    # (2, 0, 5), radius 1.5 mm everywhere, 0.5 mm voxels: an end is near a face when its distance to the
    # nearest face (in voxels) is at most 1.5 / 0.5 + 1 = 4.
    from vesselgeom.pipeline import free_ends_at_edge

    calls = []

    def radius_at(ijk):
        calls.append(len(ijk))
        return np.full(len(ijk), 1.5)

    paths = [
        np.array([[2.0, 10, 10], [8, 10, 10]]),  # start at image index 4 on axis 0: 4 voxels, near
        np.array([[8.0, 10, 10], [3, 10, 10]]),  # end at index 5: 5 voxels from the face, not near
        np.array([[2.0, 10, 10], [8, 10, 10]]),  # near end, but it is a junction end (not free)
        np.array([[9.0, 15, 20], [9, 15, 31]]),  # end at image x = 36: 3 voxels from the face 39
        np.array([[9.0, 15, 20], [9, 15, 25]]),  # both ends far from every face
    ]
    frees = [(True, False), (False, True), (False, True), (False, True), (True, True)]
    got = free_ends_at_edge(
        paths, frees, offset=np.array([2, 0, 5]), radius_at=radius_at, voxel_mm=0.5, shape=(20, 30, 40)
    )
    assert got.tolist() == [True, False, False, True, False]
    assert calls == [6]  # one radius query for all six free ends
    none_free = free_ends_at_edge(
        paths, [(False, False)] * 5, offset=np.zeros(3), radius_at=radius_at, voxel_mm=0.5, shape=(20, 30, 40)
    )
    assert not none_free.any() and calls == [6]  # and no query without free ends


@pytest.mark.parametrize("batch", ["default", "small batches"])
def test_small_components_traced_together_give_the_same_tables(monkeypatch, batch):
    # reference: the same mask analysed with every component's graph built and traced alone (grouping
    # switched off): the three tables must be identical (pandas' DataFrame.equals). "small batches": the
    # limits are lowered so that groups are cut by them while components are still coming, not only
    # before a large component and at the end.
    mask, affine = P.network_phantom((96, 96, 96), n_trees=14, depth=3, seed=2, spacing=(0.7, 0.8, 1.1))
    calls = []  # per call: (components, branches, bytes held)
    real = pipeline.trace_components

    def spy(groups, **kw):
        held = sum(sec._data.nbytes + bd.nbytes for sec, bd, _ in groups)
        calls.append((len(groups), sum(len(br) for _, _, br in groups), held))
        return real(groups, **kw)

    monkeypatch.setattr(pipeline, "trace_components", spy)
    graph_calls = []  # per call of build_graphs: (skeletons, bytes of their crops and skeletons)
    real_graphs = pipeline.build_graphs

    def spy_graphs(skeletons):
        graph_calls.append((len(skeletons), 2 * sum(s.nbytes for s in skeletons)))  # crop and skeleton
        return real_graphs(skeletons)

    monkeypatch.setattr(pipeline, "build_graphs", spy_graphs)
    if batch == "small batches":
        monkeypatch.setattr(pipeline, "_GROUP_BYTES", 120_000)
        monkeypatch.setattr(pipeline, "_BATCH_BRANCHES", 3)
        monkeypatch.setattr(pipeline, "_GRAPH_BATCH", 2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", vg.VesselgeomWarning)
        together = vg.analyze(mask, affine=affine)
        grouped, graphs_grouped = list(calls), list(graph_calls)
        monkeypatch.setattr(pipeline, "_GROUP_MAX_VOXELS", 0)
        alone = vg.analyze(mask, affine=affine)
    assert sum(c[0] for c in grouped) >= 5 and calls == grouped  # grouped, then not at all
    assert sum(c[0] for c in graphs_grouped) >= 5 and graph_calls == graphs_grouped
    if batch == "small batches":
        # every group within the limits unless it is a single component; some cut by them
        assert all(c[0] == 1 or (c[1] <= 3 and c[2] <= 120_000) for c in grouped)
        assert len(grouped) >= 3 and any(c[0] > 1 for c in grouped)
        assert all(c[0] == 1 or (c[0] <= 2 and c[1] <= 120_000) for c in graphs_grouped)
        assert len(graphs_grouped) >= 3 and any(c[0] == 2 for c in graphs_grouped)
    else:
        assert max(c[0] for c in grouped) >= 5  # several components in one call
        assert max(c[0] for c in graphs_grouped) >= 5  # several skeletons in one graph pass
    assert together.branches["component_id"].nunique() >= 5
    assert len(together.junctions) > 0 and together.junctions["component_id"].nunique() >= 2
    for table in ("branches", "points", "junctions"):
        assert getattr(together, table).equals(getattr(alone, table)), table
