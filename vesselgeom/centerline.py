"""From ordered skeleton paths in world mm to smooth, arc-length parametrised centrelines with their frames.

Per branch: fit a penalised quintic spline (smoothing tied to the vessel radius), recentre points
sampled along it on the mask's cross-section, refit, repeat; extend terminal ends that thinning
retracted; resample at a fixed arc-length step; compute the Frenet-Serret frame, curvature, torsion and
radius at every sample. Branches of a component (or of several small components,
:func:`trace_components`) are processed together in batches of bounded size.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np

from .crosssection import CrossSection
from .frames import Frame, frenet_frame
from .radius import BoundaryDistance
from .settings import Settings
from .spline import CurveFit, CurvePack, _fit_packed, _linspace, arc_length_samples_many, fit_curves

__all__ = ["Centerline", "BranchInput", "trace_centerlines", "trace_components"]

# bounds on one batch of trace_centerlines: its temporaries grow with the points traced at once
_BATCH_POINTS = 8_000
_BATCH_BRANCHES = 1000


@dataclass(frozen=True)
class BranchInput:
    """One branch to trace: an ordered polyline in world mm and what its ends are.

    ``free_start`` / ``free_end`` mark terminal (blind) ends, which thinning retracts and which are
    extended back; ends at junctions are not extended. ``owner`` is set by :func:`trace_components` (the
    branch's component among those traced together) and ignored by :func:`trace_centerlines`.
    """

    path: np.ndarray
    closed: bool
    free_start: bool
    free_end: bool
    owner: int = 0


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


def _loop_length(path: np.ndarray) -> float:
    """Length (mm) of a closed polyline, its closing segment included (zero if it ends where it starts)."""
    return float(np.linalg.norm(np.diff(path, axis=0, append=path[:1]), axis=1).sum())


def _group_median(values: np.ndarray, gid: np.ndarray, n: int) -> np.ndarray:
    """np.nanmedian of ``values`` in each group ``gid`` (0..n-1); NaN for an empty or all-NaN group.

    Sorted within groups at once; the middle value, or the mean of the two middle values computed as
    np.median does ((a + b) / 2), so the result is the same as np.median of each group alone.
    """
    out = np.full(n, np.nan)
    ok = ~np.isnan(values)
    v, g = values[ok], gid[ok]
    order = np.lexsort((v, g))
    v, g = v[order], g[order]
    count = np.bincount(g, minlength=n)
    has = count > 0
    start = (np.cumsum(count) - count)[has]
    c = count[has]
    lo, hi = v[start + (c - 1) // 2], v[start + c // 2]
    out[has] = np.where(c % 2 == 1, lo, (lo + hi) / 2)
    return out


class _Samplers:
    """Each branch's mask sampler and radius function: those of its component (``BranchInput.owner``).

    With one component every call goes straight to its sampler. With several, the points of each
    component are sent to that component's sampler and the results put back in order; every point's
    result is independent of the other points of a call (:class:`CrossSection`,
    :class:`BoundaryDistance`), so a branch gets the same bits as when its component is traced alone.
    """

    def __init__(
        self, sections: Mapping[int, CrossSection], boundaries: Mapping[int, BoundaryDistance]
    ) -> None:
        self._sections = dict(sections)
        self._boundaries = dict(boundaries)
        self._single = len(self._sections) == 1
        if self._single:  # every call goes to this component's sampler; owners are not read
            self._only = (next(iter(self._sections.values())), next(iter(self._boundaries.values())))

    def _groups(self, owner: np.ndarray) -> list[tuple[int, np.ndarray | slice]]:
        """(owner, the rows of its points) for every owner present."""
        if len(owner) and np.all(owner[1:] >= owner[:-1]):  # usual: points in branch order, by owner
            bounds = np.r_[0, np.flatnonzero(np.diff(owner)) + 1, len(owner)]
            return [(int(owner[a]), slice(a, b)) for a, b in zip(bounds[:-1], bounds[1:], strict=True)]
        order = np.argsort(owner, kind="stable")
        keys, first = np.unique(owner[order], return_index=True)
        bounds = np.r_[first, len(order)]
        return [(int(k), order[a:b]) for k, a, b in zip(keys, bounds[:-1], bounds[1:], strict=True)]

    def radius(self, points: np.ndarray, owner: np.ndarray) -> np.ndarray:
        if self._single:
            return self._only[1](points)
        out = np.empty(len(points))
        for key, idx in self._groups(owner):
            out[idx] = self._boundaries[key](points[idx])
        return out

    def sample(self, points: np.ndarray, owner: np.ndarray) -> np.ndarray:
        if self._single:
            return self._only[0].sample(points)
        out = np.empty(len(points), np.float32)
        for key, idx in self._groups(owner):
            out[idx] = self._sections[key].sample(points[idx])
        return out

    def centroids(
        self, centres: np.ndarray, tangents: np.ndarray, disc: np.ndarray, owner: np.ndarray
    ) -> np.ndarray:
        if self._single:
            return self._only[0].centroids(centres, tangents, disc)[0]
        out = np.empty((len(centres), 3))
        for key, idx in self._groups(owner):
            out[idx] = self._sections[key].centroids(centres[idx], tangents[idx], disc[idx])[0]
        return out


def _extend_free_ends_many(
    pack: CurvePack,
    branches: list[BranchInput],
    scales: np.ndarray,
    samplers: _Samplers,
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
    p_a, d_a = pack.derivatives(bi, u_a, (0, 1))
    direction = -sign[:, None] * _unit(d_a)
    owner = np.array([branches[i].owner for i in bi.tolist()], np.int64)
    r_a = samplers.radius(p_a, owner)
    reach = np.abs(u_end - u_a) + 8.0 * np.maximum(r_a, voxel)
    # rays of samples every quarter voxel, all ends at once (as np.arange(0, reach + dq, dq))
    dq = 0.25 * voxel
    n_s = np.ceil((reach + dq - 0.0) / dq).astype(np.intp)
    e_of = np.repeat(np.arange(len(ends)), n_s)
    d = (np.arange(len(e_of)) - np.repeat(np.cumsum(n_s) - n_s, n_s)) * dq
    vals = samplers.sample(p_a[e_of] + d[:, None] * direction[e_of], owner[e_of])
    start = np.cumsum(n_s) - n_s
    outside = np.where(vals < 0.5, np.arange(len(vals)), len(vals))
    first_out = np.minimum.reduceat(outside, start)
    exit_d = reach.copy()
    hit = first_out < start + n_s
    i = first_out[hit]
    at0 = i == start[hit]
    j = np.maximum(i - 1, 0)
    with np.errstate(divide="ignore", invalid="ignore"):  # (at0 rows, where j == i, are not used)
        frac = d[j] + (vals[j] - 0.5) / (vals[j] - vals[i]) * (d[i] - d[j])
    exit_d[hit] = np.where(at0, 0.0, frac)
    stub_len = np.maximum(exit_d - r_a, 0.0)
    for e in [e for e, key in enumerate(ends) if key in targets]:  # up to the junction's projection
        stub_len[e] = max(float(np.dot(targets[ends[e]] - p_a[e], direction[e])), 0.0)
    # stub points every half voxel, as np.linspace(0, stub_len, n + 1)[1:] along the direction
    n_stub = np.maximum(np.ceil(stub_len / (0.5 * voxel)).astype(np.intp), 1)
    lin, g_lin = _linspace(np.zeros(len(ends)), stub_len, n_stub + 1)
    not_first = np.ones(len(lin), bool)
    not_first[np.cumsum(n_stub + 1) - (n_stub + 1)] = False
    lin, g_lin = lin[not_first], g_lin[not_first]
    stub_pts = p_a[g_lin] + lin[:, None] * direction[g_lin]
    stub_at = np.cumsum(n_stub) - n_stub
    # the kept part of each extended curve, densely sampled, between its stubs
    lo, hi = pack.u0.copy(), pack.u1.copy()
    lo[bi[side == 0]] = u_a[side == 0]
    hi[bi[side == 1]] = u_a[side == 1]
    todo = np.unique(bi)
    todo = todo[lo[todo] < hi[todo]]
    if not len(todo):
        return fits, ext
    t_lo, t_hi = lo[todo], hi[todo]
    num = np.maximum(np.ceil((t_hi - t_lo) / (0.5 * voxel)).astype(np.intp), 2) + 1
    uu, gg = _linspace(t_lo, t_hi, num)
    mid_pts = pack(todo[gg], uu)
    # each curve's points: its start stub reversed, the kept part, its end stub (rows of both arrays)
    pool = np.concatenate([stub_pts, mid_pts])
    end_of = np.full((len(fits), 2), -1, np.intp)
    end_of[bi, side] = np.arange(len(ends))
    e0, e1 = end_of[todo, 0], end_of[todo, 1]
    seg_n = np.stack(
        [np.where(e0 >= 0, n_stub[e0], 0), num, np.where(e1 >= 0, n_stub[e1], 0)], axis=1
    ).ravel()
    seg_base = np.stack(
        [stub_at[e0] + n_stub[e0] - 1, len(stub_pts) + np.cumsum(num) - num, stub_at[e1]], axis=1
    ).ravel()
    seg_dir = np.tile([-1, 1, 1], len(todo))
    k_in = np.arange(seg_n.sum()) - np.repeat(np.cumsum(seg_n) - seg_n, seg_n)
    rows = np.repeat(seg_base, seg_n) + np.repeat(seg_dir, seg_n) * k_in
    counts = seg_n.reshape(-1, 3).sum(axis=1)
    refits = _fit_packed(pool[rows], counts, settings.smoothing_radii * scales[todo])
    lengths = np.zeros((len(fits), 2))
    lengths[bi, side] = stub_len
    for b_i, refit in zip(todo.tolist(), refits, strict=True):
        if refit is None:
            continue
        fits[b_i] = refit
        ext[b_i] = lengths[b_i]
    return fits, ext


def _cut_near_junctions(
    branches: list[BranchInput], r_flat: np.ndarray, scales: np.ndarray, settings: Settings
) -> tuple[list[np.ndarray], dict[tuple[int, int], np.ndarray]]:
    """Leave out the points of each junction end that lie inside the junction region.

    Within about a radius of a junction the mask's cross-section is the union of several vessels, so
    both the skeleton and the recentred points there are pulled towards the other branches, which bends
    every branch near its junctions (a spurious curvature and biased branch angles). Points closer to
    the junction position than its radius plus ``junction_cut_radii`` scales are dropped before fitting
    (when enough of the branch remains); the end is later joined to the junction by a straight stub.

    Per branch (open, at least 4 points), the start is cut first: from the first point at least the cut
    distance from the start node on, if at least 4 points remain whose ends are at least 2 scales apart;
    then the end likewise, up to the last point far enough from the end node, keeping the start's cut.
    All branches of the batch at once (``r_flat``: radius at every path point, paths concatenated).
    Returns the paths to fit and, per cut end, the junction position.
    """
    lens = np.array([len(b.path) for b in branches], np.intp)
    paths = [b.path for b in branches]
    targets: dict[tuple[int, int], np.ndarray] = {}
    if settings.junction_cut_radii <= 0 or not (lens >= 4).any():
        return paths, targets
    closed = np.array([b.closed for b in branches])
    free = np.array([(b.free_start, b.free_end) for b in branches], bool).reshape(-1, 2)
    pts = np.concatenate(paths)
    start = np.cumsum(lens) - lens
    last = start + lens - 1
    g = np.repeat(np.arange(len(branches)), lens)
    j = np.arange(len(g)) - start[g]
    eligible = ~closed & (lens >= 4)
    has = lens > 0  # (segments of reduceat: the non-empty paths, each starting where its points do)
    lo, hi = np.zeros(len(branches), np.intp), lens.copy()
    for side, node_row in ((0, start), (1, last)):
        node_row = np.clip(node_row, 0, len(pts) - 1)  # (an empty path's row is never used)
        todo = eligible & ~free[:, side]
        if not todo.any():
            continue
        r_node = r_flat[node_row]
        cut = np.where(np.isfinite(r_node), r_node, 0.0) + settings.junction_cut_radii * scales
        far = np.linalg.norm(pts - pts[node_row][g], axis=1) >= cut[g]
        k = np.zeros(len(branches), np.intp)
        if side == 0:  # the first far point, or none (len)
            k[has] = np.minimum.reduceat(np.where(far, j, lens[g]), start[has])
            new_lo, new_hi = k, hi
        else:  # one past the last far point, or none (0)
            k[has] = np.maximum.reduceat(np.where(far, j + 1, 0), start[has])
            new_lo, new_hi = lo, k
        n_kept = new_hi - new_lo
        ok = todo & (n_kept >= 4)
        first = start + np.minimum(new_lo, lens - 1)
        end = start + np.clip(new_hi - 1, 0, lens - 1)
        span = np.linalg.norm(pts[end] - pts[first], axis=1)
        ok &= span >= 2 * scales
        lo, hi = np.where(ok, new_lo, lo), np.where(ok, new_hi, hi)
        for i in np.flatnonzero(ok).tolist():
            targets[(i, side)] = pts[node_row[i]]
    cut_any = (lo > 0) | (hi < lens)
    for i in np.flatnonzero(cut_any).tolist():
        paths[i] = paths[i][lo[i] : hi[i]]
    return paths, targets


def _batches(branches: list[BranchInput]) -> list[slice]:
    """Consecutive runs of branches (slices) to trace together.

    Each run holds at most ``_BATCH_POINTS`` skeleton points and ``_BATCH_BRANCHES`` branches; a longer
    single branch is a batch of its own.
    """
    out, lo, acc = [], 0, 0
    for i, b in enumerate(branches):
        n = len(b.path)
        if i > lo and (acc + n > _BATCH_POINTS or i - lo >= _BATCH_BRANCHES):
            out.append(slice(lo, i))
            lo, acc = i, 0
        acc += n
    if lo < len(branches):
        out.append(slice(lo, len(branches)))
    return out


def trace_centerlines(
    branches: list[BranchInput],
    *,
    section: CrossSection,
    boundary: BoundaryDistance,
    voxel_mm: float,
    settings: Settings,
) -> list[Centerline | None]:
    """Trace every branch of one component; None for a branch that cannot be fitted.

    Branches are processed in batches of bounded size (``_BATCH_POINTS`` skeleton points, at most
    ``_BATCH_BRANCHES`` branches), so memory does not grow with the component's size. Within a batch
    all branches are processed together: spline fits share one banded solve and evaluations, mask
    sampling and radius queries are made once per step for all branches. Each branch's result does not
    depend on the other branches of its batch.

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

    Returns
    -------
    list of Centerline or None
        One per branch, in order.
    """
    samplers = _Samplers({0: section}, {0: boundary})  # one component: the owners are not looked at
    out: list[Centerline | None] = []
    for sl in _batches(branches):
        out.extend(_trace_batch(branches[sl], samplers, voxel_mm, settings))
    return out


def trace_components(
    groups: Sequence[tuple[CrossSection, BoundaryDistance, Sequence[BranchInput]]],
    *,
    voxel_mm: float,
    settings: Settings,
) -> list[list[Centerline | None]]:
    """Trace the branches of several components in shared batches; one list of centrelines per component.

    Tracing has a fixed cost per batch (a few thousand numpy calls, ~10 ms) besides its cost per
    branch, so a mask of thousands of small components would spend most of its time on it traced
    component by component (4,080 one-branch fragments: 40-47 s of tracing alone, 6-9 s together;
    ``benchmarks/results.md``).
    Here the branches of all ``groups`` share batches; each point is sampled in its own component's
    mask and radius function, so every branch's result is the same, bit for bit, as with
    :func:`trace_centerlines` on its component alone (``tests/test_centerline.py``).

    Parameters
    ----------
    groups : sequence of (CrossSection, BoundaryDistance, branches)
        Per component: its mask sampler, its radius function and its branches (world mm).
    voxel_mm, settings
        As for :func:`trace_centerlines`.

    Returns
    -------
    list of lists
        For each group, its branches' centrelines (None where tracing failed), in order.
    """
    samplers = _Samplers(
        {g: grp[0] for g, grp in enumerate(groups)}, {g: grp[1] for g, grp in enumerate(groups)}
    )
    branches = [replace(b, owner=g) for g, grp in enumerate(groups) for b in grp[2]]
    lines: list[Centerline | None] = []
    for sl in _batches(branches):
        lines.extend(_trace_batch(branches[sl], samplers, voxel_mm, settings))
    out, at = [], 0
    for grp in groups:
        out.append(lines[at : at + len(grp[2])])
        at += len(grp[2])
    return out


def _trace_batch(
    branches: list[BranchInput],
    samplers: _Samplers,
    voxel_mm: float,
    settings: Settings,
) -> list[Centerline | None]:
    """:func:`trace_centerlines` of one batch, all its branches at once."""
    nb = len(branches)
    if nb == 0:
        return []
    step = settings.step_mm or settings.step_voxels * voxel_mm
    lens = np.array([len(b.path) for b in branches])
    owner = np.array([b.owner for b in branches], np.int64)
    g_flat = np.repeat(np.arange(nb), lens)
    r_flat = samplers.radius(np.concatenate([b.path for b in branches]), owner[g_flat])
    # median radius of each branch, leaving out its end points when it has more than four
    j_flat = np.arange(len(g_flat)) - np.repeat(np.cumsum(lens) - lens, lens)
    inner = (lens[g_flat] <= 4) | ((j_flat > 0) & (j_flat < lens[g_flat] - 1))
    core = _group_median(r_flat[inner], g_flat[inner], nb)
    floor_scale = settings.min_scale_voxels * voxel_mm
    # as max(median, floor) with a NaN median (no boundary) propagating
    scales = np.where(np.isnan(core), np.nan, np.maximum(np.nan_to_num(core, nan=0.0), floor_scale))
    scales = np.where(lens == 0, floor_scale, scales)
    closed = [b.closed for b in branches]
    smoothing = settings.smoothing_radii * scales
    paths, targets = _cut_near_junctions(branches, r_flat, scales, settings)
    fits = fit_curves(paths, smoothing_mm=smoothing, closed=closed)
    # A loop (closed, or leaving and re-entering the same junction) shorter than 2 pi scales bends
    # tighter than the smoothing scale (and than a tube of its radius can): its fit collapses into cusps
    # (curvature up to 1e14 /mm seen on 3-5 mm skeleton loops of 1-voxel vessels), so it is not fitted
    # and is reported as fit_failed.
    for i, b in enumerate(branches):
        loop = b.closed or (len(b.path) > 1 and np.array_equal(b.path[0], b.path[-1]))
        if loop and fits[i] is not None and _loop_length(b.path) < 2 * np.pi * scales[i]:
            fits[i] = None

    for _ in range(settings.recentre_passes):
        pack = CurvePack(fits)
        g, u = _even_samples_many(pack, voxel_mm)
        if not len(u):
            break
        centres, d1 = pack.derivatives(g, u, (0, 1))
        tangents = _unit(d1)
        rad = samplers.radius(centres, owner[g])
        disc = 1.5 * np.maximum(rad, voxel_mm) + voxel_mm
        moved = samplers.centroids(centres, tangents, disc, owner[g])
        refits = _fit_packed(moved, np.bincount(g, minlength=nb), smoothing, closed)
        fits = [
            new if (old is not None and new is not None) else old
            for old, new in zip(fits, refits, strict=True)
        ]

    pack = CurvePack(fits)
    fits, ext = _extend_free_ends_many(pack, branches, scales, samplers, voxel_mm, settings, targets=targets)
    pack = CurvePack(fits)
    gid, arc, _u, r, d1, d2, d3 = arc_length_samples_many(pack, step)
    floor = settings.curvature_floor_per_voxel / voxel_mm
    frame = frenet_frame(d1, d2, d3, curvature_floor=floor)
    # torsion from a smoother fit of the same curve, parametrised (to 1e-4) by the same arc length
    g, u = _even_samples_many(pack, 0.5 * voxel_mm)
    smooth = _fit_packed(
        pack(g, u), np.bincount(g, minlength=nb), settings.torsion_smoothing_radii * scales, closed
    )
    smooth = [s if f is not None else None for s, f in zip(smooth, fits, strict=True)]
    has = np.array([s is not None for s in smooth])[gid]
    spack = CurvePack(smooth)
    a = np.clip(arc[has], spack.u0[gid[has]], spack.u1[gid[has]])
    tau = frenet_frame(*spack.derivatives(gid[has], a, (1, 2, 3))).torsion
    torsion = frame.torsion.copy()
    torsion[has] = np.where(np.isfinite(frame.torsion[has]), tau, np.nan)
    radius = samplers.radius(r, owner[gid])

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
