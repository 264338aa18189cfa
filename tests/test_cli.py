"""The command line: outputs on success; one-line errors, status 2 and no outputs on bad input."""

from __future__ import annotations

import os
import subprocess
import sys

import nibabel as nib
import numpy as np
import pytest

from vesselgeom import phantoms as P
from vesselgeom.cli import main


@pytest.fixture(scope="module")
def tree_nii(tmp_path_factory):
    ph = P.tree_phantom(3, spacing=(0.6, 0.6, 0.6))
    path = tmp_path_factory.mktemp("in") / "tree.nii.gz"
    img = nib.Nifti1Image(ph.mask.astype(np.uint8), ph.affine)
    img.header.set_xyzt_units("mm")
    nib.save(img, path)
    return path


def test_analyze_writes_tables_and_prints_caution(tree_nii, tmp_path, capsys):
    assert main(["analyze", str(tree_nii), "--out", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    assert "7 branches" in out and "Research use only" in out
    assert (tmp_path / "o" / "branches.csv").exists()


def _bad_inputs(tmp):
    files = {}
    files["empty"] = tmp / "empty.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros((8, 8, 8), np.uint8), np.eye(4)), files["empty"])
    files["four_d"] = tmp / "fourd.nii.gz"
    nib.save(nib.Nifti1Image(np.ones((8, 8, 8, 2), np.uint8), np.eye(4)), files["four_d"])
    files["all_nan"] = tmp / "nan.nii.gz"
    nib.save(nib.Nifti1Image(np.full((8, 8, 8), np.nan, np.float32), np.eye(4)), files["all_nan"])
    files["float_map"] = tmp / "prob.nii.gz"
    rng = np.random.default_rng(0)
    nib.save(nib.Nifti1Image(rng.random((8, 8, 8)).astype(np.float32), np.eye(4)), files["float_map"])
    files["garbage"] = tmp / "garbage.nii.gz"
    files["garbage"].write_bytes(rng.bytes(400))
    files["text"] = tmp / "notes.nii"
    files["text"].write_text("not an image\n")
    files["missing"] = tmp / "missing.nii.gz"
    return files


@pytest.mark.parametrize("name", ["empty", "four_d", "all_nan", "float_map", "garbage", "text", "missing"])
def test_bad_input_one_line_error_no_outputs(name, tmp_path):
    path = _bad_inputs(tmp_path)[name]
    out = tmp_path / "out"
    proc = subprocess.run(
        [sys.executable, "-m", "vesselgeom.cli", "analyze", str(path), "--out", str(out)],
        capture_output=True,
        text=True,
        env={**os.environ, "PYTHONWARNINGS": "ignore"},
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("vesselgeom: error: ") and str(path) in lines[0]
    assert "Traceback" not in proc.stderr
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".out")]


def test_float_map_with_threshold_runs(tmp_path):
    ph = P.tube_phantom(P.straight(20.0), 2.0)
    prob = ph.mask.astype(np.float32) * 0.9
    path = tmp_path / "prob.nii.gz"
    img = nib.Nifti1Image(prob, ph.affine)
    img.header.set_xyzt_units("mm")
    nib.save(img, path)
    assert main(["analyze", str(path), "--out", str(tmp_path / "o"), "--threshold", "0.5", "--quiet"]) == 0
    assert (tmp_path / "o" / "branches.csv").read_text().count("\n") == 2
