"""Group comparison of a batch folder: per-subject summaries, rank tests, effect sizes, FDR, figures."""

from __future__ import annotations

import json
import os
import warnings
from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from .. import __version__
from ..errors import InputError, VesselgeomWarning
from ..io import atomic_output_dir
from ..pipeline import CAUTION
from .figures import metric_figure
from .pool import INDICES, load_batch
from .stats import compare_groups, mixed_model

__all__ = ["compare", "DEFAULT_METRICS"]

# primary indices compared by default: per-subject length-weighted means
DEFAULT_METRICS = tuple(f"{m}__lw_mean" for m in INDICES if m != "length_mm") + (
    "total_length_mm",
    "n_branches",
)


def compare(
    batch_dir: str | os.PathLike[str],
    *,
    by: str = "group",
    metrics: Sequence[str] | None = None,
    out_dir: str | os.PathLike[str] | None = None,
    mixed: bool = False,
    n_boot: int = 2000,
    seed: int = 0,
) -> tuple[pd.DataFrame, list[str]]:
    """Compare groups of subjects in a batch folder.

    Each metric is first summarised per subject (``cohort_subjects.csv``); groups are then compared
    with Mann-Whitney U (two groups) or Kruskal-Wallis (more), with Cliff's delta and a
    Hodges-Lehmann shift with a bootstrap interval, and Benjamini-Hochberg q across the metrics.
    With ``mixed=True`` (needs statsmodels) each ``<index>__lw_mean`` metric is also fitted on the
    branches with a random intercept per subject.

    Returns
    -------
    table : DataFrame
        One row per metric (the contents of ``comparison.csv``).
    warnings : list of str
    """
    branches, subjects = load_batch(batch_dir)
    if by not in subjects.columns:
        cols = ", ".join(subjects.columns)
        raise InputError(f"{batch_dir}: no column {by!r} to compare by; columns: {cols}")
    subjects = subjects.assign(**{by: subjects[by].astype("string").fillna("")})
    metrics = list(metrics or DEFAULT_METRICS)
    unknown = [m for m in metrics if m not in subjects.columns]
    if unknown:
        raise InputError(f"{batch_dir}: unknown metric(s) {', '.join(unknown)}")
    with warnings.catch_warnings():  # returned as ``notes`` (and printed by the command line)
        warnings.simplefilter("ignore", VesselgeomWarning)
        table, notes = compare_groups(subjects, by=by, metrics=metrics, n_boot=n_boot, seed=seed)
    if mixed:
        fits = []
        for m in metrics:
            base = m.removesuffix("__lw_mean")
            res = mixed_model(branches, by=by, metric=base) if base in branches.columns else None
            if res is None and base in branches.columns and m.endswith("__lw_mean"):
                notes.append("mixed model skipped: statsmodels is not installed")
                break
            fits.append((m, res))
        for m, res in fits:
            if res:
                table.loc[table["metric"] == m, "mixed_coef"] = res["coef"]
                table.loc[table["metric"] == m, "mixed_p"] = res["p"]
    if out_dir is not None:
        with atomic_output_dir(out_dir) as tmp:
            table.to_csv(tmp / "comparison.csv", index=False, float_format="%.6g", lineterminator="\n")
            (tmp / "figures").mkdir()
            for m in metrics:
                metric_figure(subjects, by=by, metric=m, path=tmp / "figures" / f"{m}.png")
            run = {
                "software": "vesselgeom",
                "version": __version__,
                "caution": CAUTION,
                "batch": str(Path(batch_dir).resolve()),
                "by": by,
                "metrics": metrics,
                "bootstrap": {"n": n_boot, "seed": seed},
                "warnings": notes,
            }
            (tmp / "run.json").write_text(json.dumps(run, indent=2) + "\n")
    return table, notes
