"""Penalised smoothing splines through centreline points, and arc-length resampling.

Points are fitted against cumulative chord length with a B-spline of degree 5 (so the third derivative,
needed for torsion, is continuous) on dense, uniform knots, penalising the third differences of the
coefficients (a P-spline, Eilers and Marx 1996). The penalty acts as a smooth low-pass filter whose
cut-off wavelength is the smoothing length given by the caller (tied to the vessel radius): unlike a
least-squares spline with sparse knots, its bias does not depend on where the knots fall relative to
the vessel's own undulations. Closed loops are fitted with periodic coefficients and a periodic penalty.

References
----------
P. H. C. Eilers, B. D. Marx, "Flexible smoothing with B-splines and penalties", Statistical Science
11(2):89-121, 1996. C. de Boor, A Practical Guide to Splines, Springer 1978.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.interpolate import BSpline
from scipy.linalg import solveh_banded
from scipy.sparse.linalg import spsolve

__all__ = ["CurveFit", "fit_curve", "arc_length_samples"]

_DENSE = 8  # evaluation points per output step for the arc-length integral
_ORDER = 3  # order of the difference penalty: its null space holds quadratics
_KNOTS_PER_CUTOFF = 8  # knot intervals per cut-off wavelength


@dataclass(frozen=True)
class CurveFit:
    """A fitted curve over parameter range [u0, u1] (mm of chord length).

    ``degree`` below 5 means the branch had too few points to determine a quintic (the fit is then the
    polynomial of degree n - 1 through its n points); below 3 torsion is undefined.
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


def _knots(u0: float, u1: float, k: int, spacing: float) -> np.ndarray:
    """Uniform knots covering [u0, u1], extended by k intervals beyond both ends (not clamped).

    All basis functions are then translates of one another, as the difference penalty assumes
    (Eilers and Marx 1996); clamped end knots make the ends wiggle.
    """
    intervals = max(1, int(np.ceil((u1 - u0) / spacing)))
    step = (u1 - u0) / intervals
    return u0 + step * np.arange(-k, intervals + k + 1)


def _penalised(u: np.ndarray, pts: np.ndarray, cutoff: float, k: int) -> BSpline | None:
    """P-spline fit: min |y - B c|^2 + lam |D c|^2 with D the third-difference operator.

    The knot spacing is ``cutoff / _KNOTS_PER_CUTOFF`` and ``lam`` puts the half-power point of the
    penalty's transfer function 1 / (1 + lam (2 sin(w / 2))^(2q)) at wavelength ``cutoff``.
    """
    delta = cutoff / _KNOTS_PER_CUTOFF
    t = _knots(u[0], u[-1], k, delta)
    n_coef = len(t) - k - 1
    # the penalty's null space (polynomials of degree < q) must be pinned down by the points
    q = min(_ORDER, len(u), n_coef - 1)
    B = BSpline.design_matrix(np.clip(u, t[k], t[-k - 1]), t, k)
    btb = (B.T @ B).tocsr()
    if q >= 1:
        w_c = 2 * np.pi / _KNOTS_PER_CUTOFF
        lam = len(u) / n_coef / (2 * np.sin(w_c / 2)) ** (2 * q)
        stencil = np.diff(np.eye(q + 1), n=q, axis=0)[0]  # e.g. [-1, 3, -3, 1] for q = 3
        D = sparse.diags(stencil, np.arange(q + 1), shape=(n_coef - q, n_coef))
        btb = btb + lam * (D.T @ D)
    rhs = B.T @ pts
    bw = max(k, q)
    ab = np.zeros((bw + 1, n_coef))
    for d in range(bw + 1):
        ab[bw - d, d:] = btb.diagonal(d)
    try:
        coef = solveh_banded(ab, rhs)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(coef)):
        return None
    return BSpline(t, coef, k)


def _penalised_periodic(
    u: np.ndarray, pts: np.ndarray, period: float, cutoff: float, k: int
) -> BSpline | None:
    """Periodic P-spline on [0, period): the coefficients and the difference penalty wrap around."""
    n = max(int(np.ceil(period / (cutoff / _KNOTS_PER_CUTOFF))), 2 * k + 2)
    delta = period / n
    t = delta * np.arange(-k, n + k + 1)
    B = BSpline.design_matrix(np.mod(u, period), t, k).tocsc()
    # basis j + n is basis j shifted by one period: fold the last k columns onto the first k
    fold = sparse.csc_matrix((np.ones(n + k), (np.arange(n + k) % n, np.arange(n + k))), shape=(n, n + k))
    Bp = B @ fold.T
    q = min(_ORDER, len(u))
    w_c = 2 * np.pi / _KNOTS_PER_CUTOFF
    lam = len(u) / n / (2 * np.sin(w_c / 2)) ** (2 * q)
    stencil = np.diff(np.eye(q + 1), n=q, axis=0)[0]
    rows = np.repeat(np.arange(n), q + 1)
    cols = (np.arange(n)[:, None] + np.arange(q + 1)[None, :]).ravel() % n
    D = sparse.csc_matrix((np.tile(stencil, n), (rows, cols)), shape=(n, n))
    A = (Bp.T @ Bp + lam * (D.T @ D)).tocsc()
    try:
        coef = spsolve(A, Bp.T @ pts)
    except RuntimeError:
        return None
    coef = np.asarray(coef).reshape(n, -1)
    if not np.all(np.isfinite(coef)):
        return None
    return BSpline(t, np.concatenate([coef, coef[:k]]), k)


def fit_curve(points: np.ndarray, *, smoothing_mm: float, closed: bool = False) -> CurveFit | None:
    """Penalised quintic B-spline through (n, 3) points in mm.

    Parameters
    ----------
    points : (n, 3) float array, mm
        Ordered centreline points. For ``closed`` curves the last point connects back to the first
        (do not repeat it).
    smoothing_mm : float, mm
        Smoothing length: the penalty's cut-off wavelength is twice this (undulations shorter than
        that are filtered out), comparable to a least-squares spline with this knot spacing.
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
        period = u[-1]
        pts, u = pts[:-1], u[:-1]
    if len(pts) < 2:
        return None
    k = 5
    cutoff = 2.0 * smoothing_mm
    if not closed:
        spl = _penalised(u, pts, cutoff, k)
        return CurveFit(spl, float(u[0]), float(u[-1]), False, _degree(len(u))) if spl else None
    spl = _penalised_periodic(u, pts, period, cutoff, k)
    return CurveFit(spl, 0.0, float(period), True, _degree(len(u))) if spl is not None else None


def _degree(n_points: int) -> int:
    """Effective polynomial degree: few points are fitted by the penalty's null space (degree n - 1)."""
    return int(min(5, n_points - 1))


def arc_length_samples(
    fit: CurveFit, step_mm: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Resample a fitted curve at equal arc-length steps not larger than ``step_mm``.

    Arc length is integrated from |r'(u)| on a dense grid (composite Simpson rule on ``_DENSE`` sub-steps
    per output step). Open curves include both ends; closed curves cover one period without repeating
    the first point.

    Returns
    -------
    arc : (m,) float array, mm
    u : (m,) float array
        Spline parameter at those arc lengths.
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
    return arc, u, fit(u), fit(u, 1), fit(u, 2), fit(u, 3)
