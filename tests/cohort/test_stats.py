"""Tests for vesselgeom.cohort.stats: rank tests, effect sizes, FDR and the mixed model.

External references used below: the worked example in docs METHODS.md "Cohort statistics" (Cliff 1993;
Hodges & Lehmann 1963; Mann & Whitney 1947), scipy.stats.mannwhitneyu / kruskal / ttest_ind as reference
implementations, the brute-force definitions of Cliff's delta and the Hodges-Lehmann estimator (Python's
``statistics.median``, no numpy), and the Benjamini & Hochberg (1995) step-up formula written out by hand.
All random data use fixed seeds.
"""

from __future__ import annotations

import statistics
import sys

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from vesselgeom.cohort.stats import (
    COMPARISON_COLUMNS,
    _bh,
    cliffs_delta,
    compare_groups,
    hodges_lehmann,
    hodges_lehmann_ci,
    mixed_model,
)
from vesselgeom.errors import InputError, VesselgeomWarning

X = [10, 11, 9, 12, 10]
Y = [8, 9, 7, 10, 9]


def _two_groups(x, y, labels=("A", "B"), metric="m") -> pd.DataFrame:
    return pd.DataFrame(
        {
            "subject": [f"s{i:02d}" for i in range(len(x) + len(y))],
            "group": [labels[0]] * len(x) + [labels[1]] * len(y),
            metric: np.asarray(list(x) + list(y), dtype=float),
        }
    )


def _bh_by_hand(p) -> np.ndarray:
    """Benjamini & Hochberg (1995) step-up: q_(i) = min_{j >= i} m p_(j) / j, capped at 1."""
    p = list(p)
    m = len(p)
    order = sorted(range(m), key=lambda i: p[i])
    q = [0.0] * m
    running = 1.0
    for rank in range(m, 0, -1):
        i = order[rank - 1]
        running = min(running, m * p[i] / rank)
        q[i] = running
    return np.array(q)


def test_methods_worked_example():
    # METHODS.md "Cohort statistics": U = 22, delta = 0.76, HL = 2.0, two-sided p = 0.0539.
    ref = stats.mannwhitneyu(X, Y, alternative="two-sided", method="auto")
    assert ref.statistic == 22.0
    assert cliffs_delta(X, Y) == pytest.approx(0.76, abs=1e-12)
    assert cliffs_delta(X, Y) == pytest.approx(2 * ref.statistic / 25 - 1, abs=1e-12)  # Cliff 1993
    assert hodges_lehmann(X, Y) == 2.0
    table, notes = compare_groups(_two_groups(X, Y), by="group", metrics=["m"], n_boot=500)
    row = table.iloc[0]
    assert notes == []
    assert row["test"] == "mann-whitney"
    assert row["statistic"] == 22.0
    assert row["p"] == pytest.approx(ref.pvalue, rel=1e-12)
    assert round(row["p"], 4) == 0.0539
    assert row["shift"] == 2.0
    assert row["cliffs_delta"] == pytest.approx(0.76, abs=1e-12)
    assert row["groups"] == "A|B" and row["n_subjects"] == "5|5" and row["medians"] == "10|9"
    assert row["q"] == pytest.approx(row["p"], rel=1e-12)  # one metric: BH leaves p unchanged
    assert list(table.columns) == list(COMPARISON_COLUMNS)


def test_bh_methods_example():
    # METHODS.md / Benjamini & Hochberg 1995: p = [0.01, 0.04, 0.03, 0.005] -> [0.02, 0.04, 0.04, 0.02].
    np.testing.assert_allclose(_bh([0.01, 0.04, 0.03, 0.005]), [0.02, 0.04, 0.04, 0.02], rtol=1e-12)
    np.testing.assert_allclose(_bh([0.01, 0.04, 0.03, 0.005]), _bh_by_hand([0.01, 0.04, 0.03, 0.005]))
    # An untested metric (NaN p) is left out of m, as if it had not been in the call.
    q = _bh([0.01, np.nan, 0.04, 0.03, 0.005])
    assert np.isnan(q[1])
    np.testing.assert_allclose(q[[0, 2, 3, 4]], [0.02, 0.04, 0.04, 0.02], rtol=1e-12)


def test_compare_groups_q_is_bh_across_metrics():
    # q of compare_groups against the hand-written step-up formula (Benjamini & Hochberg 1995).
    rng = np.random.default_rng(7)
    n = 8
    df = pd.DataFrame({"group": ["A"] * n + ["B"] * n})
    metrics = []
    for k, shift in enumerate([0.0, 0.5, 1.0, 1.5, 2.5]):
        metrics.append(f"m{k}")
        df[f"m{k}"] = rng.normal(size=2 * n) + np.r_[np.full(n, shift), np.zeros(n)]
    table, _ = compare_groups(df, by="group", metrics=metrics, n_boot=200)
    ref_p = [stats.mannwhitneyu(df.loc[:7, m], df.loc[8:, m]).pvalue for m in metrics]
    np.testing.assert_allclose(table["p"], ref_p, rtol=1e-12)
    np.testing.assert_allclose(table["q"], _bh_by_hand(ref_p), rtol=1e-12)


