"""The command line's chunked mode agrees with the in-memory run and never hangs on a small budget."""

from __future__ import annotations

import subprocess
import sys

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from vesselgeom import phantoms as P

pytest.importorskip("dask")
pytest.importorskip("distributed")


def _run(args, tmp_path):
    return subprocess.run(
        [sys.executable, "-m", "vesselgeom.cli", "analyze", *args],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
    )


def test_chunked_cli_matches_in_memory(tmp_path):
    ph = P.tree_phantom(3, spacing=(0.6, 0.6, 0.6))
    img = nib.Nifti1Image(ph.mask.astype(np.uint8), ph.affine)
    img.header.set_xyzt_units("mm")
    src = tmp_path / "tree.nii.gz"
    nib.save(img, src)
    a = _run([str(src), "--out", "mem"], tmp_path)
    # a budget far below one worker process: runs in-process instead of stalling a paused worker
    (tmp_path / "scratch").mkdir()
    opts = ["--chunked", "--chunk-size", "40", "--memory-budget", "64", "--scratch", "scratch"]
    b = _run([str(src), "--out", "chk", *opts], tmp_path)
    assert a.returncode == 0 and b.returncode == 0, b.stderr
    assert list((tmp_path / "scratch").iterdir()) == []  # point files removed
    mem_points = pd.read_csv(tmp_path / "mem" / "points.csv")
    chk_points = pd.read_csv(tmp_path / "chk" / "points.csv")
    # the tree's skeletons are voxel-identical chunked and in memory (test_chunked_agreement), so the
    # point rows are the same rows, equal to the CSV's 9 significant digits
    assert len(chk_points) == len(mem_points)
    np.testing.assert_allclose(chk_points["arc_mm"], mem_points["arc_mm"], rtol=1e-8, atol=1e-8)
    mem = pd.read_csv(tmp_path / "mem" / "branches.csv")
    chk = pd.read_csv(tmp_path / "chk" / "branches.csv")
    assert len(mem) == len(chk) == 7
    assert chk["length_mm"].sum() == pytest.approx(mem["length_mm"].sum(), rel=0.01)
    assert (tmp_path / "chk" / "centerlines.vtp").is_file()
