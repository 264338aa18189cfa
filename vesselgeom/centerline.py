"""From ordered skeleton paths in world mm to smooth, arc-length parametrised centrelines with their frames.

Per branch: fit a penalised quintic spline (smoothing tied to the vessel radius), recentre points
sampled along it on the mask's cross-section (batched over all branches of a component), refit, repeat;
extend terminal ends that thinning retracted; resample at a fixed arc-length step; compute the
Frenet-Serret frame, curvature, torsion and radius at every sample.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .crosssection import CrossSection
from .frames import Frame, frenet_frame
from .radius import BoundaryDistance
from .settings import Settings
from .spline import CurveFit, CurvePack, _linspace, arc_length_samples_many, fit_curves

__all__ = ["Centerline", "BranchInput", "trace_centerlines"]


@dataclass(frozen=True)
class BranchInput:
    """One branch to trace: an ordered polyline in world mm and what its ends are.

    ``free_start`` / ``free_end`` mark terminal (blind) ends, which thinning retracts and which are
    extended back; ends at junctions are not extended.
    """

    path: np.ndarray
    closed: bool
    free_start: bool
    free_end: bool


@dataclass(frozen=True)
class Centerline:
    """A traced branch centreline, sampled at equal arc-length steps.

    Attributes
    ----------
    arc : (n,) float array, mm
    points : (n, 3) float array, mm
    frame : Frame
        T, N, B, curvature (1/mm) and torsion (1/mm, NaN below the curvature floor).
    radius : (n,) float array, mm
        Distance to the nearest background voxel centre.
    measured : (n,) bool array
        Samples that enter the summaries: not within the junction trim, not on an extrapolated end.
    closed : bool
    step_mm : float
        The arc-length step actually used (at most the requested step).
    scale_mm : float
        The smoothing scale: max(median radius, min_scale_voxels x voxel size).
    degree : int
        Spline degree (5 unless the branch had very few points).
    extension_mm : (2,) float array
        Length added at the start and the end to undo the retraction of terminal ends.

    Notes
    -----
    ``measured`` leaves out ``end_trim_radii * scale_mm`` at both ends plus the extensions.
    """

    arc: np.ndarray
    points: np.ndarray
    frame: Frame
    radius: np.ndarray
    measured: np.ndarray
    closed: bool
    step_mm: float
    scale_mm: float
    degree: int
    extension_mm: np.ndarray

    @property
    def length_mm(self) -> float:
        if self.closed:
            return float(self.arc[-1] + self.step_mm)
        return float(self.arc[-1])


def _even_samples(fit: CurveFit, step: float) -> np.ndarray:
    n = max(int(np.ceil((fit.u1 - fit.u0) / step)), 2)
    if fit.closed:
        return fit.u0 + np.arange(n) * (fit.u1 - fit.u0) / n
    return np.linspace(fit.u0, fit.u1, n + 1)


def _even_samples_many(pack: CurvePack, step: float) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_even_samples` of every valid curve of ``pack``: (curve index, parameter) per sample."""
    sel = np.flatnonzero(pack.valid)
    u0, u1, closed = pack.u0[sel], pack.u1[sel], pack.closed[sel]
    n = np.maximum(np.ceil((u1 - u0) / step).astype(np.intp), 2)
    num = np.where(closed, n, n + 1)
    u, g = _linspace(u0, u1, num)
    if closed.any():
        j = np.arange(len(u)) - np.repeat(np.cumsum(num) - num, num)
        c = closed[g]
        u[c] = u0[g[c]] + j[c] * (u1 - u0)[g[c]] / n[g[c]]
    return sel[g], u


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def _split(values: np.ndarray, gid: np.ndarray, n: int) -> list[np.ndarray]:
    """Rows of ``values`` grouped by ``gid`` (sorted), as a list of n arrays (empty for absent groups)."""
    bounds = np.r_[0, np.cumsum(np.bincount(gid, minlength=n))]
    return [values[bounds[i] : bounds[i + 1]] for i in range(n)]


def _group_median(values: list[np.ndarray]) -> np.ndarray:
    """np.nanmedian of each array (NaN for an empty or all-NaN one)."""
    out = np.full(len(values), np.nan)
    for i, v in enumerate(values):
        v = v[~np.isnan(v)]
        if v.size:
            out[i] = np.median(v)
    return out


