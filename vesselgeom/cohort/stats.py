"""Group comparisons of per-subject summaries: rank tests, effect sizes, FDR and a mixed model.

Branches are nested in subjects, so testing branches as if they were independent is pseudo-replication
(Lazic 2010; Aarts et al. 2014). The default analysis therefore works on one row per subject (for example
the length-weighted mean of an index over the subject's branches) and compares groups with rank tests:
Mann-Whitney U for two groups, Kruskal-Wallis for more. Effect sizes are Cliff's delta and the
Hodges-Lehmann shift with a percentile-bootstrap interval that resamples subjects within each group.
p-values are adjusted across the metrics of one call with the Benjamini-Hochberg step-up procedure.
:func:`mixed_model` is the branch-level alternative (random intercept per subject); it needs the optional
``statsmodels`` package.

References
----------
S. E. Lazic, "The problem of pseudoreplication in neuroscientific studies: is it affecting your analysis?",
BMC Neuroscience 11:5, 2010.
E. Aarts, M. Verhage, J. V. Veenvliet, C. V. Dolan, S. van der Sluis, "A solution to dependency: using
multilevel analysis to accommodate nested data", Nature Neuroscience 17:491-496, 2014.
N. Cliff, "Dominance statistics: ordinal analyses to answer ordinal questions", Psychological Bulletin
114(3):494-509, 1993.
J. L. Hodges, E. L. Lehmann, "Estimates of location based on rank tests", Annals of Mathematical
Statistics 34(2):598-611, 1963.
Y. Benjamini, Y. Hochberg, "Controlling the false discovery rate: a practical and powerful approach to
multiple testing", Journal of the Royal Statistical Society B 57:289-300, 1995.

Examples
--------
>>> cliffs_delta([10, 11, 9, 12, 10], [8, 9, 7, 10, 9])
0.76
>>> hodges_lehmann([10, 11, 9, 12, 10], [8, 9, 7, 10, 9])
2.0
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from vesselgeom.errors import InputError, VesselgeomWarning

__all__ = [
    "COMPARISON_COLUMNS",
    "cliffs_delta",
    "hodges_lehmann",
    "hodges_lehmann_ci",
    "compare_groups",
    "mixed_model",
]

_ARRAY = "<array>"
_MIN_SUBJECTS = 3
_BOOT_BATCH = 200  # bootstrap resamples evaluated at once (memory: batch * n1 * n2 floats)

COMPARISON_COLUMNS = (
    "metric",
    "test",
    "groups",
    "n_subjects",
    "medians",
    "shift",
    "shift_ci_low",
    "shift_ci_high",
    "cliffs_delta",
    "statistic",
    "p",
    "q",
)
_TEXT_COLUMNS = COMPARISON_COLUMNS[:5]


def _sample(values, name: str) -> np.ndarray:
    """One group's values as a 1-D float array with NaN removed; raises on empty, infinite or non-numeric."""
    try:
        a = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{_ARRAY}: {name} holds non-numeric values; pass numbers") from exc
    if a.ndim != 1:
        raise InputError(f"{_ARRAY}: {name} has shape {a.shape}; pass a 1-D sequence of values")
    a = a[~np.isnan(a)]
    if np.isinf(a).any():
        raise InputError(f"{_ARRAY}: {name} holds infinite values; remove or fix them")
    if a.size == 0:
        raise InputError(f"{_ARRAY}: {name} has no values (after dropping NaN); pass at least one")
    return a


