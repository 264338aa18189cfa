"""Batch runs, manifests, pooled tables and the group comparison end to end."""

from __future__ import annotations

import subprocess
import sys

import nibabel as nib
import numpy as np
import pandas as pd
import pytest

from vesselgeom.cli import main
from vesselgeom.cohort import compare, load_batch, read_manifest, run_batch
from vesselgeom.errors import InputError
from vesselgeom.phantoms import network_phantom


def _save(mask, affine, path):
    img = nib.Nifti1Image(mask.astype(np.uint8), affine)
    img.header.set_xyzt_units("mm")
    nib.save(img, path)


def _cohort(tmp_path, n_per_group=3, *, bad=False):
    """Small synthetic cohort: group 'flat' vs 'wavy' (more tortuous); calibre varies by subject."""
    (tmp_path / "m").mkdir()
    rng = np.random.default_rng(7)
    rows = []
    k = 0
    for group, und in (("flat", 0.1), ("wavy", 0.7)):
        for _ in range(n_per_group):
            k += 1
            calibre = rng.uniform(0.8, 1.2)
            mask, aff = network_phantom(
                (64, 64, 64),
                spacing=(0.05, 0.05, 0.05),
                n_trees=2,
                depth=3,
                radius_voxels=(2.0 * calibre, 3.5 * calibre),
                undulation_radii=und,
                seed=int(rng.integers(1 << 30)),
            )
            _save(mask, aff, tmp_path / "m" / f"s{k:02d}.nii.gz")
            rows.append({"subject": f"{k:02d}", "group": group, "mask": f"m/s{k:02d}.nii.gz", "site": "A"})
    if bad:
        (tmp_path / "m" / "corrupt.nii.gz").write_bytes(b"\x1f\x8b not really gzip")
        _save(np.zeros((8, 8, 8), bool), np.eye(4), tmp_path / "m" / "empty.nii.gz")
        rows.append({"subject": "90", "group": "flat", "mask": "m/corrupt.nii.gz", "site": "B"})
        rows.append({"subject": "91", "group": "wavy", "mask": "m/empty.nii.gz", "site": "B"})
    manifest = tmp_path / "manifest.csv"
    pd.DataFrame(rows).to_csv(manifest, index=False)
    return manifest


def test_manifest_problems_are_all_listed_before_work(tmp_path):
    manifest = tmp_path / "manifest.csv"
    manifest.write_text("subject,group,mask\n01,a,missing1.nii.gz\n01,b,missing2.nii.gz\n,a,x.nii.gz\n")
    with pytest.raises(InputError) as err:
        read_manifest(manifest)
    msg = str(err.value)
    assert "\n" not in msg
    assert "duplicate subject id(s) 01" in msg and "empty subject id" in msg
    assert "missing1.nii.gz not found" in msg and "missing2.nii.gz not found" in msg
    # the command line reports the same one line and writes nothing
    out = tmp_path / "out"
    assert main(["batch", str(manifest), "--out", str(out)]) == 2
    assert not out.exists()


def test_manifest_missing_columns(tmp_path):
    manifest = tmp_path / "manifest.csv"
    manifest.write_text("id,mask\n01,a.nii.gz\n")
    with pytest.raises(InputError, match="lacks column"):
        read_manifest(manifest)


def test_bad_members_fail_alone_and_rerun_skips(tmp_path, capsys):
    manifest = _cohort(tmp_path, n_per_group=2, bad=True)
    out = tmp_path / "batch"
    assert main(["batch", str(manifest), "--out", str(out), "--jobs", "2"]) == 1
    status = pd.read_csv(out / "status.csv", dtype=str, keep_default_na=False)
    assert list(status.columns) == ["subject", "group", "status", "seconds", "message"]
    by_id = status.set_index("subject")
    assert (by_id.loc[["01", "02", "03", "04"], "status"] == "ok").all()
    assert by_id.loc["90", "status"] == "failed" and "corrupt.nii.gz" in by_id.loc["90", "message"]
    assert by_id.loc["91", "status"] == "failed" and "empty" in by_id.loc["91", "message"]
    assert not (out / "90").exists() and not (out / "91").exists()  # no half-written folders
    err = capsys.readouterr().err
    assert "90:" in err and "91:" in err
    # second run: finished subjects are skipped, failed ones retried (and fail again)
    assert main(["batch", str(manifest), "--out", str(out), "--jobs", "2"]) == 1
    again = pd.read_csv(out / "status.csv", dtype=str, keep_default_na=False).set_index("subject")
    assert (again.loc[["01", "02", "03", "04"], "status"] == "skipped").all()
    assert (again.loc[["90", "91"], "status"] == "failed").all()


