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

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.interpolate import BSpline
from scipy.linalg import solveh_banded
from scipy.sparse.linalg import spsolve

__all__ = ["CurveFit", "fit_curve", "fit_curves", "arc_length_samples"]

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


def _uniform_basis(f: np.ndarray, k: int) -> np.ndarray:
    """Values of the k + 1 B-splines of degree ``k`` on unit-spaced knots that are non-zero at ``f``.

    ``f`` (n,) is the position within the knot interval [i, i + 1] (0 <= f <= 1); column m of the
    (n, k + 1) result is the basis function starting at knot i - k + m. This is de Boor's recurrence
    (de Boor 1978, BSPLVB) with the knot differences of a uniform knot vector, where every denominator
    equals the current degree.
    """
    return _uniform_bases(f, (k,))[k]


def _uniform_bases(f: np.ndarray, degrees: Sequence[int]) -> dict[int, np.ndarray]:
    """:func:`_uniform_basis` for several degrees, from one run of the recurrence.

    The recurrence for degree k passes through the bases of every lower degree, so each is taken on the
    way, with the same values as computed alone. Columns are stored contiguously while they are built;
    the (n, degree + 1) results are transposed views.
    """
    top = max(degrees)
    b = np.zeros((top + 1, len(f)))
    b[0] = 1.0
    out = {0: b[:1].T.copy()} if 0 in degrees else {}
    saved = np.empty(len(f))
    temp = np.empty(len(f))
    for j in range(1, top + 1):
        saved[:] = 0.0
        for r in range(j):
            np.divide(b[r], j, out=temp)
            np.add(saved, (r + 1 - f) * temp, out=b[r])
            np.multiply(f + j - r - 1, temp, out=saved)  # as written: rounded left to right
        b[j] = saved
        if j in degrees:
            out[j] = b[: j + 1].T.copy() if j < top else b.T
    return out