def _extend_free_ends_many(
    pack: CurvePack,
    branches: list[BranchInput],
    scales: np.ndarray,
    section: CrossSection,
    boundary: BoundaryDistance,
    voxel: float,
    settings: Settings,
    targets: dict[tuple[int, int], np.ndarray] | None = None,
) -> tuple[list[CurveFit | None], np.ndarray]:
    """Replace the last ``scale`` of each terminal end by a straight stub reaching the axis end.

    ``targets`` maps (branch, side) of junction ends whose near-junction points were left out to the
    junction position: those ends get a straight stub along the end tangent up to the junction's
    projection on it, instead of following the mask.

    Thinning stops a round-ended vessel's skeleton short of the axis end, and a spline is least
    constrained over its last smoothing length. From the point one scale inside the end, along the tangent
    there, the mask is followed to where it ends (the interpolated mask falls below 0.5, sampled every
    quarter voxel); the axis end is placed one local radius short of that (the mask surface of a rounded
    end lies one radius beyond the axis end). Returns the refitted curves (unchanged where nothing is
    extended) and the stub lengths (mm) at the start and the end of every branch, (n, 2).
    """
    fits = list(pack.fits)
    ext = np.zeros((len(fits), 2))
    targets = targets or {}
    ends = [
        (i, side)
        for i, (b, f) in enumerate(zip(branches, fits, strict=True))
        if f is not None and not b.closed
        for side, free in ((0, b.free_start), (1, b.free_end))
        if free or (i, side) in targets
    ]
    if not ends:
        return fits, ext
    bi = np.array([e[0] for e in ends], np.intp)
    side = np.array([e[1] for e in ends])
    sign = np.where(side == 0, 1.0, -1.0)
    u0, u1 = pack.u0[bi], pack.u1[bi]
    u_end = np.where(side == 0, u0, u1)
    u_a = np.clip(u_end + sign * scales[bi], u0, u1)
    p_a = pack(bi, u_a)
    direction = -sign[:, None] * _unit(pack(bi, u_a, 1))
    r_a = boundary(p_a)
    reach = np.abs(u_end - u_a) + 8.0 * np.maximum(r_a, voxel)
    # rays of samples every quarter voxel, all ends at once (as np.arange(0, reach + dq, dq))
    dq = 0.25 * voxel
    n_s = np.ceil((reach + dq - 0.0) / dq).astype(np.intp)
    e_of = np.repeat(np.arange(len(ends)), n_s)
    d = (np.arange(len(e_of)) - np.repeat(np.cumsum(n_s) - n_s, n_s)) * dq
    vals = section.sample(p_a[e_of] + d[:, None] * direction[e_of])
    start = np.cumsum(n_s) - n_s
    outside = np.where(vals < 0.5, np.arange(len(vals)), len(vals))
    first_out = np.minimum.reduceat(outside, start)
    exit_d = reach.copy()
    hit = first_out < start + n_s
    i = first_out[hit]
    at0 = i == start[hit]
    j = np.maximum(i - 1, 0)
    frac = d[j] + (vals[j] - 0.5) / (vals[j] - vals[i]) * (d[i] - d[j])
    exit_d[hit] = np.where(at0, 0.0, frac)
    stub_len = np.maximum(exit_d - r_a, 0.0)
    for e, key in enumerate(ends):
        if key in targets:  # up to the junction's projection on the end tangent
            stub_len[e] = max(float(np.dot(targets[key] - p_a[e], direction[e])), 0.0)
    stubs: dict[tuple[int, int], np.ndarray] = {}
    for e, (b_i, s_i) in enumerate(ends):
        n = max(int(np.ceil(stub_len[e] / (0.5 * voxel))), 1)
        stub = p_a[e] + np.linspace(0.0, stub_len[e], n + 1)[1:, None] * direction[e]
        stubs[(b_i, s_i)] = stub
    # the kept part of each extended curve, densely sampled, between its stubs
    lo = {b_i: pack.u0[b_i] for b_i, _ in ends}
    hi = {b_i: pack.u1[b_i] for b_i, _ in ends}
    for e, (b_i, s_i) in enumerate(ends):
        if s_i == 0:
            lo[b_i] = u_a[e]
        else:
            hi[b_i] = u_a[e]
    todo = [b_i for b_i in dict.fromkeys(bi.tolist()) if lo[b_i] < hi[b_i]]
    if not todo:
        return fits, ext
    t_lo = np.array([lo[b_i] for b_i in todo])
    t_hi = np.array([hi[b_i] for b_i in todo])
    num = np.maximum(np.ceil((t_hi - t_lo) / (0.5 * voxel)).astype(np.intp), 2) + 1
    uu, gg = _linspace(t_lo, t_hi, num)
    kept = _split(pack(np.asarray(todo, np.intp)[gg], uu), gg, len(todo))
    pts = [
        np.concatenate(
            [
                *([stubs[(b_i, 0)][::-1]] if (b_i, 0) in stubs else []),
                mid,
                *([stubs[(b_i, 1)]] if (b_i, 1) in stubs else []),
            ]
        )
        for b_i, mid in zip(todo, kept, strict=True)
    ]
    refits = fit_curves(pts, smoothing_mm=[settings.smoothing_radii * scales[b_i] for b_i in todo])
    lengths = {(b_i, s_i): stub_len[e] for e, (b_i, s_i) in enumerate(ends)}
    for b_i, refit in zip(todo, refits, strict=True):
        if refit is None:
            continue
        fits[b_i] = refit
        ext[b_i] = [lengths.get((b_i, 0), 0.0), lengths.get((b_i, 1), 0.0)]
    return fits, ext


