"""Tests for vesselgeom.metrics: distance metric, sum of angles, inflection count, integration.

Independent references used below:
- Bullitt, Gerig, Pizer, Lin, Aylward 2003 (IEEE TMI 22(9):1163-1171): DM = arc / chord, undefined
  for a loop; SOAM in the fine-sampling limit (1/L) integral sqrt(kappa^2 + tau^2) ds (METHODS.md),
  which is 1/sqrt(a^2+b^2) on a helix and 1/R on a circle; an inflection is a reversal of N.
- METHODS.md closed forms: sinusoid over N wavelengths has 2N - 1 interior inflections.
- Curvature and principal normal of the sinusoid and ellipse from analytic derivatives (sympy).
- Trapezoid rule error for f = x^2 on a uniform grid: exactly (b - a) h^2 f'' / 12 = h^2 / 6 on [0, 1]
  (any numerical analysis text, e.g. Burden & Faires, "Numerical Analysis", sec. 4.3).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp
from scipy.integrate import cumulative_trapezoid
from scipy.signal import find_peaks

from vesselgeom.errors import InputError
from vesselgeom.metrics import (
    count_inflections,
    count_inflections_many,
    distance_metric,
    integrate,
    integrate_many,
    sum_of_angles,
    sum_of_angles_many,
)

# --------------------------------------------------------------------------- distance metric


def test_distance_metric_ratio():
    # Bullitt 2003: DM = arc length / chord; a straight segment has DM = 1.
    assert distance_metric(12.0, 8.0) == 1.5
    assert distance_metric(7.25, 7.25) == 1.0


def test_distance_metric_helix_whole_turns():
    # METHODS.md: helix over whole turns DM = sqrt(a^2+b^2)/b (length 2 pi n sqrt(a^2+b^2), chord 2 pi n b).
    a, b, n = 10.0, 3.0, 2
    dm = distance_metric(2 * np.pi * n * np.hypot(a, b), 2 * np.pi * n * b)
    assert dm == pytest.approx(np.hypot(a, b) / b, rel=1e-14)


@pytest.mark.parametrize("chord", [0.0, -1.0, float("nan"), float("inf")])
def test_distance_metric_undefined_chord(chord):
    # Bullitt 2003 / METHODS.md: DM is undefined for a closed loop (chord 0) or unknown chord.
    assert np.isnan(distance_metric(10.0, chord))


# --------------------------------------------------------------------------- sum of angles


def _helix_points(a: float, b: float, turns: float, n: int) -> np.ndarray:
    t = np.linspace(0.0, 2 * np.pi * turns, n)
    return np.stack([a * np.cos(t), a * np.sin(t), b * t], axis=1)


@pytest.mark.parametrize(("a", "b"), [(10.0, 3.0), (10.0, 2.0), (3.0, 6.0)])
def test_sum_of_angles_helix_fine_limit(a, b):
    # METHODS.md (Bullitt 2003): SOAM -> (1/L) integral sqrt(kappa^2 + tau^2) ds = 1/sqrt(a^2+b^2)
    # on a helix. n points give n - 3 angles over n - 1 segments, so the sampled value is low by about
    # 2 / (n - 1) = 2e-4; the per-angle discretisation error is O(dt^2) ~ 1e-6.
    n = 10001
    soam = sum_of_angles(_helix_points(a, b, 2, n))
    expected = 1 / np.hypot(a, b)
    assert soam == pytest.approx(expected, rel=5e-4)
    assert soam < expected


def test_sum_of_angles_helix_in_plane_only():
    # With TP forced to 0 (points marked straight), only the in-plane angles remain: their sum per
    # length tends to the curvature a/(a^2+b^2) (Bullitt 2003 IP term; kappa from METHODS.md).
    a, b, n = 10.0, 3.0, 10001
    soam = sum_of_angles(_helix_points(a, b, 2, n), straight=np.ones(n, bool))
    assert soam == pytest.approx(a / (a**2 + b**2), rel=5e-4)


def test_sum_of_angles_straight_line():
    # A straight line turns by nothing: SOAM = 0 (Bullitt 2003). Rounding in arccos near 1 leaves
    # at most ~1e-8 rad per angle, so the bound 1e-6 rad/mm at a 0.1 mm step.
    u = np.array([1.0, 2.0, 3.0]) / np.sqrt(14.0)
    s = np.linspace(0.0, 30.0, 301)
    pts = np.array([1.0, -2.0, 0.5]) + s[:, None] * u
    assert 0.0 <= sum_of_angles(pts) < 1e-6


@pytest.mark.parametrize("radius", [3.0, 7.0])
def test_sum_of_angles_closed_circle(radius):
    # Planar circle: SOAM = 1/R (METHODS.md limit with tau = 0). With n equally spaced points on a
    # closed circle each angle is 2 pi / n and each chord 2 R sin(pi / n), so the sampled value is
    # (1/R) (pi/n) / sin(pi/n), high by (pi/n)^2 / 6 = 1.6e-6 at n = 1000.
    n = 1000
    th = 2 * np.pi * np.arange(n) / n
    pts = np.stack([radius * np.cos(th), radius * np.sin(th), np.zeros(n)], axis=1)
    exact_discrete = (np.pi / n) / np.sin(np.pi / n) / radius
    assert sum_of_angles(pts, closed=True) == pytest.approx(exact_discrete, rel=1e-6)
    assert sum_of_angles(pts, closed=True) == pytest.approx(1 / radius, rel=2e-6)


def test_sum_of_angles_open_circle_arc():
    # Open planar arc of a circle (three quarters): SOAM -> 1/R, low by about 2/(n-1) (missing end angles).
    R, n = 5.0, 3001
    th = np.linspace(0.0, 1.5 * np.pi, n)
    pts = np.stack([R * np.cos(th), R * np.sin(th), np.zeros(n)], axis=1)
    assert sum_of_angles(pts) == pytest.approx(1 / R, rel=1e-3)


def test_sum_of_angles_too_few_points():
    # Four points are the minimum for one torsional angle (METHODS.md definition): NaN below that.
    assert np.isnan(sum_of_angles(np.zeros((3, 3)) + np.arange(3)[:, None]))


# --------------------------------------------------------------------------- inflections

_t = sp.symbols("t", real=True)


def _planar_frame(r: sp.Matrix, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Arc length, curvature and binormal of r(t) from sympy derivatives (do Carmo 1-5).

    N = (dT/dt) / |dT/dt| with T = r' / |r'|; B = T x N; kappa = |r' x r''| / |r'|^3.
    """
    d1, d2 = r.diff(_t), r.diff(_t, 2)
    speed = sp.sqrt(d1.dot(d1))
    c = d1.cross(d2)
    kappa = sp.sqrt(c.dot(c)) / speed**3
    dT = (d1 / speed).diff(_t)

    def ev(e):
        return np.broadcast_to(np.asarray(sp.lambdify(_t, e, "numpy")(t), float), t.shape)

    sp_ = ev(speed)
    arc = cumulative_trapezoid(sp_, t, initial=0.0)
    dtv = np.stack([ev(dT[i]) for i in range(3)], axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        normal = dtv / np.linalg.norm(dtv, axis=1, keepdims=True)
    tangent = np.stack([ev(d1[i]) for i in range(3)], axis=1) / sp_[:, None]
    return arc, ev(kappa), np.cross(tangent, normal)


@pytest.mark.parametrize("periods", [1, 2, 3, 5])
@pytest.mark.parametrize(("amplitude", "wavelength"), [(4.0, 40.0), (2.0, 15.0)])
def test_inflections_sinusoid(periods, amplitude, wavelength):
    # METHODS.md: N wavelengths of y = A sin(2 pi x / lambda) have 2N - 1 interior inflections.
    A, lam = amplitude, wavelength
    r = sp.Matrix([_t, A * sp.sin(2 * sp.pi * _t / lam), 0])
    t = np.linspace(0.0, periods * lam, 400 * periods + 1)
    arc, kappa, binormal = _planar_frame(r, t)
    kmax = A * (2 * np.pi / lam) ** 2  # METHODS.md kappa_max
    assert kappa.max() == pytest.approx(kmax, rel=1e-6)
    n = count_inflections(arc, kappa, binormal, floor=0.1 * kmax)
    assert n == 2 * periods - 1


def test_inflections_helix_none():
    # A helix has constant curvature and N never reverses: no inflections (METHODS.md).
    a, b = 10.0, 3.0
    r = sp.Matrix([a * sp.cos(_t), a * sp.sin(_t), b * _t])
    t = np.linspace(0.0, 6 * np.pi, 3001)
    arc, kappa, binormal = _planar_frame(r, t)
    assert count_inflections(arc, kappa, binormal, floor=0.01) == 0


@pytest.mark.parametrize("closed", [True, False])
def test_inflections_circle_none(closed):
    # A circle (open arc or closed loop) never inflects: N always points at the centre.
    R = 6.0
    r = sp.Matrix([R * sp.cos(_t), R * sp.sin(_t), 0])
    t = 2 * np.pi * np.arange(2000) / 2000 if closed else np.linspace(0, 1.8 * np.pi, 2000)
    arc, kappa, binormal = _planar_frame(r, t)
    assert count_inflections(arc, kappa, binormal, floor=0.01, closed=closed) == 0


def test_inflections_end_exclusion():
    # Three wavelengths: the 5 interior inflections sit at x = lambda/2, lambda, ..., 5 lambda/2
    # (METHODS.md). Excluding a little over lambda/2 of arc at each end drops the first and last.
    A, lam = 4.0, 40.0
    r = sp.Matrix([_t, A * sp.sin(2 * sp.pi * _t / lam), 0])
    t = np.linspace(0.0, 3 * lam, 1201)
    arc, kappa, binormal = _planar_frame(r, t)
    s_half = np.interp(lam / 2, t, arc)
    floor = 0.1 * A * (2 * np.pi / lam) ** 2
    assert count_inflections(arc, kappa, binormal, floor=floor, end_exclusion_mm=0.9 * s_half) == 5
    assert count_inflections(arc, kappa, binormal, floor=floor, end_exclusion_mm=1.1 * s_half) == 3


@pytest.mark.parametrize("closed", [True, False])
def test_inflections_ellipse_none(closed):
    # Bullitt 2003 / METHODS.md: an inflection is a reversal of the principal normal (relative to the
    # direction of travel, i.e. of B = T x N). A planar convex
    # curve (ellipse x = 20 cos t, y = 10 sin t) has signed curvature of one sign everywhere and N
    # turns continuously, so it has no inflection, closed or as an open arc through both vertices.
    r = sp.Matrix([20 * sp.cos(_t), 10 * sp.sin(_t), 0])
    if closed:
        t = 2 * np.pi * np.arange(2000) / 2000
    else:
        t = np.linspace(-0.4 * np.pi, 1.4 * np.pi, 1801)  # hits 0, pi/2, pi
    arc, kappa, binormal = _planar_frame(r, t)
    # curvature of an ellipse is positive everywhere: min b/a^2, max a/b^2 (closed form)
    assert kappa.min() == pytest.approx(10 / 400, rel=1e-6)
    assert kappa.max() == pytest.approx(20 / 100, rel=1e-6)
    assert count_inflections(arc, kappa, binormal, floor=0.01, closed=closed) == 0


def test_inflections_too_short():
    # Fewer than three samples cannot hold a curvature minimum between two maxima.
    assert count_inflections(np.array([0.0, 1.0]), np.ones(2), np.ones((2, 3)), floor=0.1) == 0


# --------------------------------------------------------------------------- integrate


def test_integrate_trapezoid_exact_error():
    # Trapezoid rule on f = x^2 over [0, 1] with n intervals: exactly 1/3 + h^2/6 (error term
    # (b - a) h^2 f''/12 with f'' = 2 constant). A linear function is integrated exactly.
    n = 10
    x = np.linspace(0.0, 1.0, n + 1)
    assert integrate(x**2, x) == pytest.approx(1 / 3 + (1 / n) ** 2 / 6, rel=1e-13)
    assert integrate(3 * x + 2, x) == pytest.approx(1.5 + 2.0, rel=1e-14)


def test_integrate_nonuniform_arc():
    # Piecewise-linear integrand on a non-uniform grid is integrated exactly: integral of kappa ds
    # with kappa linear in s from 0.1 to 0.3 over 5 mm is 5 * 0.2 = 1.0 rad (Hart 1999 total curvature).
    s = np.array([0.0, 0.3, 1.7, 2.0, 4.1, 5.0])
    kappa = 0.1 + 0.04 * s
    assert integrate(kappa, s) == pytest.approx(1.0, rel=1e-14)


def test_integrate_fewer_than_two_samples():
    # An integral over a single point or no points is zero.
    assert integrate(np.array([3.0]), np.array([1.0])) == 0.0
    assert integrate(np.array([]), np.array([])) == 0.0


# --------------------------------------------------------------------------- many curves at once
# Reference for each *_many function: its one-curve form applied curve by curve (checked above against
# closed forms), and scipy.signal.find_peaks for the peak search. The *_many forms repeat the same
# element-wise arithmetic and numpy's pairwise summation, so sums agree to rounding: 1e-12 relative
# allows for a different summation order only.


def _offsets(sizes) -> np.ndarray:
    return np.r_[0, np.cumsum(sizes)].astype(np.intp)


def test_integrate_many_trapezoid_exact_error():
    # Trapezoid rule on f = x^2 over [0, 1] with n intervals: 1/3 + h^2/6 (Burden & Faires, sec. 4.3),
    # for several n in one call; one or no sample integrates to 0.
    ns = [10, 3, 200, 1]
    xs = [np.linspace(0.0, 1.0, n + 1) for n in ns] + [np.array([0.5]), np.array([])]
    x = np.concatenate(xs)
    out = integrate_many(x**2, x, _offsets([len(v) for v in xs]))
    expected = [1 / 3 + (1 / n) ** 2 / 6 for n in ns] + [0.0, 0.0]
    assert out == pytest.approx(expected, rel=1e-13)


def test_integrate_many_matches_integrate():
    rng = np.random.default_rng(3)
    sizes = [0, 1, 2, 3, 7, 8, 9, 129, 300, 5000, 0, 2]
    arcs = [np.cumsum(rng.uniform(0.1, 1.0, n)) for n in sizes]
    vals = [rng.uniform(0.0, 2.0, n) for n in sizes]
    out = integrate_many(np.concatenate(vals), np.concatenate(arcs), _offsets(sizes))
    ref = [integrate(v, a) for v, a in zip(vals, arcs, strict=True)]
    assert out == pytest.approx(ref, rel=1e-12, abs=0.0)


def test_integrate_many_bad_offsets():
    with pytest.raises(InputError, match="offsets"):
        integrate_many(np.ones(4), np.arange(4.0), np.array([0, 3]))


def test_sum_of_angles_many_closed_forms():
    # Helix SOAM -> 1/sqrt(a^2+b^2) (fine limit, low by about 2/(n-1)) and the closed circle's exact
    # discrete value (1/R)(pi/n)/sin(pi/n) (Bullitt 2003; METHODS.md), in one call.
    n = 10001
    helix_pts = _helix_points(10.0, 3.0, 2, n)
    m, R = 1000, 7.0
    th = 2 * np.pi * np.arange(m) / m
    circle = np.stack([R * np.cos(th), R * np.sin(th), np.zeros(m)], axis=1)
    out = sum_of_angles_many(
        np.concatenate([helix_pts, circle]), _offsets([n, m]), closed=np.array([False, True])
    )
    assert out[0] == pytest.approx(1 / np.hypot(10.0, 3.0), rel=5e-4)
    assert out[1] == pytest.approx((np.pi / m) / np.sin(np.pi / m) / R, rel=1e-6)


def test_sum_of_angles_many_matches_sum_of_angles():
    rng = np.random.default_rng(4)
    sizes = [1, 2, 3, 4, 5, 8, 50, 400, 0, 3, 6, 1000]
    closed = np.array([i % 2 == 1 for i in range(len(sizes))])
    curves = [np.cumsum(rng.normal(size=(n, 3)), axis=0) for n in sizes]
    curves[6][10:20] = curves[6][10] + np.arange(10)[:, None] * np.array([1.0, 0.5, 0.2])  # straight run
    straight = [rng.uniform(size=n) < 0.2 for n in sizes]
    pts = np.concatenate(curves)
    for st in (None, np.concatenate(straight)):
        out = sum_of_angles_many(pts, _offsets(sizes), closed=closed, straight=st)
        for i, (p, c) in enumerate(zip(curves, closed, strict=True)):
            ref = sum_of_angles(p, closed=bool(c), straight=None if st is None else straight[i])
            assert (np.isnan(ref) and np.isnan(out[i])) or out[i] == pytest.approx(ref, rel=1e-12, abs=0)
    # fewer than four points, counting a closed curve's three repeated ones: NaN
    assert np.isnan(out[[0, 2]]).all() and np.isfinite(out[[1, 3]]).all()


def test_find_peaks_many_matches_scipy():
    # scipy.signal.find_peaks(height=floor, prominence=floor) is the reference implementation; signals
    # quantised to a coarse grid have plateaus, equal peaks and plateaus at the ends.
    from vesselgeom.metrics import _find_peaks_many

    rng = np.random.default_rng(5)
    for trial in range(200):
        sizes = rng.integers(0, 60, size=rng.integers(1, 12))
        sigs = [np.round(np.cumsum(rng.normal(size=n)) * (1 + trial % 3)) / 4 for n in sizes]
        x = np.concatenate(sigs) if len(sigs) else np.zeros(0)
        floor = float(rng.choice([0.0, 0.25, 0.5, 1.0]))
        ref = np.concatenate(
            [
                find_peaks(s, height=floor, prominence=floor)[0] + o
                for s, o in zip(sigs, _offsets(sizes)[:-1], strict=True)
            ]
        )
        np.testing.assert_array_equal(_find_peaks_many(x, _offsets(sizes), floor), ref)


def _random_curvature(rng, n: int, closed: bool):
    """Curvature |s| and binormals sign(s) u of a wavy signal s: N reverses between lobes of s."""
    t = np.arange(n) * rng.uniform(0.05, 0.4)
    s = np.sin(t) + rng.uniform(0.0, 0.6) * np.sin(rng.uniform(1.5, 4.0) * t + rng.uniform(0, 6))
    s = s + rng.normal(scale=rng.choice([0.0, 0.05]), size=n)
    if closed:  # periodic: wrap smoothly onto itself
        s = np.sin(2 * np.pi * rng.integers(1, 5) * np.arange(n) / n) + 0.05 * rng.normal(size=n)
    k = np.round(np.abs(s), int(rng.choice([2, 6])))  # rounding makes plateaus
    u = rng.normal(size=3)
    u /= np.linalg.norm(u)
    b = np.sign(s)[:, None] * u
    b[rng.uniform(size=n) < 0.05] = np.cross(u, [0.0, 0.0, 1.0])  # a few at right angles: dot 0
    b[k <= 0.1] = np.nan  # undefined below the floor
    k[rng.uniform(size=n) < 0.02] = np.nan  # nan_to_num turns these into 0
    # steps on a binary grid half the time, so minima fall exactly on the end-exclusion limits
    steps = rng.choice([0.125, 0.25], n) if rng.uniform() < 0.5 else rng.uniform(0.05, 0.3, n)
    arc = np.cumsum(steps)
    measured = np.zeros(n, bool)
    if rng.uniform() < 0.8:  # else nothing measured: the whole curve counts
        measured[rng.integers(0, n // 3 + 1) : n - rng.integers(0, n // 3 + 1)] = True
    return arc, k, b, measured


def test_count_inflections_many_matches_count_inflections():
    # Reference: count_inflections curve by curve (peak search by scipy.signal.find_peaks).
    rng = np.random.default_rng(6)
    total = total_closed = 0
    for _trial in range(30):
        sizes = rng.integers(0, 400, size=rng.integers(1, 15))
        closed = rng.uniform(size=len(sizes)) < 0.3
        curves = [_random_curvature(rng, int(n), bool(c)) for n, c in zip(sizes, closed, strict=True)]
        excl = rng.integers(0, 40, size=len(sizes)) * 0.125
        arc, k, b, meas = (np.concatenate([c[i] for c in curves]) for i in range(4))
        b = b.reshape(-1, 3)
        for measured in (meas, None):
            out = count_inflections_many(
                arc,
                k,
                b,
                _offsets(sizes),
                floor=0.1,
                dip=0.5,
                end_exclusion_mm=excl,
                closed=closed,
                measured=measured,
            )
            ref = [
                count_inflections(
                    a_,
                    k_,
                    b_,
                    floor=0.1,
                    dip=0.5,
                    end_exclusion_mm=e,
                    closed=bool(c),
                    measured=None if measured is None else m_,
                )
                for (a_, k_, b_, m_), e, c in zip(curves, excl, closed, strict=True)
            ]
            np.testing.assert_array_equal(out, ref)
            total += sum(ref)
            total_closed += sum(r for r, c in zip(ref, closed, strict=True) if c)
    assert total > 100 and total_closed > 10  # the comparison covered many inflections


@pytest.mark.parametrize("periods", [1, 2, 3, 5])
def test_count_inflections_many_sinusoids(periods):
    # METHODS.md: N wavelengths of y = A sin(2 pi x / lambda) have 2N - 1 interior inflections; a circle
    # has none (closed or open). All in one call.
    parts = []
    for A, lam in ((4.0, 40.0), (2.0, 15.0)):
        r = sp.Matrix([_t, A * sp.sin(2 * sp.pi * _t / lam), 0])
        parts.append(_planar_frame(r, np.linspace(0.0, periods * lam, 400 * periods + 1)))
    circle = sp.Matrix([6 * sp.cos(_t), 6 * sp.sin(_t), 0])
    parts.append(_planar_frame(circle, 2 * np.pi * np.arange(2000) / 2000))
    arc, kappa, binormal = (np.concatenate([p[i] for p in parts]) for i in range(3))
    out = count_inflections_many(
        arc,
        kappa,
        binormal,
        _offsets([len(p[0]) for p in parts]),
        floor=0.1 * 2.0 * (2 * np.pi / 15.0) ** 2,
        closed=np.array([False, False, True]),
    )
    np.testing.assert_array_equal(out, [2 * periods - 1, 2 * periods - 1, 0])