def _hl_vectorized(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
    """Hodges-Lehmann shift along ``axis``; leading axes are batches, as scipy.stats.bootstrap passes."""
    x = np.moveaxis(x, axis, -1)
    y = np.moveaxis(y, axis, -1)
    diff = x[..., :, None] - y[..., None, :]
    return np.median(diff.reshape(*diff.shape[:-2], -1), axis=-1)


def cliffs_delta(x, y) -> float:
    """Cliff's dominance statistic delta = P(X > Y) - P(X < Y), from the Mann-Whitney U of ``x``.

    Parameters
    ----------
    x, y : (n1,) and (n2,) float arrays
        The two samples (one value per subject, any unit); NaN values are dropped.

    Returns
    -------
    float
        ``2 U / (n1 n2) - 1`` in [-1, 1], where U counts pairs with x_i > y_j plus half the ties.
        Positive when ``x`` tends to be larger.

    References
    ----------
    N. Cliff, Psychological Bulletin 114(3):494-509, 1993.

    Examples
    --------
    >>> cliffs_delta([1, 2, 3], [1, 2, 3])
    0.0
    """
    a, b = _sample(x, "x"), _sample(y, "y")
    u = float(stats.mannwhitneyu(a, b, alternative="two-sided", method="asymptotic").statistic)
    return 2.0 * u / (a.size * b.size) - 1.0


def hodges_lehmann(x, y) -> float:
    """Hodges-Lehmann shift: the median of all pairwise differences ``x_i - y_j``.

    Parameters
    ----------
    x, y : (n1,) and (n2,) float arrays
        The two samples in the same unit; NaN values are dropped.

    Returns
    -------
    float
        Shift of ``x`` relative to ``y``, in the unit of the samples.

    References
    ----------
    J. L. Hodges, E. L. Lehmann, Annals of Mathematical Statistics 34(2):598-611, 1963.

    Examples
    --------
    >>> hodges_lehmann([3.0, 4.0], [1.0])
    2.5
    """
    a, b = _sample(x, "x"), _sample(y, "y")
    return float(_hl_vectorized(a, b))


def hodges_lehmann_ci(x, y, *, level: float = 0.95, n_boot: int = 2000, seed: int = 0) -> tuple[float, float]:
    """Percentile-bootstrap confidence interval of the Hodges-Lehmann shift.

    Subjects are resampled with replacement within each group (``scipy.stats.bootstrap``, unpaired).

    Parameters
    ----------
    x, y : (n1,) and (n2,) float arrays
        One value per subject in each group; NaN values are dropped.
    level : float
        Confidence level in (0, 1).
    n_boot : int
        Number of bootstrap resamples (at least 1).
    seed : int
        Seed of the random generator; the same inputs and seed give the same interval.

    Returns
    -------
    (float, float)
        Lower and upper bounds in the unit of the samples; ``(nan, nan)`` when a group has fewer than two
        values (a single subject cannot be resampled into a distribution).

    Examples
    --------
    >>> lo, hi = hodges_lehmann_ci([10, 11, 9, 12, 10], [8, 9, 7, 10, 9], n_boot=500)
    >>> bool(lo <= 2.0 <= hi)
    True
    """
    a, b = _sample(x, "x"), _sample(y, "y")
    _check_level(level)
    _check_n_boot(n_boot)
    if a.size < 2 or b.size < 2:
        return float("nan"), float("nan")
    res = stats.bootstrap(
        (a, b),
        _hl_vectorized,
        n_resamples=int(n_boot),
        batch=_BOOT_BATCH,
        vectorized=True,
        paired=False,
        confidence_level=level,
        method="percentile",
        random_state=np.random.default_rng(seed),
    )
    return float(res.confidence_interval.low), float(res.confidence_interval.high)


def _check_level(level: float) -> None:
    if not (isinstance(level, int | float) and 0.0 < float(level) < 1.0):
        raise InputError(f"{_ARRAY}: level={level!r} is not in (0, 1); pass e.g. 0.95")


def _check_n_boot(n_boot: int) -> None:
    if isinstance(n_boot, bool) or not isinstance(n_boot, int | np.integer) or n_boot < 1:
        raise InputError(f"{_ARRAY}: n_boot={n_boot!r} is not a positive integer; pass e.g. 2000")


def _bh(p) -> np.ndarray:
    """Benjamini-Hochberg q-values of ``p`` (n,); NaN entries stay NaN and do not count towards m."""
    p = np.asarray(p, dtype=float)
    q = np.full(p.shape, np.nan)
    ok = ~np.isnan(p)
    if ok.any():
        q[ok] = stats.false_discovery_control(p[ok], method="bh")
    return q


def _group_labels(table: pd.DataFrame, by: str, name: str) -> tuple[pd.Series, list[str]]:
    """Group labels as text (``"01"`` stays ``"01"``) and the sorted distinct labels; NA rows are dropped."""
    if not isinstance(table, pd.DataFrame):
        raise InputError(f"{_ARRAY}: {name} is a {type(table).__name__}; pass a pandas DataFrame")
    if by not in table.columns:
        raise InputError(f"{_ARRAY}: {name} has no column {by!r}; pass by= one of {list(table.columns)}")
    labels = table[by]
    labels = labels[labels.notna()].astype(str)
    return labels, sorted(labels.unique())


def _values(table: pd.DataFrame, metric: str, name: str) -> pd.Series:
    """A numeric column as float64 (nullable NA becomes NaN)."""
    if metric not in table.columns:
        raise InputError(f"{_ARRAY}: {name} has no column {metric!r}; pass metrics that are columns")
    col = table[metric]
    if not pd.api.types.is_numeric_dtype(col) or pd.api.types.is_bool_dtype(col):
        raise InputError(f"{_ARRAY}: {name} column {metric!r} has dtype {col.dtype}; pass a numeric column")
    return pd.Series(col.to_numpy(dtype=np.float64, na_value=np.nan), index=table.index)


def _small_group_message(group: str, n: int) -> str:
    return (
        f"group {group!r} has {n} subjects; p-values with fewer than {_MIN_SUBJECTS} subjects per group "
        "are unreliable"
    )


def _compare_one(samples: list[np.ndarray], metric: str, level: float, n_boot: int, seed: int, note) -> dict:
    """One row of the comparison table for groups already split into NaN-free samples."""
    two = len(samples) == 2
    row = dict.fromkeys(COMPARISON_COLUMNS[5:], float("nan"))
    row["test"] = "mann-whitney" if two else "kruskal-wallis"
    if any(s.size == 0 for s in samples):
        note(f"metric {metric!r}: a group has no values; no test")
        return row
    pooled = np.concatenate(samples)
    if np.all(pooled == pooled[0]):
        note(f"metric {metric!r}: every subject has the same value; no test")
        return row
    if two:
        x, y = samples
        res = stats.mannwhitneyu(x, y, alternative="two-sided", method="auto")
        row["shift"] = hodges_lehmann(x, y)
        row["shift_ci_low"], row["shift_ci_high"] = hodges_lehmann_ci(
            x, y, level=level, n_boot=n_boot, seed=seed
        )
        row["cliffs_delta"] = cliffs_delta(x, y)
    else:
        res = stats.kruskal(*samples)
    row["statistic"], row["p"] = float(res.statistic), float(res.pvalue)
    return row


def compare_groups(
    subjects: pd.DataFrame,
    *,
    by: str,
    metrics: list[str],
    level: float = 0.95,
    n_boot: int = 2000,
    seed: int = 0,
) -> tuple[pd.DataFrame, list[str]]:
    """Compare groups of subjects on each metric with rank tests, effect sizes and BH-adjusted p-values.

    Parameters
    ----------
    subjects : DataFrame, one row per subject
        Per-subject summaries (e.g. ``M__lw_mean``). If it has a ``subject`` column, its values must be
        unique (a branch-level table would be pseudo-replication; summarise per subject first).
    by : str
        Column holding the group label; labels are compared as text, sorted, and rows without one are dropped.
    metrics : list of str
        Numeric columns to compare. NaN values are dropped per subject and metric.
    level : float
        Confidence level of the bootstrap interval of the shift.
    n_boot : int
        Bootstrap resamples for the interval.
    seed : int
        Seed for the bootstrap; every metric uses the same seed, so a metric's interval does not depend on
        which other metrics are in the call.

    Returns
    -------
    table : DataFrame, one row per metric
        Columns ``COMPARISON_COLUMNS``: ``metric``; ``test`` ("mann-whitney" for two groups, else
        "kruskal-wallis"); ``groups`` ("A|B", sorted); ``n_subjects`` ("5|4", values used); ``medians``
        (per group, %.6g); ``shift`` (Hodges-Lehmann, first group minus second, metric unit),
        ``shift_ci_low``, ``shift_ci_high``, ``cliffs_delta`` (two groups only, else NaN); ``statistic``
        (U of the first group, or H); ``p`` (two-sided); ``q`` (Benjamini-Hochberg over the metrics tested
        in this call). Statistic, p and q are NaN when a group has no values or all values are equal.
    warnings : list of str
        One line each; also issued as :class:`VesselgeomWarning`.

    Raises
    ------
    InputError
        Fewer than two groups, missing or non-numeric columns, duplicated subjects, bad ``level``/``n_boot``.

    Examples
    --------
    >>> df = pd.DataFrame({"group": list("AAABBB"), "m": [3.0, 4, 5, 0, 1, 2]})
    >>> table, notes = compare_groups(df, by="group", metrics=["m"], n_boot=200)
    >>> table.loc[0, ["groups", "n_subjects", "medians"]].tolist()
    ['A|B', '3|3', '4|1']
    >>> float(table.loc[0, "shift"]), float(table.loc[0, "cliffs_delta"])
    (3.0, 1.0)
    """
    labels, groups = _group_labels(subjects, by, "subjects")
    if len(groups) < 2:
        raise InputError(
            f"{_ARRAY}: column {by!r} has {len(groups)} group(s) {groups}; "
            "pass subjects from at least two groups"
        )
    if "subject" in subjects.columns and subjects["subject"].duplicated().any():
        raise InputError(
            f"{_ARRAY}: subjects repeats values in column 'subject'; pass one row per subject "
            "(summarise branches per subject first)"
        )
    if isinstance(metrics, str):
        raise InputError(f"{_ARRAY}: metrics={metrics!r} is a string; pass a list of column names")
    _check_level(level)
    _check_n_boot(n_boot)
    notes: list[str] = []

    def note(message: str) -> None:
        if message not in notes:
            notes.append(message)

    n_unlabelled = len(subjects) - len(labels)
    if n_unlabelled:
        note(f"{n_unlabelled} subject(s) have no value in column {by!r} and were left out")
    for g in groups:
        n = int((labels == g).sum())
        if n < _MIN_SUBJECTS:
            note(_small_group_message(g, n))

    rows = []
    for metric in metrics:
        values = _values(subjects, metric, "subjects").loc[labels.index]
        samples = [values[labels == g].dropna().to_numpy() for g in groups]
        if any(np.isinf(s).any() for s in samples):
            raise InputError(f"{_ARRAY}: subjects column {metric!r} holds infinite values; fix them")
        for g, s in zip(groups, samples, strict=True):
            if s.size < _MIN_SUBJECTS and s.size < int((labels == g).sum()):
                note(
                    f"metric {metric!r}: group {g!r} has {s.size} subjects with a value; p-values with fewer "
                    f"than {_MIN_SUBJECTS} subjects per group are unreliable"
                )
        row = _compare_one(samples, metric, level, n_boot, seed, note)
        row["metric"] = metric
        row["groups"] = "|".join(groups)
        row["n_subjects"] = "|".join(str(s.size) for s in samples)
        row["medians"] = "|".join("%.6g" % (np.median(s) if s.size else np.nan) for s in samples)
        rows.append(row)

    table = pd.DataFrame(rows, columns=list(COMPARISON_COLUMNS))
    table["q"] = _bh(table["p"].to_numpy(dtype=float))
    table = table.astype(
        {c: "string" for c in _TEXT_COLUMNS} | {c: "float64" for c in COMPARISON_COLUMNS[5:]}
    )
    for message in notes:
        warnings.warn(message, VesselgeomWarning, stacklevel=2)
    return table, notes


def mixed_model(branches: pd.DataFrame, *, by: str, metric: str, subject: str = "subject") -> dict | None:
    """Branch-level two-group comparison with a random intercept per subject (linear mixed model).

    Fits ``metric ~ group`` by REML with ``statsmodels.formula.api.mixedlm``, grouping on ``subject``.
    The group enters as an indicator of the first group in sorted order, so ``coef`` is the first group
    minus the second, the same sign as the Hodges-Lehmann ``shift`` of :func:`compare_groups`.

    Parameters
    ----------
    branches : DataFrame, one row per branch
        Must hold the columns ``by``, ``metric`` and ``subject``; rows with NaN ``metric`` are dropped.
    by : str
        Group column (text labels; exactly two groups; each subject in one group only).
    metric : str
        Numeric branch column.
    subject : str
        Column identifying the subject of each branch.

    Returns
    -------
    dict or None
        ``{"coef", "p", "n_subjects", "n_branches", "converged"}``: fixed-effect difference (metric unit),
        its Wald p-value, the counts used and whether the optimiser converged. ``coef`` and ``p`` are NaN
        when the fit fails. None when ``statsmodels`` is not installed.

    References
    ----------
    E. Aarts et al., Nature Neuroscience 17:491-496, 2014.
    """
    try:
        import statsmodels.formula.api as smf
    except ImportError:
        return None
    labels, _ = _group_labels(branches, by, "branches")
    if subject not in branches.columns:
        raise InputError(f"{_ARRAY}: branches has no column {subject!r}; pass subject= the subject id column")
    values = _values(branches, metric, "branches").loc[labels.index]
    ids = branches[subject].loc[labels.index]
    keep = values.notna() & ids.notna()
    if np.isinf(values[keep]).any():
        raise InputError(f"{_ARRAY}: branches column {metric!r} holds infinite values; fix them")
    data = pd.DataFrame({"y": values[keep], "g": labels[keep], "s": ids[keep].astype(str)})
    groups = sorted(data["g"].unique())
    if len(groups) != 2:
        raise InputError(
            f"{_ARRAY}: column {by!r} has {len(groups)} group(s) with values {groups}; pass exactly two"
        )
    if (data.groupby("s")["g"].nunique() > 1).any():
        raise InputError(f"{_ARRAY}: some subjects appear in both groups of {by!r}; fix the group labels")
    out = {
        "coef": float("nan"),
        "p": float("nan"),
        "n_subjects": int(data["s"].nunique()),
        "n_branches": int(len(data)),
        "converged": False,
    }
    # Indicator of the first group: its coefficient is the first-minus-second difference, whatever the labels.
    data["first"] = (data["g"] == groups[0]).astype(float)
    try:
        fit = smf.mixedlm("y ~ first", data, groups=data["s"]).fit(reml=True)
    except (np.linalg.LinAlgError, ValueError):
        return out
    out["coef"] = float(fit.fe_params["first"])
    out["p"] = float(fit.pvalues["first"])
    out["converged"] = bool(fit.converged)
    return out
