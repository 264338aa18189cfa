"""Least-squares smoothing splines through centreline points, and arc-length resampling.

Points are fitted with a least-squares B-spline of degree 5 (so the third derivative, needed for torsion,
is continuous) against cumulative chord length, with uniformly spaced interior knots. The knot spacing is
the smoothing scale: the caller ties it to the local vessel radius and voxel size. Closed loops are fitted
periodically by wrapping the points around before the fit and keeping one period.

References
----------
C. de Boor, A Practical Guide to Splines, Springer 1978 (least-squares spline approximation);
:func:`scipy.interpolate.make_lsq_spline`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.interpolate import BSpline, make_lsq_spline

__all__ = ["CurveFit", "fit_curve", "arc_length_samples"]

_DENSE = 8  # evaluation points per output step for the arc-length integral


@dataclass(frozen=True)
class CurveFit:
    """A fitted curve over parameter range [u0, u1] (mm of chord length).

    ``degree`` below 5 means the branch had too few points for a quintic; below 3 torsion is undefined.
    """

    spline: BSpline
    u0: float
    u1: float
    closed: bool
    degree: int

    def __call__(self, u: np.ndarray, nu: int = 0) -> np.ndarray:
        return self.spline(np.asarray(u, float), nu)


def _chord_parameter(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    steps = np.linalg.norm(np.diff(points, axis=0), axis=1)
    keep = np.r_[True, steps > 1e-9]
    points = points[keep]
    u = np.concatenate([[0.0], np.cumsum(steps[steps > 1e-9])])
    return points, u


def _knots(u0: float, u1: float, n_points: int, k: int, spacing: float) -> np.ndarray:
    intervals = max(1, int(round((u1 - u0) / spacing)))
    intervals = min(intervals, max(1, n_points - k))  # at least as many points as coefficients
    inner = np.linspace(u0, u1, intervals + 1)[1:-1]
    return np.r_[[u0] * (k + 1), inner, [u1] * (k + 1)]


def fit_curve(points: np.ndarray, *, knot_spacing: float, closed: bool = False) -> CurveFit | None:
    """Least-squares quintic B-spline through (n, 3) points in mm.

    Parameters
    ----------
    points : (n, 3) float array, mm
        Ordered centreline points. For ``closed`` curves the last point connects back to the first
        (do not repeat it).
    knot_spacing : float, mm
        Distance between interior knots along the chord-length parameter.
    closed : bool
        Fit a periodic curve.

    Returns
    -------
    CurveFit or None
        None when fewer than two distinct points remain.
    """
    pts = np.asarray(points, float).reshape(-1, 3)
    if len(pts) < 2:
        return None
    if closed:
        pts = np.concatenate([pts, pts[:1]])
    pts, u = _chord_parameter(pts)
    if closed and len(pts) > 1:
        pts, u = pts[:-1], u  # u[-1] is now the period
        period = u[-1]
        u = u[:-1]
    if len(pts) < 2:
        return None
    k = int(min(5, len(pts) - 1))
    if not closed:
        t = _knots(u[0], u[-1], len(pts), k, knot_spacing)
        spl = _lsq(u, pts, t, k)
        return CurveFit(spl, float(u[0]), float(u[-1]), False, k) if spl is not None else None
    # periodic: wrap about two knot spacings of points on each side, fit, keep one period
    wrap = min(2.0 * knot_spacing + 1.0, period)
    before = u >= period - wrap
    after = u <= wrap
    uu = np.concatenate([u[before] - period, u, u[after] + period])
    pp = np.concatenate([pts[before], pts, pts[after]])
    t = _knots(uu[0], uu[-1], len(pp), k, knot_spacing)
    spl = _lsq(uu, pp, t, k)
    return CurveFit(spl, 0.0, float(period), True, k) if spl is not None else None


def _lsq(u: np.ndarray, pts: np.ndarray, t: np.ndarray, k: int) -> BSpline | None:
    """LSQ fit, dropping interior knots until the Schoenberg-Whitney conditions hold."""
    while True:
        try:
            return make_lsq_spline(u, pts, t, k=k)
        except (ValueError, np.linalg.LinAlgError):
            inner = t[k + 1 : -k - 1]
            if inner.size == 0:
                return None
            u0, u1 = t[0], t[-1]
            t = _knots(u0, u1, len(u), k, (u1 - u0) / max(inner.size, 1))


def arc_length_samples(
    fit: CurveFit, step_mm: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Resample a fitted curve at equal arc-length steps not larger than ``step_mm``.

    Arc length is integrated from |r'(u)| on a dense grid (composite Simpson rule on ``_DENSE`` sub-steps
    per output step). Open curves include both ends; closed curves cover one period without repeating
    the first point.

    Returns
    -------
    arc : (m,) float array, mm
    r, d1, d2, d3 : (m, 3) float arrays
        Position and derivatives with respect to the spline parameter at those arc lengths.
    """
    approx = fit.u1 - fit.u0
    n_dense = max(int(np.ceil(approx / step_mm)) * _DENSE, 16) * 2 + 1
    ud = np.linspace(fit.u0, fit.u1, n_dense)
    speed = np.linalg.norm(fit(ud, 1), axis=1)
    h = ud[1] - ud[0]
    # cumulative Simpson over pairs of sub-intervals, trapezoid for the odd midpoints
    s = np.zeros(n_dense)
    s[2::2] = np.cumsum(h / 3 * (speed[0:-2:2] + 4 * speed[1:-1:2] + speed[2::2]))
    s[1::2] = s[0:-1:2] + h / 2 * (speed[0:-1:2] + speed[1::2])
    length = s[-1]
    if fit.closed:
        n = max(int(np.ceil(length / step_mm)), 3)
        arc = np.arange(n) * (length / n)
    else:
        n = max(int(np.ceil(length / step_mm)), 1) + 1
        arc = np.linspace(0.0, length, n)
    u = np.interp(arc, s, ud)
    return arc, fit(u), fit(u, 1), fit(u, 2), fit(u, 3)
