"""Tests for vesselgeom.spline: penalised quintic fits and arc-length resampling.

Independent references used below:
- Helix (a cos t, a sin t, b t): length 2 pi n sqrt(a^2+b^2), kappa = a/(a^2+b^2), tau = b/(a^2+b^2)
  (METHODS.md, do Carmo 1976 sec. 1-5); circle of radius R: length 2 pi R, kappa = 1/R.
- Arc length of the fitted spline by adaptive quadrature of |r'(u)| (:func:`scipy.integrate.quad`).
- Chord versus arc of a curve with curvature kappa: chord = h (1 - kappa^2 h^2 / 24 + O(h^4)).
- Polynomial reproduction: a difference penalty of order q leaves polynomials of degree < q
  unpenalised (Eilers and Marx 1996), so 2 or 3 points are fitted exactly by the line or the quadratic
  through them.
- B-spline basis values and spline derivatives: :meth:`scipy.interpolate.BSpline.design_matrix` and
  :class:`scipy.interpolate.BSpline` evaluation; cumulative sums: :func:`numpy.cumsum`.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.interpolate import BSpline

from vesselgeom.frames import frenet_frame
from vesselgeom.spline import (
    CurvePack,
    _segment_cumsum,
    _uniform_bases,
    _uniform_basis,
    arc_length_samples,
    fit_curve,
    fit_curves,
)


def _helix_points(a: float, b: float, turns: float, step: float) -> np.ndarray:
    """Exact helix points at an arc-length step of about ``step`` mm."""
    n = int(round(2 * np.pi * turns * np.hypot(a, b) / step)) + 1
    t = np.linspace(0.0, 2 * np.pi * turns, n)
    return np.stack([a * np.cos(t), a * np.sin(t), b * t], axis=1)


def _ring_points(radius: float, n: int, centre=(1.0, -2.0, 3.0)) -> np.ndarray:
    th = 2 * np.pi * np.arange(n) / n
    return np.stack([radius * np.cos(th), radius * np.sin(th), np.zeros(n)], axis=1) + centre


@pytest.mark.parametrize(
    ("a", "b", "step", "knots"), [(10.0, 3.0, 0.5, 4.0), (10.0, 2.0, 1.0, 6.0), (5.0, 4.0, 0.3, 3.0)]
)
def test_helix_fit_length_curvature_torsion(a, b, step, knots):
    # METHODS.md helix closed forms: length within 0.1 %; kappa and tau from frenet_frame of the
    # resampled derivatives within 1 % once 3 x smoothing is trimmed from each end: a penalised spline's
    # ends feel the missing data over about one cut-off wavelength (2 x smoothing, Eilers and Marx 1996),
    # and torsion, a third derivative, rings on for about one more smoothing length (measured here).
    turns = 2.0
    fit = fit_curve(_helix_points(a, b, turns, step), smoothing_mm=knots)
    assert fit is not None and fit.degree == 5 and not fit.closed
    arc, _, r, d1, d2, d3 = arc_length_samples(fit, 0.5)
    length = 2 * np.pi * turns * np.hypot(a, b)
    assert arc[-1] == pytest.approx(length, rel=1e-3)
    f = frenet_frame(d1, d2, d3)
    inner = (arc > 3 * knots) & (arc < arc[-1] - 3 * knots)
    assert inner.sum() > 0.7 * len(arc)
    np.testing.assert_allclose(f.curvature[inner], a / (a**2 + b**2), rtol=0.01)
    np.testing.assert_allclose(f.torsion[inner], b / (a**2 + b**2), rtol=0.01)
    # resampled positions lie on the helix away from the ends: radius a about the z axis
    np.testing.assert_allclose(np.hypot(r[inner, 0], r[inner, 1]), a, atol=1e-3 * a)
    # and within 0.2 % of a at the very ends (the end effect, measured 0.15 % at 6 mm smoothing)
    np.testing.assert_allclose(np.hypot(r[:, 0], r[:, 1]), a, atol=2e-3 * a)


def test_helix_fit_length_matches_quadrature():
    # The resampled total arc length equals the spline's own length by adaptive quadrature of |r'(u)|.
    fit = fit_curve(_helix_points(10.0, 3.0, 2.0, 0.5), smoothing_mm=4.0)
    arc, *_ = arc_length_samples(fit, 0.5)
    ref, _ = quad(lambda u: np.linalg.norm(fit(np.array([u]), 1)), fit.u0, fit.u1, limit=500)
    assert arc[-1] == pytest.approx(ref, rel=1e-8)


@pytest.mark.parametrize("step", [0.5, 0.73, 2.0])
def test_resampling_steps_equal_and_not_larger(step):
    # arc_length_samples: equal arc steps no larger than requested, both ends included; consecutive
    # points are one step apart along the curve, so their chord is h (1 - kappa^2 h^2 / 24) <= h, with
    # kappa the fitted curve's own curvature at the step's midpoint.
    a, b = 10.0, 3.0
    kappa = a / (a**2 + b**2)
    fit = fit_curve(_helix_points(a, b, 2.0, 0.5), smoothing_mm=4.0)
    arc, _, r, *_ = arc_length_samples(fit, step)
    h = np.diff(arc)
    assert arc[0] == 0.0
    np.testing.assert_allclose(h, h[0], rtol=1e-12)
    assert h[0] <= step
    assert h[0] > step * (1 - 1.0 / len(h))  # the smallest equal division not exceeding ``step``
    chord = np.linalg.norm(np.diff(r, axis=0), axis=1)
    _, _, _, m1, m2, m3 = arc_length_samples(fit, step / 2)  # includes every midpoint
    k_mid = frenet_frame(m1, m2, m3).curvature[1::2]
    assert np.allclose(k_mid, kappa, rtol=0.1)  # the fit is the helix, up to its end effects
    np.testing.assert_allclose(chord, h * (1 - k_mid**2 * h**2 / 24), rtol=1e-5)
    np.testing.assert_allclose(r[[0, -1]], fit(np.array([fit.u0, fit.u1])), atol=1e-12)


@pytest.mark.parametrize(
    ("radius", "n", "knots"), [(8.0, 60, 4.0), (8.0, 200, 4.0), (3.0, 40, 1.5), (3.0, 100, 1.5)]
)
def test_closed_ring_fit(radius, n, knots):
    # Circle of radius R: closed fit is periodic (position and derivatives match across the seam),
    # kappa = 1/R within 0.5 % everywhere, length 2 pi R (METHODS.md "Circle"). Smoothing at most R/2:
    # the penalty is a low-pass filter of order 6 (third differences), so a circle of circumference
    # 2 pi R shrinks by about (2 s / (2 pi R))^6, below 1e-4 for s <= R/2 (Eilers and Marx 1996).
    pts = _ring_points(radius, n)
    fit = fit_curve(pts, smoothing_mm=knots, closed=True)
    assert fit is not None and fit.closed and fit.degree == 5
    ends = np.array([fit.u0, fit.u1])
    # the seam: gaps far below the fit's own approximation error budget (0.1 um on mm data)
    assert np.linalg.norm(fit(ends[:1]) - fit(ends[1:])) < 1e-4
    for nu in (1, 2):
        v0, v1 = fit(ends[:1], nu)[0], fit(ends[1:], nu)[0]
        assert np.linalg.norm(v0 - v1) < 1e-3 * np.linalg.norm(v0)
    arc, _, r, d1, d2, d3 = arc_length_samples(fit, 0.7)
    f = frenet_frame(d1, d2, d3)
    np.testing.assert_allclose(f.curvature, 1 / radius, rtol=0.005)
    # one period without repeating the first point: the last step closes the loop
    h = arc[1] - arc[0]
    assert arc[-1] + h == pytest.approx(2 * np.pi * radius, rel=1e-3)
    np.testing.assert_allclose(np.diff(arc), h, rtol=1e-12)
    assert h <= 0.7
    # the closing step is one arc step: chord 2 R sin(h / 2R)
    assert np.linalg.norm(r[-1] - r[0]) == pytest.approx(2 * radius * np.sin(h / (2 * radius)), rel=1e-4)
    # every resampled point is on the circle
    np.testing.assert_allclose(np.linalg.norm(r - (1.0, -2.0, 3.0), axis=1), radius, rtol=1e-4)


def test_closed_fit_starting_point_irrelevant():
    # A ring is the same curve whatever point starts the list: the curvature stays 1/R (0.5 %).
    pts = np.roll(_ring_points(6.0, 80), 17, axis=0)
    fit = fit_curve(pts, smoothing_mm=4.0, closed=True)
    _, _, _, d1, d2, d3 = arc_length_samples(fit, 0.5)
    np.testing.assert_allclose(frenet_frame(d1, d2, d3).curvature, 1 / 6.0, rtol=0.005)


def test_three_points_low_degree_interpolates():
    # Three points: the quadratic through them (effective degree 2 < 3, so torsion undefined).
    pts = np.array([[0.0, 0.0, 0.0], [1.0, 1.0, 0.0], [2.0, 0.0, 1.0]])
    fit = fit_curve(pts, smoothing_mm=4.0)
    assert fit is not None and fit.degree == 2
    u = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))]
    assert fit.u0 == 0.0 and fit.u1 == pytest.approx(u[-1])
    np.testing.assert_allclose(fit(u), pts, atol=1e-9)
    np.testing.assert_allclose(fit(u, 3), 0.0, atol=1e-9)  # a quadratic has no third derivative


def test_two_points_straight_segment():
    # Two points: the straight segment between them (effective degree 1).
    pts = np.array([[1.0, 2.0, 3.0], [4.0, 6.0, 3.0]])
    fit = fit_curve(pts, smoothing_mm=2.0)
    assert fit is not None and fit.degree == 1
    np.testing.assert_allclose(fit(np.array([0.0, 2.5, 5.0])), [pts[0], pts.mean(axis=0), pts[1]], atol=1e-9)


@pytest.mark.parametrize("closed", [False, True])
@pytest.mark.parametrize("pts", [np.array([[1.0, 2.0, 3.0]]), np.array([[1.0, 2.0, 3.0], [1.0, 2.0, 3.0]])])
def test_fewer_than_two_distinct_points_returns_none(pts, closed):
    # Documented: None when fewer than two distinct points remain.
    assert fit_curve(pts, smoothing_mm=2.0, closed=closed) is None


def test_no_points_returns_none():
    # Documented: None when fewer than two distinct points remain (here none at all).
    assert fit_curve(np.zeros((0, 3)), smoothing_mm=2.0) is None


def test_segment_cumsum_matches_numpy_run_by_run():
    # numpy reference: np.cumsum of each run alone, bit for bit (short runs share one padded table,
    # long ones are summed one by one; empty and single-element runs included)
    rng = np.random.default_rng(3)
    for _ in range(100):
        lengths = rng.integers(0, 300, rng.integers(1, 40))
        lengths[rng.random(len(lengths)) < 0.2] = rng.integers(0, 2)
        values = rng.normal(size=lengths.sum()) * 10 ** rng.uniform(-3, 3, lengths.sum())
        bounds = np.r_[0, np.cumsum(lengths)]
        ref = [np.cumsum(values[bounds[i] : bounds[i + 1]]) for i in range(len(lengths))]
        got = _segment_cumsum(values, lengths)
        np.testing.assert_array_equal(got, np.concatenate(ref) if ref else got)


@pytest.mark.parametrize("k", [0, 1, 2, 3, 4, 5])
def test_uniform_basis_matches_scipy(k):
    # scipy reference: BSpline.design_matrix on the unit-spaced knots around interval [0, 1]; the
    # several-degree recurrence gives each degree exactly as computed alone
    f = np.r_[0.0, np.random.default_rng(k).uniform(0, 1, 200), 1.0 - 1e-12]
    t = np.arange(-k, k + 2, dtype=float)
    ref = BSpline.design_matrix(f, t, k).toarray()
    np.testing.assert_allclose(_uniform_basis(f, k), ref, rtol=0, atol=1e-13)
    for deg, b in _uniform_bases(f, list(range(k + 1))).items():
        np.testing.assert_array_equal(b, _uniform_basis(f, deg))


def test_pack_derivatives_match_scipy_bspline():
    # scipy reference: BSpline.__call__(u, nu) of each fitted curve, for nu = 0..3 at once
    curves = [_helix_points(10.0, 3.0, 1.0, 0.7), _helix_points(6.0, -2.0, 0.5, 0.4)[::-1] + 5.0]
    fits = fit_curves(curves, smoothing_mm=[2.0, 3.0])
    pack = CurvePack(fits)
    rng = np.random.default_rng(0)
    gid = rng.integers(0, 2, 300)
    u = rng.uniform(pack.u0[gid], pack.u1[gid])
    got = pack.derivatives(gid, u, (0, 1, 2, 3))
    for nu, values in zip((0, 1, 2, 3), got, strict=True):
        ref = np.concatenate([fits[g].spline(u[gid == g], nu) for g in (0, 1)])
        order = np.argsort(gid, kind="stable")
        scale = np.max(np.abs(ref))
        np.testing.assert_allclose(values[order], ref, rtol=0, atol=1e-11 * scale)
        np.testing.assert_array_equal(values, pack(gid, u, nu))


def test_fit_curves_equals_fit_curve_bit_for_bit():
    # documented in fit_curves: each curve's fit exactly as fit_curve would return it, whatever is fitted
    # with it (reference: the curve fitted alone); shuffled batches of open and closed curves
    rng = np.random.default_rng(5)
    curves = [
        _helix_points(8.0, 2.0, rng.uniform(0.3, 1.5), 0.6) + rng.uniform(-50, 50, 3) for _ in range(12)
    ]
    curves += [_ring_points(5.0, 40), np.array([[0.0, 0.0, 0.0], [1.0, 1.0, 0.0], [2.0, 0.0, 1.0]])]
    closed = [False] * 12 + [True, False]
    smooth = rng.uniform(1.0, 4.0, len(curves))
    alone = [fit_curve(c, smoothing_mm=s, closed=cl) for c, s, cl in zip(curves, smooth, closed, strict=True)]
    for perm in (np.arange(len(curves)), rng.permutation(len(curves))):
        batch = fit_curves(
            [curves[i] for i in perm], smoothing_mm=smooth[perm], closed=[closed[i] for i in perm]
        )
        for i, fit in zip(perm, batch, strict=True):
            np.testing.assert_array_equal(fit.spline.c, alone[i].spline.c)
            np.testing.assert_array_equal(fit.spline.t, alone[i].spline.t)
            assert (fit.u0, fit.u1, fit.degree) == (alone[i].u0, alone[i].u1, alone[i].degree)