def _linspace(start: np.ndarray, stop: np.ndarray, num: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Concatenated ``np.linspace(start[i], stop[i], num[i])`` (same arithmetic) and each value's group."""
    num = np.asarray(num, np.intp)
    gid = np.repeat(np.arange(len(num)), num)
    j = np.arange(len(gid)) - np.repeat(np.cumsum(num) - num, num)
    div = np.maximum(num - 1, 1)
    step = ((stop - start) / div)[gid]
    y = j * step + start[gid]
    last = np.cumsum(num)[num > 1] - 1
    y[last] = stop[num > 1]
    return y, gid


def _segment_cumsum(values: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """``np.cumsum`` of each consecutive run of ``values`` (lengths ``lengths``), run by run.

    One cumulative sum over all runs minus each run's starting value would carry the rounding of the
    preceding runs' total into every run, so a curve's result would depend on the other curves batched
    with it; run by run it is the same, bit for bit, as for the curve alone. Short runs of similar
    length (within a factor of two) are laid out as the columns of a zero-padded array and summed down
    the columns at once, which adds in the same order as a cumulative sum of each run alone.
    """
    lengths = np.asarray(lengths, np.intp)
    out = np.empty_like(values)
    starts = np.cumsum(lengths) - lengths
    size_class = np.ceil(np.log2(np.maximum(lengths, 1))).astype(np.intp)
    for c in np.unique(size_class[lengths > 0]).tolist():
        runs = np.flatnonzero((size_class == c) & (lengths > 0))
        if c > 6:  # long runs: one call each is cheaper than the table's indexing
            for lo, n_i in zip(starts[runs].tolist(), lengths[runs].tolist(), strict=True):
                np.cumsum(values[lo : lo + n_i], out=out[lo : lo + n_i])
            continue
        n = lengths[runs]
        col = np.repeat(np.arange(len(runs)), n)
        row = np.arange(len(col)) - np.repeat(np.cumsum(n) - n, n)
        src = np.repeat(starts[runs], n) + row
        table = np.zeros((int(n.max()), len(runs)), values.dtype)
        table[row, col] = values[src]
        np.cumsum(table, axis=0, out=table)
        out[src] = table[row, col]
    return out


def _penalised_many(
    u: np.ndarray, pts: np.ndarray, n_pts: np.ndarray, cutoff: np.ndarray, k: int
) -> list[BSpline | None]:
    """P-spline fits of many open curves: min |y - B c|^2 + lam |D c|^2, D the third-difference operator.

    The curves are consecutive runs of ``n_pts`` (each >= 2) parameter values ``u`` (m,) and points
    ``pts`` (m, 3), with one ``cutoff`` (mm) each. The knot spacing is ``cutoff / _KNOTS_PER_CUTOFF``
    and ``lam`` puts the half-power point of the penalty's transfer function
    1 / (1 + lam (2 sin(w / 2))^(2q)) at wavelength ``cutoff``. The banded normal equations are assembled
    directly from the uniform basis (each point touches k + 1 consecutive coefficients) for all curves
    at once, as one block-diagonal banded system solved by a single banded Cholesky factorisation.
    """
    n_curves = len(n_pts)
    if not n_curves:
        return []
    ends = np.cumsum(n_pts)
    gid = np.repeat(np.arange(n_curves), n_pts)
    u0 = u[ends - n_pts]
    u1 = u[ends - 1]
    delta = cutoff / _KNOTS_PER_CUTOFF
    intervals = np.maximum(1, np.ceil((u1 - u0) / delta)).astype(np.intp)
    step = (u1 - u0) / intervals  # knots t_j = u0 + step * j, j = -k .. intervals + k
    n_coef = intervals + k
    off = np.cumsum(n_coef) - n_coef
    total = int(n_coef.sum())
    # the penalty's null space (polynomials of degree < q) must be pinned down by the points
    q = np.minimum(np.minimum(_ORDER, n_pts), n_coef - 1)
    t_lo = u0 + step * 0
    t_hi = u0 + step * intervals
    h = (u0 + step) - t_lo
    x = (np.clip(u, t_lo[gid], t_hi[gid]) - t_lo[gid]) / h[gid]
    first = np.clip(np.floor(x), 0, intervals[gid] - 1).astype(np.intp)
    vals = _uniform_basis(x - first, k)
    cols0 = first + off[gid]
    bw = k
    # upper banded storage: ab[bw - d, j] = A[j - d, j]
    a_idx, b_idx = np.triu_indices(k + 1)
    flat = (bw - (b_idx - a_idx))[None, :] * total + cols0[:, None] + b_idx[None, :]
    ab = np.bincount(
        flat.ravel(), weights=(vals[:, a_idx] * vals[:, b_idx]).ravel(), minlength=(bw + 1) * total
    )
    ab = ab.reshape(bw + 1, total)
    w_c = 2 * np.pi / _KNOTS_PER_CUTOFF
    for qq in np.unique(q[q >= 1]):
        sel = np.flatnonzero(q == qq)
        lam = n_pts[sel] / n_coef[sel] / (2 * np.sin(w_c / 2)) ** (2 * qq)
        stencil = np.diff(np.eye(qq + 1), n=qq, axis=0)[0]  # e.g. [-1, 3, -3, 1] for q = 3
        n_rows = n_coef[sel] - qq
        r = np.arange(n_rows.sum()) - np.repeat(np.cumsum(n_rows) - n_rows, n_rows)
        base = np.repeat(off[sel], n_rows) + r
        lam_r = np.repeat(lam, n_rows)
        for d in range(qq + 1):
            for a in range(qq + 1 - d):
                ab[bw - d, base + a + d] += lam_r * stencil[a] * stencil[a + d]
    cols = (cols0[:, None] + np.arange(k + 1)).ravel()
    rhs = np.stack(
        [np.bincount(cols, weights=(vals * pts[:, [i]]).ravel(), minlength=total) for i in range(3)], axis=1
    )
    try:
        coef = solveh_banded(ab, rhs)
    except np.linalg.LinAlgError:  # some block is singular: solve block by block
        coef = np.full_like(rhs, np.nan)
        for i in range(n_curves):
            sl = slice(off[i], off[i] + n_coef[i])
            try:
                coef[sl] = solveh_banded(ab[:, sl], rhs[sl])
            except np.linalg.LinAlgError:
                pass
    finite = np.logical_and.reduceat(np.isfinite(coef).all(axis=1), off)
    # all knot vectors at once, as u0 + step * np.arange(-k, intervals + k + 1) per curve
    n_knots = n_coef + k + 1
    g_knot = np.repeat(np.arange(n_curves), n_knots)
    j_knot = np.arange(len(g_knot)) - np.repeat(np.cumsum(n_knots) - n_knots + k, n_knots)
    knots = u0[g_knot] + step[g_knot] * j_knot
    k_off = (np.cumsum(n_knots) - n_knots).tolist()
    return [
        BSpline.construct_fast(knots[t0 : t0 + nk], coef[c0 : c0 + nc], k) if ok else None
        for ok, t0, nk, c0, nc in zip(
            finite.tolist(), k_off, n_knots.tolist(), off.tolist(), n_coef.tolist(), strict=True
        )
    ]


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
    return fit_curves([points], smoothing_mm=[smoothing_mm], closed=[closed])[0]


def fit_curves(
    points: Sequence[np.ndarray], *, smoothing_mm: Sequence[float], closed: Sequence[bool] | None = None
) -> list[CurveFit | None]:
    """:func:`fit_curve` for many curves at once (open curves share one banded solve).

    Parameters
    ----------
    points : sequence of (n_i, 3) float arrays, mm
    smoothing_mm : sequence of float, mm
        One smoothing length per curve.
    closed : sequence of bool, optional
        Default: all open.

    Returns
    -------
    list of CurveFit or None
        Each curve's fit exactly as :func:`fit_curve` would return it.
    """
    arrays = [np.asarray(p, float).reshape(-1, 3) for p in points]
    counts = np.array([len(a) for a in arrays], np.intp)
    allp = np.concatenate(arrays) if arrays else np.zeros((0, 3))
    return _fit_packed(allp, counts, np.asarray(smoothing_mm, float), closed)


def _fit_packed(
    allp: np.ndarray, counts: np.ndarray, smoothing_mm: np.ndarray, closed: Sequence[bool] | None = None
) -> list[CurveFit | None]:
    """:func:`fit_curves` of curves given as consecutive runs of ``counts`` rows of ``allp`` (m, 3)."""
    n_all = len(counts)
    closed_arr = np.zeros(n_all, bool) if closed is None else np.asarray(closed, bool)
    k = 5
    out: list[CurveFit | None] = [None] * n_all
    starts = np.cumsum(counts) - counts
    for i in np.flatnonzero(closed_arr & (counts >= 2)).tolist():
        out[i] = _fit_closed(allp[starts[i] : starts[i] + counts[i]], float(smoothing_mm[i]), k)
    is_todo = ~closed_arr & (counts >= 2)
    todo = np.flatnonzero(is_todo)
    if not len(todo):
        return out
    if len(todo) < n_all:
        allp = allp[np.repeat(is_todo, counts)]
    # chord-length parameter of every open curve at once; repeated points are dropped
    n = counts[todo]
    steps = np.linalg.norm(np.diff(allp, axis=0), axis=1)
    same = np.ones(len(allp), bool)
    same[np.cumsum(n)[:-1]] = False  # a curve's first point
    same[0] = False
    moved = np.r_[False, steps > 1e-9]
    keep = ~same | moved
    u_all = _segment_cumsum(np.where(same & moved, np.r_[0.0, steps], 0.0), n)
    gid = np.repeat(np.arange(len(todo)), n)[keep]
    u_all, allp = u_all[keep], allp[keep]
    n_kept = np.bincount(gid, minlength=len(todo))
    fit = n_kept >= 2
    if not fit.all():
        rows = np.repeat(fit, n_kept)
        u_all, allp, n_kept = u_all[rows], allp[rows], n_kept[fit]
    idx = todo[fit].tolist()
    ends = np.cumsum(n_kept)
    u_first, u_last = u_all[ends - n_kept].tolist(), u_all[ends - 1].tolist()
    splines = _penalised_many(u_all, allp, n_kept, 2.0 * smoothing_mm[todo[fit]], k)
    for i, spl, a, b, m in zip(idx, splines, u_first, u_last, n_kept.tolist(), strict=True):
        if spl is not None:
            out[i] = CurveFit(spl, a, b, False, _degree(m))
    return out


def _fit_closed(pts: np.ndarray, smoothing_mm: float, k: int) -> CurveFit | None:
    pts, u = _chord_parameter(np.concatenate([pts, pts[:1]]))
    if len(pts) < 2:
        return None
    period = u[-1]
    pts, u = pts[:-1], u[:-1]
    if len(pts) < 2:
        return None
    spl = _penalised_periodic(u, pts, period, 2.0 * smoothing_mm, k)
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


class CurvePack:
    """Many fitted curves evaluated together (uniform-knot B-splines, no Python loop per curve).

    Parameters
    ----------
    fits : sequence of CurveFit or None
        Curves from :func:`fit_curve` / :func:`fit_curves` (uniform knots); None entries take no samples.
    """

    def __init__(self, fits: Sequence[CurveFit | None]) -> None:
        self.fits = list(fits)
        splines = [f.spline for f in self.fits if f is not None]
        self.k = splines[0].k if splines else 5
        k = self.k
        knots = [sp.t for sp in splines]  # (each attribute read of a BSpline makes an array view)
        coefs = [sp.c for sp in splines]
        valid = [f is not None for f in self.fits]
        n_c = np.zeros(len(self.fits), np.intp)
        t = np.tile([0.0, 1.0, 1.0], (len(self.fits), 1))
        if splines:
            n_c[valid] = [len(c) for c in coefs]
            t[valid] = [(kn[k], kn[k + 1], len(kn) - 2 * k - 1) for kn in knots]
        self._off = np.cumsum(n_c) - n_c
        self._coef = np.concatenate(coefs) if splines else np.zeros((0, 3))
        self._t0 = t[:, 0]
        self._h = t[:, 1] - t[:, 0]
        self._nint = t[:, 2].astype(np.intp)
        self.u0 = np.array([f.u0 if f is not None else 0.0 for f in self.fits])
        self.u1 = np.array([f.u1 if f is not None else 0.0 for f in self.fits])
        self.closed = np.array([bool(f is not None and f.closed) for f in self.fits])
        self.valid = np.array(valid, bool)
        self._dcoef: dict[int, np.ndarray] = {}

    def _derivative_coef(self, nu: int) -> np.ndarray:
        """B-spline coefficients of every curve's nu-th derivative (differenced coefficients)."""
        if nu not in self._dcoef:
            h = np.repeat(self._h, np.diff(np.r_[self._off, len(self._coef)]))
            d = self._coef
            for _ in range(nu):
                d = np.diff(d, axis=0, append=d[-1:]) / h[:, None]
            self._dcoef[nu] = np.ascontiguousarray(d)
        return self._dcoef[nu]

    def __call__(self, gid: np.ndarray, u: np.ndarray, nu: int = 0, *, chunk: int = 200_000) -> np.ndarray:
        """Values (nu = 0) or nu-th derivatives, (m, 3), of curve ``gid[i]`` at parameter ``u[i]``."""
        return self.derivatives(gid, u, (nu,), chunk=chunk)[0]

    def derivatives(
        self, gid: np.ndarray, u: np.ndarray, orders: Sequence[int], *, chunk: int = 200_000
    ) -> list[np.ndarray]:
        """``[self(gid, u, nu) for nu in orders]``, sharing the knot search and the basis recurrence."""
        gid = np.asarray(gid, np.intp)
        u = np.asarray(u, float)
        k = self.k
        coefs = [self._derivative_coef(nu) for nu in orders]
        outs = [np.empty((len(u), 3)) for _ in orders]
        for lo in range(0, len(u), chunk):
            g, uu = gid[lo : lo + chunk], u[lo : lo + chunk]
            x = (uu - self._t0[g]) / self._h[g]
            first = np.clip(np.floor(x), 0, self._nint[g] - 1).astype(np.intp)
            bases = _uniform_bases(x - first, [k - nu for nu in orders])
            idx = self._off[g] + first
            for nu, coef, out in zip(orders, coefs, outs, strict=True):
                basis = bases[k - nu]
                acc = basis[:, :1] * coef[idx]
                for m in range(1, k + 1 - nu):
                    acc += basis[:, m : m + 1] * coef[idx + m]
                out[lo : lo + chunk] = acc
        return outs


def arc_length_samples_many(
    pack: CurvePack, step_mm: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`arc_length_samples` for every valid curve of ``pack`` at once.

    Returns
    -------
    gid : (m,) int array
        The curve of each sample (curves in order, samples in order along each).
    arc, u, r, d1, d2, d3
        As :func:`arc_length_samples`, concatenated over the curves.
    """
    sel = np.flatnonzero(pack.valid)
    u0, u1 = pack.u0[sel], pack.u1[sel]
    approx = u1 - u0
    n_dense = np.maximum(np.ceil(approx / step_mm).astype(np.intp) * _DENSE, 16) * 2 + 1
    ud, gl = _linspace(u0, u1, n_dense)
    # long, dense runs per curve: scipy's compiled evaluation per curve is the fastest here
    bounds = np.r_[0, np.cumsum(n_dense)]
    d1 = (
        np.concatenate([pack.fits[i](ud[bounds[j] : bounds[j + 1]], 1) for j, i in enumerate(sel)])
        if len(sel)
        else np.zeros((0, 3))
    )
    speed = np.linalg.norm(d1, axis=1)
    h = ((u1 - u0) / (n_dense - 1))[gl]
    start = np.cumsum(n_dense) - n_dense
    j = np.arange(len(ud)) - start[gl]
    # cumulative Simpson over pairs of sub-intervals, trapezoid for the odd midpoints (per curve)
    even = np.flatnonzero((j % 2 == 0) & (j > 0))
    simpson = h[even] / 3 * (speed[even - 2] + 4 * speed[even - 1] + speed[even])
    s = np.zeros(len(ud))
    s[even] = _segment_cumsum(simpson, np.bincount(gl[even], minlength=len(sel)))
    odd = np.flatnonzero(j % 2 == 1)
    s[odd] = s[odd - 1] + h[odd] / 2 * (speed[odd - 1] + speed[odd])
    length = s[start + n_dense - 1]
    closed = pack.closed[sel]
    n_open = np.maximum(np.ceil(length / step_mm).astype(np.intp), 1) + 1
    n_closed = np.maximum(np.ceil(length / step_mm).astype(np.intp), 3)
    n = np.where(closed, n_closed, n_open)
    arc, ga = _linspace(np.zeros(len(sel)), np.where(closed, length * (n - 1) / n, length), n)
    if closed.any():  # closed curves: arange(n) * (length / n), not repeating the first point
        jc = np.arange(len(arc)) - np.repeat(np.cumsum(n) - n, n)
        cl = closed[ga]
        arc[cl] = jc[cl] * (length / n)[ga[cl]]
    # u = np.interp(arc, s, ud) within each curve (searched curve by curve, as for the curve alone)
    pos = np.empty(len(arc), np.intp)
    a_bounds = np.r_[0, np.cumsum(n)].tolist()
    for j_c, (lo, hi) in enumerate(zip(a_bounds[:-1], a_bounds[1:], strict=True)):
        s_lo = int(start[j_c])
        seg = s[s_lo : s_lo + int(n_dense[j_c])]
        pos[lo:hi] = np.searchsorted(seg, arc[lo:hi], side="right") + (s_lo - 1)
    pos = np.clip(pos, start[ga], start[ga] + n_dense[ga] - 2)
    u = (ud[pos + 1] - ud[pos]) / (s[pos + 1] - s[pos]) * (arc - s[pos]) + ud[pos]  # as np.interp
    at_end = arc >= s[pos + 1]
    u[at_end] = ud[pos + 1][at_end]
    gg = sel[ga]
    r, d1, d2, d3 = pack.derivatives(gg, u, (0, 1, 2, 3))
    return gg, arc, u, r, d1, d2, d3