def test_changed_settings_rerun_subjects(tmp_path):
    from vesselgeom.settings import Settings

    subjects = read_manifest(_cohort(tmp_path, n_per_group=1))
    out = tmp_path / "b"
    assert set(run_batch(subjects, out, jobs=1)["status"]) == {"ok"}
    assert set(run_batch(subjects, out, jobs=1)["status"]) == {"skipped"}
    assert set(run_batch(subjects, out, jobs=1, settings=Settings(prune_ratio=2.0))["status"]) == {"ok"}


def test_pooled_tables_keep_ids_and_weight_by_length(tmp_path):
    subjects = read_manifest(_cohort(tmp_path, n_per_group=2))
    out = tmp_path / "b"
    run_batch(subjects, out, jobs=2)
    branches, per_subject = load_batch(out)
    assert list(branches.columns[:3]) == ["subject", "group", "site"]
    assert branches["subject"].dtype == "string" and set(branches["subject"]) == {"01", "02", "03", "04"}
    assert list(per_subject["subject"]) == ["01", "02", "03", "04"]
    # length-weighted mean recomputed by hand from the subject's own branches.csv
    own = pd.read_csv(out / "02" / "branches.csv")
    ok = own["mean_curvature_per_mm"].notna()
    lw = (
        np.sum(own.loc[ok, "length_mm"] * own.loc[ok, "mean_curvature_per_mm"])
        / own.loc[ok, "length_mm"].sum()
    )
    row = per_subject.set_index("subject").loc["02"]
    assert row["mean_curvature_per_mm__lw_mean"] == pytest.approx(lw, rel=1e-7)
    assert row["n_branches"] == len(own)
    assert row["mean_radius_mm__median"] == pytest.approx(own["mean_radius_mm"].median(), rel=1e-7)


def test_planted_tortuosity_found_radius_not(tmp_path):
    # Six subjects per group; 'wavy' vessels are built more tortuous, calibre varies by subject
    # independently of group. Per-subject summaries, Mann-Whitney U and BH q (METHODS.md).
    subjects = read_manifest(_cohort(tmp_path, n_per_group=6))
    out = tmp_path / "b"
    run_batch(subjects, out, jobs=2)
    table, notes = compare(out, by="group", out_dir=tmp_path / "cmp")
    q = table.set_index("metric")["q"]
    assert q["mean_curvature_per_mm__lw_mean"] < 0.05
    assert q["sum_of_angles_per_mm__lw_mean"] < 0.05
    assert q["mean_radius_mm__lw_mean"] > 0.05
    assert notes == []
    assert (tmp_path / "cmp" / "comparison.csv").is_file()
    assert (tmp_path / "cmp" / "figures" / "mean_curvature_per_mm__lw_mean.png").is_file()


def test_small_groups_warn(tmp_path):
    subjects = read_manifest(_cohort(tmp_path, n_per_group=2))
    run_batch(subjects, tmp_path / "b", jobs=2)
    _, notes = compare(tmp_path / "b", by="group", metrics=["mean_radius_mm__lw_mean"])
    assert any("fewer than 3" in n for n in notes)


def test_folder_mode(tmp_path):
    _cohort(tmp_path, n_per_group=1)
    out = tmp_path / "b"
    assert main(["batch", str(tmp_path / "m"), "--out", str(out), "--jobs", "1"]) == 0
    status = pd.read_csv(out / "status.csv", dtype=str)
    assert list(status["subject"]) == ["s01", "s02"]


def test_demo_runs_from_a_fresh_folder(tmp_path):
    # The README's main command: the committed demo cohort, batch then compare.
    proc = subprocess.run(
        [sys.executable, "-m", "vesselgeom.cli", "demo", "--out", str(tmp_path / "demo"), "--jobs", "2"],
        capture_output=True,
        text=True,
        cwd=tmp_path,
    )
    assert proc.returncode == 0, proc.stderr
    assert "Research use only" in proc.stdout
    assert (tmp_path / "demo" / "comparison" / "comparison.csv").is_file()
    table = pd.read_csv(tmp_path / "demo" / "comparison" / "comparison.csv").set_index("metric")
    assert table.loc["mean_curvature_per_mm__lw_mean", "q"] < 0.05
    assert table.loc["mean_radius_mm__lw_mean", "q"] > 0.05


def test_mixed_model_columns(tmp_path):
    # Optional mixed-effects model (statsmodels MixedLM, random intercept per subject).
    pytest.importorskip("statsmodels")
    subjects = read_manifest(_cohort(tmp_path, n_per_group=3))
    run_batch(subjects, tmp_path / "b", jobs=2)
    table, _ = compare(tmp_path / "b", by="group", metrics=["mean_curvature_per_mm__lw_mean"], mixed=True)
    row = table.iloc[0]
    assert np.isfinite(row["mixed_coef"]) and 0 <= row["mixed_p"] <= 1
    # 'flat' minus 'wavy': the wavy group is more curved, so the coefficient is negative
    assert row["mixed_coef"] < 0
