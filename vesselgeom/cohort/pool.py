"""Pooled cohort tables: every branch of every subject, and one summary row per subject.

``cohort_branches.csv`` has ``subject, group`` and the manifest's covariates first, then the columns of
``branches.csv``. ``cohort_subjects.csv`` has, per subject, the branch count, total length and, for each
index, the length-weighted mean (``<index>__lw_mean``) and the median (``<index>__median``) over the
subject's branches. Summarising per subject first is what makes group comparisons sound: branches are
nested in subjects (Lazic 2010, BMC Neurosci 11:5).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from ..io import atomic_write_text
from ..tables import BRANCH_COLUMNS, read_csv
from .manifest import Subject

__all__ = ["INDICES", "write_pooled_tables", "load_batch", "subject_summary"]

# branch measures summarised per subject
INDICES = (
    "distance_metric",
    "inflection_count_metric",
    "sum_of_angles_per_mm",
    "mean_curvature_per_mm",
    "max_curvature_per_mm",
    "mean_torsion_per_mm",
    "mean_abs_torsion_per_mm",
    "mean_radius_mm",
    "length_mm",
)

_ID_DTYPES = {"subject": "string", "group": "string"}


def _write_csv(df: pd.DataFrame, path: Path) -> None:
    atomic_write_text(path, df.to_csv(index=False, float_format="%.9g", lineterminator="\n"))


def subject_summary(branches: pd.DataFrame) -> dict[str, float]:
    """Per-subject summary of one subject's ``branches.csv`` rows.

    Length-weighted mean: sum(L_i M_i) / sum(L_i) over branches where M is defined (a long branch
    counts for more vessel than a short one); the median treats every branch alike.
    """
    out: dict[str, float] = {
        "n_branches": int(len(branches)),
        "total_length_mm": float(np.nansum(branches["length_mm"])) if len(branches) else 0.0,
    }
    length = branches["length_mm"].to_numpy(float)
    for name in INDICES:
        v = branches[name].to_numpy(float)
        ok = np.isfinite(v) & np.isfinite(length)
        w = length[ok]
        out[f"{name}__lw_mean"] = float(np.sum(w * v[ok]) / np.sum(w)) if w.sum() > 0 else np.nan
        out[f"{name}__median"] = float(np.median(v[ok])) if ok.any() else np.nan
    return out


def write_pooled_tables(subjects: Sequence[Subject], out_dir: str | os.PathLike[str]) -> None:
    """Write ``cohort_branches.csv`` (and ``.parquet`` with pyarrow) and ``cohort_subjects.csv``."""
    out = Path(out_dir)
    parts, rows = [], []
    cov_names = [c for c, _ in subjects[0].covariates] if subjects else []
    for s in subjects:
        b = read_csv(out / s.subject / "branches.csv", BRANCH_COLUMNS)
        ids = {"subject": s.subject, "group": s.group, **dict(s.covariates)}
        parts.append(pd.concat([pd.DataFrame({k: [v] * len(b) for k, v in ids.items()}), b], axis=1))
        rows.append({**ids, **subject_summary(b)})
    id_cols = ["subject", "group", *cov_names]
    if parts:
        branches = pd.concat(parts, ignore_index=True)
    else:
        branches = pd.DataFrame(columns=[*id_cols, *(c.name for c in BRANCH_COLUMNS)])
    branches = branches.astype({c: "string" for c in id_cols})
    summary_cols = ["n_branches", "total_length_mm"] + [
        f"{n}__{k}" for n in INDICES for k in ("lw_mean", "median")
    ]
    subjects_df = pd.DataFrame(rows, columns=[*id_cols, *summary_cols])
    _write_csv(branches, out / "cohort_branches.csv")
    _write_csv(subjects_df, out / "cohort_subjects.csv")
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return
    branches.to_parquet(out / "cohort_branches.parquet", index=False)


def load_batch(batch_dir: str | os.PathLike[str]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Load a batch folder's pooled tables: (cohort_branches, cohort_subjects) DataFrames.

    Subject and group ids are read as strings ("01" stays "01").
    """
    d = Path(batch_dir)
    paths = [d / "cohort_branches.csv", d / "cohort_subjects.csv"]
    for p in paths:
        if not p.is_file():
            raise InputError(f"{d}: not a batch folder (no {p.name}); run vesselgeom batch first")
    branches = pd.read_csv(paths[0], dtype=_ID_DTYPES, keep_default_na=True)
    subjects = pd.read_csv(paths[1], dtype=_ID_DTYPES, keep_default_na=True)
    for df in (branches, subjects):
        df["group"] = df["group"].fillna("")
    return branches, subjects