def _cut_near_junctions(
    branches: list[BranchInput], r_all: list[np.ndarray], scales: np.ndarray, settings: Settings
) -> tuple[list[np.ndarray], dict[tuple[int, int], np.ndarray]]:
    """Leave out the points of each junction end that lie inside the junction region.

    Within about a radius of a junction the mask's cross-section is the union of several vessels, so
    both the skeleton and the recentred points there are pulled towards the other branches, which bends
    every branch near its junctions (a spurious curvature and biased branch angles). Points closer to
    the junction position than its radius plus ``junction_cut_radii`` scales are dropped before fitting
    (when enough of the branch remains); the end is later joined to the junction by a straight stub.
    Returns the paths to fit and, per cut end, the junction position.
    """
    paths, targets = [], {}
    for i, (b, r) in enumerate(zip(branches, r_all, strict=True)):
        path = b.path
        if b.closed or len(path) < 4 or settings.junction_cut_radii <= 0:
            paths.append(path)
            continue
        lo, hi = 0, len(path)
        for side, free in ((0, b.free_start), (1, b.free_end)):
            if free:
                continue
            node = path[0] if side == 0 else path[-1]
            r_node = r[0] if side == 0 else r[-1]
            cut = (r_node if np.isfinite(r_node) else 0.0) + settings.junction_cut_radii * scales[i]
            far = np.linalg.norm(path - node, axis=1) >= cut
            if side == 0:
                k = int(np.argmax(far)) if far.any() else len(path)
                new_lo, new_hi = k, hi
            else:
                k = len(path) - int(np.argmax(far[::-1])) if far.any() else 0
                new_lo, new_hi = lo, k
            kept = path[new_lo:new_hi]
            if len(kept) >= 4 and np.linalg.norm(kept[-1] - kept[0]) >= 2 * scales[i]:
                lo, hi = new_lo, new_hi
                targets[(i, side)] = node
        paths.append(path[lo:hi])
    return paths, targets