def test_cliffs_delta_brute_force():
    # Cliff 1993: delta = mean over all pairs of sign(x_i - y_j); integers so that ties occur.
    rng = np.random.default_rng(3)
    for n1, n2 in [(5, 7), (12, 4), (20, 20)]:
        x = rng.integers(0, 6, n1).tolist()
        y = rng.integers(0, 6, n2).tolist()
        brute = sum((a > b) - (a < b) for a in x for b in y) / (n1 * n2)
        assert cliffs_delta(x, y) == pytest.approx(brute, abs=1e-12)


def test_hodges_lehmann_brute_force():
    # Hodges & Lehmann 1963: median of all n1*n2 differences, computed with the standard library.
    rng = np.random.default_rng(4)
    for n1, n2 in [(5, 7), (6, 6), (11, 3)]:
        x = rng.normal(1.0, 2.0, n1).tolist()
        y = rng.normal(0.0, 1.0, n2).tolist()
        brute = statistics.median([a - b for a in x for b in y])
        assert hodges_lehmann(x, y) == pytest.approx(brute, abs=1e-12)


def test_nan_dropped_in_pure_functions():
    assert hodges_lehmann([*X, np.nan], Y) == hodges_lehmann(X, Y)
    assert cliffs_delta(X, [np.nan, *Y]) == cliffs_delta(X, Y)
    with pytest.raises(ValueError, match="no values"):
        cliffs_delta([np.nan], Y)
    with pytest.raises(ValueError, match="infinite"):
        hodges_lehmann([1.0, np.inf], Y)


def test_bootstrap_ci_contains_estimate_and_is_deterministic():
    rng = np.random.default_rng(5)
    x, y = rng.normal(1.0, 1.0, 9), rng.normal(0.0, 1.0, 7)
    est = hodges_lehmann(x, y)
    lo, hi = hodges_lehmann_ci(x, y, seed=11)
    assert lo <= est <= hi and lo < hi
    assert hodges_lehmann_ci(x, y, seed=11) == (lo, hi)  # same seed, same interval
    assert hodges_lehmann_ci(x, y, seed=12) != (lo, hi)  # the seed is actually used
    # Percentile intervals from the same resamples are nested: a 50% interval lies inside the 95% one.
    lo50, hi50 = hodges_lehmann_ci(x, y, level=0.5, seed=11)
    assert lo <= lo50 <= est <= hi50 <= hi
    # A single subject cannot be resampled into a distribution.
    assert all(np.isnan(hodges_lehmann_ci([1.0], y)))
    with pytest.raises(ValueError, match="level"):
        hodges_lehmann_ci(x, y, level=95)
    with pytest.raises(ValueError, match="n_boot"):
        hodges_lehmann_ci(x, y, n_boot=0)


def test_kruskal_three_groups_matches_scipy():
    rng = np.random.default_rng(6)
    samples = [rng.normal(mu, 1.0, n) for mu, n in [(0.0, 5), (0.8, 6), (1.5, 4)]]
    df = pd.DataFrame(
        {
            "group": ["g1"] * 5 + ["g2"] * 6 + ["g3"] * 4,
            "m": np.concatenate(samples),
        }
    )
    table, notes = compare_groups(df, by="group", metrics=["m"])
    ref = stats.kruskal(*samples)
    row = table.iloc[0]
    assert notes == []
    assert row["test"] == "kruskal-wallis"
    assert row["statistic"] == pytest.approx(ref.statistic, rel=1e-12)
    assert row["p"] == pytest.approx(ref.pvalue, rel=1e-12)
    assert row["groups"] == "g1|g2|g3" and row["n_subjects"] == "5|6|4"
    assert row["medians"] == "|".join(f"{np.median(s):.6g}" for s in samples)
    assert np.isnan(row["shift"]) and np.isnan(row["cliffs_delta"]) and np.isnan(row["shift_ci_low"])


def test_small_group_warning():
    df = _two_groups([1.0, 2.0, 3.0, 4.0], [5.0, 6.0])
    with pytest.warns(VesselgeomWarning, match="group 'B' has 2 subjects"):
        table, notes = compare_groups(df, by="group", metrics=["m"], n_boot=200)
    assert notes == ["group 'B' has 2 subjects; p-values with fewer than 3 subjects per group are unreliable"]
    assert table.loc[0, "n_subjects"] == "4|2"


