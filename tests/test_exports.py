"""Exports: VTK XML PolyData centrelines, the branch-label volume and the QC picture."""

from __future__ import annotations

import os
import xml.etree.ElementTree as ET
from pathlib import Path
from xml.sax.saxutils import quoteattr

import matplotlib.image as mpimg
import nibabel as nib
import numpy as np
import pandas as pd
import pytest

import vesselgeom as vg
from vesselgeom import exports
from vesselgeom import phantoms as P
from vesselgeom.cli import main
from vesselgeom.exports import write_vtp


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    # a tree (junctions, terminal ends) and a ring (a closed loop) in one mask, oblique affine,
    # micron units in the file (the label volume must keep the file's own header and affine)
    tree = P.tree_phantom(3, spacing=(0.5, 0.5, 0.8), rotation=P.random_rotation(3, flip=True))
    mask = tree.mask.copy()
    ring = P.tube_phantom(P.ring(6.0), 1.6, spacing=(0.5, 0.5, 0.8))
    s = tuple(min(a, b) for a, b in zip(mask.shape, ring.mask.shape, strict=True))
    mask[: s[0], : s[1], -s[2] :] |= ring.mask[: s[0], : s[1], : s[2]]
    affine_um = tree.affine.copy()
    affine_um[:3, :] *= 1000.0
    img = nib.Nifti1Image(mask.astype(np.uint8), affine_um)
    img.header.set_xyzt_units("micron")
    tmp = tmp_path_factory.mktemp("exp")
    src = tmp / "mask.nii.gz"
    nib.save(img, src)
    out = tmp / "out"
    assert main(["analyze", str(src), "--out", str(out), "--plots", "--quiet"]) == 0
    return src, out


def test_vtp_is_xml_with_matching_counts(analysed):
    # VTK XML PolyData (open standard): Piece NumberOfPoints equals the rows of points.csv and
    # NumberOfLines the rows of branches.csv; offsets end at the connectivity length.
    import pandas as pd

    _, out = analysed
    points = pd.read_csv(out / "points.csv")
    branches = pd.read_csv(out / "branches.csv")
    piece = ET.parse(out / "centerlines.vtp").getroot().find("PolyData/Piece")
    assert int(piece.get("NumberOfPoints")) == len(points)
    assert int(piece.get("NumberOfLines")) == len(branches)
    arrays = {a.get("Name"): a for a in piece.iter("DataArray")}
    xyz = np.array(arrays["Points"].text.split(), float).reshape(-1, 3)
    assert np.allclose(np.sort(xyz[:, 0]), np.sort(points["x_mm"]), atol=1e-6)
    conn = np.array(arrays["connectivity"].text.split(), int)
    offsets = np.array(arrays["offsets"].text.split(), int)
    assert offsets[-1] == len(conn) and conn.max() == len(points) - 1
    n_loops = int((branches["kind"] == "loop").sum())
    assert n_loops >= 1 and len(conn) == len(points) + n_loops  # loops repeat their first point
    point_data = {a.get("Name"): a for a in piece.find("PointData").iter("DataArray")}
    for name in ("curvature_per_mm", "torsion_per_mm", "radius_mm", "branch_id"):
        assert len(point_data[name].text.split()) == len(points)
    cell_ids = piece.find("CellData").find("DataArray").text.split()
    assert sorted(map(int, cell_ids)) == sorted(branches["branch_id"])


def test_label_volume_matches_input_grid(analysed):
    import pandas as pd

    src, out = analysed
    inp = nib.load(src)
    lab = nib.load(out / "branch_labels.nii.gz")
    assert lab.shape == inp.shape
    assert np.allclose(lab.affine, inp.affine)
    assert lab.header.get_xyzt_units()[0] == "micron"
    labels = np.asarray(lab.dataobj)
    mask = np.asarray(inp.dataobj) > 0
    assert not labels[~mask].any()  # labels only inside the mask
    assert labels[mask].all()  # every mask voxel of an analysed component has a branch
    ids = set(pd.read_csv(out / "branches.csv")["branch_id"])
    assert set(np.unique(labels[mask])) <= ids