def trace_centerlines(
    branches: list[BranchInput],
    *,
    section: CrossSection,
    boundary: BoundaryDistance,
    voxel_mm: float,
    settings: Settings,
) -> list[Centerline | None]:
    """Trace every branch of one component; None for a branch that cannot be fitted.

    All branches are processed together: spline fits share one banded solve and evaluations, mask
    sampling and radius queries are made once per step for all branches.

    Parameters
    ----------
    branches : list of BranchInput
    section : CrossSection
        The component's mask sampler (for recentring and end extension).
    boundary : BoundaryDistance
        The component's radius function.
    voxel_mm : float
        Mean voxel size in mm (sets minimum scales and sampling).
    settings : Settings
    """
    nb = len(branches)
    if nb == 0:
        return []
    step = settings.step_mm or settings.step_voxels * voxel_mm
    lens = np.array([len(b.path) for b in branches])
    r_all = _split(boundary(np.concatenate([b.path for b in branches])), np.repeat(np.arange(nb), lens), nb)
    core = _group_median([r[1:-1] if len(r) > 4 else r for r in r_all])
    floor_scale = settings.min_scale_voxels * voxel_mm
    # as max(median, floor) with a NaN median (no boundary) propagating
    scales = np.where(np.isnan(core), np.nan, np.maximum(np.nan_to_num(core, nan=0.0), floor_scale))
    scales = np.where(lens == 0, floor_scale, scales)
    closed = [b.closed for b in branches]
    smoothing = settings.smoothing_radii * scales
    paths, targets = _cut_near_junctions(branches, r_all, scales, settings)
    fits = fit_curves(paths, smoothing_mm=smoothing, closed=closed)

    for _ in range(settings.recentre_passes):
        pack = CurvePack(fits)
        g, u = _even_samples_many(pack, voxel_mm)
        if not len(u):
            break
        centres = pack(g, u)
        tangents = _unit(pack(g, u, 1))
        rad = boundary(centres)
        disc = 1.5 * np.maximum(rad, voxel_mm) + voxel_mm
        moved, _ = section.centroids(centres, tangents, disc)
        refits = fit_curves(_split(moved, g, nb), smoothing_mm=smoothing, closed=closed)
        fits = [
            new if (old is not None and new is not None) else old
            for old, new in zip(fits, refits, strict=True)
        ]

    pack = CurvePack(fits)
    fits, ext = _extend_free_ends_many(
        pack, branches, scales, section, boundary, voxel_mm, settings, targets=targets
    )
    pack = CurvePack(fits)
    gid, arc, _u, r, d1, d2, d3 = arc_length_samples_many(pack, step)
    floor = settings.curvature_floor_per_voxel / voxel_mm
    frame = frenet_frame(d1, d2, d3, curvature_floor=floor)
    # torsion from a smoother fit of the same curve, parametrised (to 1e-4) by the same arc length
    g, u = _even_samples_many(pack, 0.5 * voxel_mm)
    dense = _split(pack(g, u), g, nb)
    smooth = fit_curves(dense, smoothing_mm=settings.torsion_smoothing_radii * scales, closed=closed)
    smooth = [s if f is not None else None for s, f in zip(smooth, fits, strict=True)]
    has = np.array([s is not None for s in smooth])[gid]
    spack = CurvePack(smooth)
    a = np.clip(arc[has], spack.u0[gid[has]], spack.u1[gid[has]])
    tau = frenet_frame(spack(gid[has], a, 1), spack(gid[has], a, 2), spack(gid[has], a, 3)).torsion
    torsion = frame.torsion.copy()
    torsion[has] = np.where(np.isfinite(frame.torsion[has]), tau, np.nan)
    radius = boundary(r)

    bounds = np.r_[0, np.cumsum(np.bincount(gid, minlength=nb))]
    out: list[Centerline | None] = []
    for i, (b, fit) in enumerate(zip(branches, fits, strict=True)):
        if fit is None:
            out.append(None)
            continue
        sl = slice(bounds[i], bounds[i + 1])
        arc_i = arc[sl]
        length = arc_i[-1]
        measured = np.ones(len(arc_i), bool)
        if not b.closed:
            trim_start = ext[i, 0] + settings.end_trim_radii * scales[i]
            trim_end = ext[i, 1] + settings.end_trim_radii * scales[i]
            measured = (arc_i >= trim_start - 1e-9) & (arc_i <= length - trim_end + 1e-9)
            if not measured.any():  # a branch shorter than its trims: keep its middle sample
                measured[len(arc_i) // 2] = True
        fr = Frame(frame.tangent[sl], frame.normal[sl], frame.binormal[sl], frame.curvature[sl], torsion[sl])
        step_used = float(arc_i[1] - arc_i[0]) if len(arc_i) > 1 else 0.0
        out.append(
            Centerline(
                arc_i,
                r[sl],
                fr,
                radius[sl],
                measured,
                b.closed,
                step_used,
                float(scales[i]),
                fit.degree,
                ext[i],
            )
        )
    return out