def test_string_group_labels_kept():
    df = _two_groups(X, Y, labels=("01", "10"))
    table, _ = compare_groups(df, by="group", metrics=["m"], n_boot=200)
    assert table.loc[0, "groups"] == "01|10"
    # Labels are text and sorted as text: "10" before "9".
    df3 = pd.DataFrame({"group": ["9"] * 3 + ["10"] * 3 + ["01"] * 3, "m": np.arange(9.0)})
    table3, _ = compare_groups(df3, by="group", metrics=["m"])
    assert table3.loc[0, "groups"] == "01|10|9"
    assert table3.loc[0, "medians"] == "7|4|1"


def test_nan_values_dropped_per_subject():
    df = _two_groups([*X, np.nan], Y)
    table, notes = compare_groups(df, by="group", metrics=["m"], n_boot=200)
    assert table.loc[0, "n_subjects"] == "5|5"
    assert table.loc[0, "p"] == pytest.approx(stats.mannwhitneyu(X, Y).pvalue, rel=1e-12)
    assert notes == []


def test_input_errors():
    one = pd.DataFrame({"group": ["A"] * 4, "m": np.arange(4.0)})
    with pytest.raises(ValueError, match="at least two groups") as info:
        compare_groups(one, by="group", metrics=["m"])
    assert isinstance(info.value, InputError) and "\n" not in str(info.value)
    df = _two_groups(X, Y)
    with pytest.raises(InputError, match="no column 'nope'"):
        compare_groups(df, by="group", metrics=["nope"])
    with pytest.raises(InputError, match="one row per subject"):
        compare_groups(pd.concat([df, df]), by="group", metrics=["m"])


def test_planted_difference_found_and_null_not():
    # Seed fixed at 1: with 6 subjects per group, a 2 SD shift gives q < 0.05 and the null metric q > 0.05
    # for this seed; other seeds can miss the effect or give a false positive (power and alpha are not 0/1).
    rng = np.random.default_rng(1)
    group = np.array(["case"] * 6 + ["control"] * 6)
    df = pd.DataFrame(
        {
            "subject": [f"s{i:02d}" for i in range(12)],
            "group": group,
            "planted": rng.normal(0.0, 1.0, 12) + np.where(group == "case", 2.0, 0.0),
            "null": rng.normal(0.0, 1.0, 12),
        }
    )
    table, notes = compare_groups(df, by="group", metrics=["planted", "null"])
    planted, null = table.iloc[0], table.iloc[1]
    assert notes == []
    assert planted["q"] < 0.05
    assert planted["shift"] > 0 and planted["shift_ci_low"] > 0  # case minus control, interval excludes 0
    assert null["q"] > 0.05


def _nested_branches(seed: int) -> pd.DataFrame:
    """Balanced design: 2 groups x 6 subjects x 5 branches, large subject effect, group shift 1.5."""
    rng = np.random.default_rng(seed)
    rows = []
    for g, shift in [("A", 1.5), ("B", 0.0)]:
        for s in range(6):
            u = rng.normal(0.0, 1.0)
            for value in shift + u + rng.normal(0.0, 0.5, 5):
                rows.append({"subject": f"{g}{s}", "group": g, "m": value})
    return pd.DataFrame(rows)


def test_mixed_model_balanced_matches_subject_means():
    pytest.importorskip("statsmodels")
    # In a balanced nested design the REML fixed effect equals the difference of group means and its Wald z
    # equals the pooled two-sample t on subject means (Searle, Casella & McCulloch 1992, ch. 3;
    # Murtaugh 2007, Ecology 88:56-62); statsmodels refers z to the normal distribution.
    df = _nested_branches(8)
    out = mixed_model(df, by="group", metric="m")
    means = df.groupby(["group", "subject"])["m"].mean()
    t = stats.ttest_ind(means["A"], means["B"])
    assert out["n_subjects"] == 12 and out["n_branches"] == 60 and out["converged"]
    assert out["coef"] == pytest.approx(means["A"].mean() - means["B"].mean(), rel=1e-6)
    assert out["p"] == pytest.approx(2 * stats.norm.sf(abs(t.statistic)), rel=1e-3)


def test_mixed_model_none_without_statsmodels(monkeypatch):
    monkeypatch.setitem(sys.modules, "statsmodels", None)  # makes the import raise ImportError
    monkeypatch.setitem(sys.modules, "statsmodels.formula", None)
    monkeypatch.setitem(sys.modules, "statsmodels.formula.api", None)
    assert mixed_model(_nested_branches(8), by="group", metric="m") is None
