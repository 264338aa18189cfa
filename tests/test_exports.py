"""Exports: VTK XML PolyData centrelines, the branch-label volume and the QC picture."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import matplotlib.image as mpimg
import nibabel as nib
import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import phantoms as P
from vesselgeom.cli import main


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