def test_qc_png_and_profiles(analysed):
    import pandas as pd

    _, out = analysed
    img = mpimg.imread(out / "qc.png")
    assert img.shape[0] > 300 and img.shape[1] > 800 and img.std() > 0.05
    n = len(pd.read_csv(out / "branches.csv"))
    assert len(list((out / "profiles").glob("branch_*.png"))) == n


def test_exports_can_be_switched_off(tmp_path):
    ph = P.tube_phantom(P.straight(15.0), 2.0)
    out = vg.analyze(ph.mask, affine=ph.affine).write(tmp_path / "o", exports=False)
    assert not (out / "qc.png").exists() and not (out / "centerlines.vtp").exists()
    assert (out / "branches.csv").exists()


# The reference below is write_vtp and its _fmt as they were before write_vtp streamed its output,
# copied verbatim (renamed only): the streamed file must keep exactly these bytes.


def _reference_fmt(values: np.ndarray, fmt: str) -> str:
    flat = np.asarray(values).ravel()
    return (
        " ".join(fmt % v if np.isfinite(v) else "nan" for v in flat)
        if flat.dtype.kind == "f"
        else " ".join(str(int(v)) for v in flat)
    )


def _reference_write_vtp(points: pd.DataFrame, branches: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write ``points.csv``-shaped data as a VTK XML PolyData file of polylines, one per branch.

    Parameters
    ----------
    points : DataFrame
        Columns branch_id, arc_mm, x_mm, y_mm, z_mm, curvature_per_mm, torsion_per_mm, radius_mm.
    branches : DataFrame
        Columns branch_id and kind (loops are closed by repeating their first point).
    path : path
        Destination ``.vtp`` file.
    """
    path = Path(path)
    loops = set(branches.loc[branches["kind"] == "loop", "branch_id"].astype(int))
    ids = points["branch_id"].to_numpy(int)
    order = np.argsort(ids, kind="stable")
    ids = ids[order]
    starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]]) if len(ids) else np.zeros(0, int)
    ends = np.r_[starts[1:], len(ids)] if len(ids) else np.zeros(0, int)
    connectivity, offsets, cell_ids = [], [], []
    count = 0
    for s, e in zip(starts, ends, strict=True):
        idx = np.arange(s, e)
        if ids[s] in loops and len(idx) > 2:
            idx = np.r_[idx, s]
        connectivity.append(idx)
        count += len(idx)
        offsets.append(count)
        cell_ids.append(ids[s])
    conn = np.concatenate(connectivity) if connectivity else np.zeros(0, int)
    xyz = points[["x_mm", "y_mm", "z_mm"]].to_numpy(float)[order]

    def arr(name, values, vtype, fmt="%.9g", ncomp=1):
        return (
            f'<DataArray type="{vtype}" Name={quoteattr(name)} NumberOfComponents="{ncomp}" '
            f'format="ascii">{_reference_fmt(values, fmt)}</DataArray>'
        )

    point_data = [
        arr("branch_id", ids, "Int32"),
        arr("arc_mm", points["arc_mm"].to_numpy(float)[order], "Float64"),
        arr("curvature_per_mm", points["curvature_per_mm"].to_numpy(float)[order], "Float64"),
        arr("torsion_per_mm", points["torsion_per_mm"].to_numpy(float)[order], "Float64"),
        arr("radius_mm", points["radius_mm"].to_numpy(float)[order], "Float64"),
    ]
    text = "\n".join(
        [
            '<?xml version="1.0"?>',
            '<VTKFile type="PolyData" version="1.0" byte_order="LittleEndian">',
            "<PolyData>",
            f'<Piece NumberOfPoints="{len(xyz)}" NumberOfVerts="0" NumberOfLines="{len(cell_ids)}" '
            'NumberOfStrips="0" NumberOfPolys="0">',
            '<PointData Scalars="curvature_per_mm">',
            *point_data,
            "</PointData>",
            "<CellData>",
            arr("branch_id", np.asarray(cell_ids, int), "Int32"),
            "</CellData>",
            "<Points>",
            arr("Points", xyz, "Float64", ncomp=3),
            "</Points>",
            "<Lines>",
            arr("connectivity", conn, "Int64"),
            arr("offsets", np.asarray(offsets, int), "Int64"),
            "</Lines>",
            "</Piece>",
            "</PolyData>",
            "</VTKFile>",
            "",
        ]
    )
    path.write_text(text)
    return path


def _synthetic(seed=0, n_branches=3, extra_rows=0):
    """Points of a few branches, rows not sorted by branch, with NaN, +-inf and -0.0 values.

    Branch 7 is a loop of 5 points (closed), branch 9 a loop of 2 points (too short to close),
    branch 11 a loop without points; ``extra_rows`` adds random rows to random branches 20..29.
    """
    rng = np.random.default_rng(seed)
    ids = [5] * 4 + [2] * 3 + [9] * 2 + [7] * 5
    ids += list(rng.integers(20, 20 + n_branches, extra_rows))
    n = len(ids)
    scale = 10.0 ** rng.integers(-12, 12, n)
    torsion = rng.normal(size=n) * scale
    torsion[[1, 4, 8]] = [np.nan, np.inf, -np.inf]
    torsion[2] = -0.0
    torsion[5] = -np.nan
    points = pd.DataFrame(
        {
            "branch_id": ids,
            "arc_mm": np.arange(n) * 0.25,
            "x_mm": rng.normal(size=n) * 30.0,
            "y_mm": rng.normal(size=n) / 3.0,
            "z_mm": rng.normal(size=n) * scale,
            "curvature_per_mm": np.abs(rng.normal(size=n)),
            "torsion_per_mm": torsion,
            "radius_mm": np.where(rng.random(n) < 0.2, np.nan, rng.random(n) * 2.0),
        }
    )
    branch_ids = [2, 5, 7, 9, 11, *range(20, 20 + n_branches)]
    kinds = ["terminal", "internal", "loop", "loop", "loop"] + ["loop", "isolated"] * n_branches
    branches = pd.DataFrame({"branch_id": branch_ids, "kind": kinds[: len(branch_ids)]})
    return points, branches


@pytest.mark.parametrize("block", [1, 2, 3, 4, 7, 10**6])
@pytest.mark.parametrize("extra_rows", [0, 500])
def test_streamed_vtp_equals_reference_bytes(tmp_path, monkeypatch, block, extra_rows):
    points, branches = _synthetic(seed=block, extra_rows=extra_rows)
    reference = _reference_write_vtp(points, branches, tmp_path / "reference.vtp").read_bytes()
    monkeypatch.setattr(exports, "_VTP_BLOCK", block)
    path = write_vtp(points, branches, tmp_path / "streamed.vtp")
    assert path == tmp_path / "streamed.vtp"
    assert path.read_bytes() == reference  # the pre-streaming implementation is the reference
    assert sorted(p.name for p in tmp_path.iterdir()) == ["reference.vtp", "streamed.vtp"]


def test_streamed_vtp_of_empty_tables_equals_reference(tmp_path, monkeypatch):
    points, branches = _synthetic()
    points, branches = points.iloc[:0], branches.iloc[:0]
    reference = _reference_write_vtp(points, branches, tmp_path / "reference.vtp").read_bytes()
    monkeypatch.setattr(exports, "_VTP_BLOCK", 3)
    assert write_vtp(points, branches, tmp_path / "streamed.vtp").read_bytes() == reference
    # xml.etree.ElementTree (standard library XML parser): a well-formed, empty Piece
    piece = ET.parse(tmp_path / "streamed.vtp").getroot().find("PolyData/Piece")
    assert piece.get("NumberOfPoints") == "0" and piece.get("NumberOfLines") == "0"


@pytest.mark.parametrize("block", [3, 10**6])
def test_streamed_vtp_parses_as_vtk_polydata(tmp_path, monkeypatch, block):
    points, branches = _synthetic()
    monkeypatch.setattr(exports, "_VTP_BLOCK", block)
    path = write_vtp(points, branches, tmp_path / "c.vtp")
    # xml.etree.ElementTree (standard library XML parser) reads the file; counts follow the VTK XML
    # PolyData format: NumberOfPoints points of 3 components, one polyline cell per branch
    piece = ET.parse(path).getroot().find("PolyData/Piece")
    n = len(points)
    assert int(piece.get("NumberOfPoints")) == n
    assert int(piece.get("NumberOfLines")) == 4  # branches 2, 5, 7, 9 have points
    arrays = {a.get("Name"): a for a in piece.find("PointData").iter("DataArray")}
    # Python's format(v, ".9g") (C99 %g) is the reference text; every non-finite value is "nan"
    order = np.argsort(points["branch_id"].to_numpy(), kind="stable")
    torsion = points["torsion_per_mm"].to_numpy()[order]
    want = [format(v, ".9g") if np.isfinite(v) else "nan" for v in torsion]
    assert arrays["torsion_per_mm"].text.split(" ") == want
    xyz = piece.find("Points/DataArray").text.split(" ")
    assert len(xyz) == 3 * n
    assert xyz[:3] == [format(v, ".9g") for v in points.loc[order[0], ["x_mm", "y_mm", "z_mm"]]]
    lines = {a.get("Name"): a.text.split(" ") for a in piece.find("Lines").iter("DataArray")}
    # sorted ids: 2 x3, 5 x4, 7 x5 (loop, closed by repeating point 7), 9 x2 (too short to close)
    assert lines["offsets"] == ["3", "7", "13", "15"]
    assert lines["connectivity"][7:15] == ["7", "8", "9", "10", "11", "7", "12", "13"]
    cells = piece.find("CellData/DataArray").text.split(" ")
    assert cells == ["2", "5", "7", "9"]


def test_failed_vtp_write_leaves_no_file(tmp_path, monkeypatch):
    points, branches = _synthetic(extra_rows=40)
    path = tmp_path / "c.vtp"
    path.write_text("old")
    radius = points["radius_mm"].astype(object)
    radius[len(points) - 1] = "wide"  # text in the last row: found only by the last block
    points["radius_mm"] = radius
    # the reference fails on the same table (Python's float() refuses the text)
    with pytest.raises(ValueError):
        _reference_write_vtp(points, branches, tmp_path / "reference.vtp")
    monkeypatch.setattr(exports, "_VTP_BLOCK", 3)
    with pytest.raises(ValueError):
        write_vtp(points, branches, path)
    assert path.read_text() == "old"  # the old file is untouched
    assert sorted(p.name for p in tmp_path.iterdir()) == ["c.vtp"]  # no temporary file is left


def test_write_vtp_memory_does_not_grow_with_sorted_points(tmp_path, monkeypatch):
    # rows in branch order (as both pipelines write them): beyond the table, write_vtp holds one block
    # of values and per-branch arrays, so 4x the points (same points per branch) must not need 4x memory
    import tracemalloc

    import vesselgeom.exports as exports

    monkeypatch.setattr(exports, "_VTP_BLOCK", 4096)

    def peak(n: int) -> int:
        rng = np.random.default_rng(n)
        names = ("arc_mm", "x_mm", "y_mm", "z_mm", "curvature_per_mm", "torsion_per_mm", "radius_mm")
        points = pd.DataFrame({"branch_id": np.repeat(np.arange(1, n // 100 + 1), 100)})
        for name in names:
            points[name] = rng.random(n)
        branches = pd.DataFrame({"branch_id": np.arange(1, n // 100 + 1), "kind": "internal"})
        tracemalloc.start()
        try:
            write_vtp(points, branches, tmp_path / f"p{n}.vtp")
            return tracemalloc.get_traced_memory()[1]
        finally:
            tracemalloc.stop()

    small, large = peak(40_000), peak(160_000)
    assert large < 1.3 * small, (small, large)
