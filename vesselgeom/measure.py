"""Per-branch, per-point and per-junction measurements from traced centrelines (plain dicts of arrays).

Summaries of curvature, torsion and radius are taken over the *measured* stretch of each branch: the
centreline less about one radius at both ends (junctions distort the centreline there, and splines are
least constrained at their ends) and less the extrapolated part of terminal ends. Length, chord and the
tortuosity indices use the whole centreline.

:func:`branch_row` measures one branch; :func:`branch_columns` / :func:`branch_rows` measure many at once
(all samples concatenated, every step an array operation over all branches) and give the same values.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .centerline import Centerline
from .errors import InputError
from .metrics import (
    _group_sum,
    _offsets_of,
    count_inflections,
    count_inflections_many,
    distance_metric,
    integrate,
    integrate_many,
    sum_of_angles,
    sum_of_angles_many,
)
from .settings import Settings

__all__ = [
    "BranchContext",
    "branch_row",
    "branch_columns",
    "branch_rows",
    "point_columns",
    "point_columns_many",
    "end_directions",
    "junction_row",
]


@dataclass(frozen=True)
class BranchContext:
    """Where a branch sits in the graph and what may make its numbers unreliable."""

    branch_id: int
    component_id: int
    kind: str
    start_node: int | None
    end_node: int | None
    flags: tuple[str, ...] = ()


def _stats(values: np.ndarray) -> tuple[float, float, float]:
    v = values[np.isfinite(values)]
    if not v.size:
        return (float("nan"),) * 3
    return float(v.mean()), float(v.min()), float(v.max())


def branch_row(
    cl: Centerline | None,
    ctx: BranchContext,
    *,
    settings: Settings,
    voxel_mm: float,
    coarsest_voxel_mm: float | None = None,
) -> dict:
    """One row of branches.csv for a traced centreline (NaN measures and a flag when tracing failed)."""
    row: dict = {
        "branch_id": ctx.branch_id,
        "component_id": ctx.component_id,
        "kind": ctx.kind,
        "start_node": ctx.start_node,
        "end_node": ctx.end_node,
    }
    flags = list(ctx.flags)
    nan = float("nan")
    if cl is None:
        flags.append("fit_failed")
        row.update({k: nan for k in _MEASURES})
        row.update(inflection_count=0, n_points=0, flags=";".join(flags))
        return row
    floor = settings.curvature_floor_per_voxel / voxel_mm
    arc, m = cl.arc, cl.measured
    k, tau = cl.frame.curvature, cl.frame.torsion
    length = cl.length_mm
    chord = nan if cl.closed else float(np.linalg.norm(cl.points[-1] - cl.points[0]))
    dm = distance_metric(length, chord)
    inflections = count_inflections(
        arc,
        k,
        cl.frame.binormal,
        floor=floor,
        dip=settings.inflection_dip,
        end_exclusion_mm=settings.inflection_end_radii * cl.scale_mm,
        closed=cl.closed,
        measured=m,
    )
    am, km = arc[m], k[m]
    measured_len = float(am[-1] - am[0]) if len(am) > 1 else 0.0
    if cl.closed:
        # one full period, wrapping the last step back to the first sample
        total_k = integrate(np.r_[k, k[:1]], np.r_[arc, length])
        measured_len = length
    else:
        total_k = integrate(km, am)
    defined = m & np.isfinite(tau)
    tau_d = tau[defined]
    abs_tau = np.where(defined, np.abs(np.nan_to_num(tau)), 0.0)
    if cl.closed:
        total_abs_t = integrate(np.r_[abs_tau, abs_tau[:1]], np.r_[arc, length])
    else:
        total_abs_t = integrate(abs_tau[m], am)
    defined_len = measured_len * float(defined.sum() / m.sum())
    r_mean, r_min, r_max = _stats(cl.radius[m])
    last = 0 if cl.closed else -1  # a loop ends where it starts
    if cl.degree < 5:
        flags.append("few_points")
    if measured_len < settings.smoothing_radii * cl.scale_mm:
        flags.append("short")
    if tau_d.size == 0:
        flags.append("torsion_undefined")
    limit = settings.min_validated_radius_voxels * (coarsest_voxel_mm or voxel_mm)
    if np.isfinite(r_mean) and r_mean < limit:
        flags.append("radius_below_validated")  # below the validated resolution (docs/validation.md)
    row.update(
        length_mm=length,
        chord_mm=chord,
        distance_metric=dm,
        inflection_count=inflections,
        inflection_count_metric=(inflections + 1) * dm,
        sum_of_angles_per_mm=sum_of_angles(cl.points, closed=cl.closed, straight=k <= floor),
        mean_curvature_per_mm=total_k / measured_len if measured_len > 0 else float(km.mean()),
        max_curvature_per_mm=float(km.max()),
        total_curvature_rad=total_k,
        mean_torsion_per_mm=float(np.median(tau_d)) if tau_d.size else nan,
        mean_abs_torsion_per_mm=total_abs_t / defined_len if tau_d.size and defined_len > 0 else nan,
        total_abs_torsion_rad=total_abs_t if tau_d.size else nan,
        torsion_defined_fraction=float(defined.sum() / m.sum()),
        mean_radius_mm=r_mean,
        min_radius_mm=r_min,
        max_radius_mm=r_max,
        start_x_mm=float(cl.points[0, 0]),
        start_y_mm=float(cl.points[0, 1]),
        start_z_mm=float(cl.points[0, 2]),
        end_x_mm=float(cl.points[last, 0]),
        end_y_mm=float(cl.points[last, 1]),
        end_z_mm=float(cl.points[last, 2]),
        step_mm=cl.step_mm,
        n_points=len(arc),
        flags=";".join(flags),
    )
    return row


_MEASURES = (
    "length_mm chord_mm distance_metric inflection_count_metric sum_of_angles_per_mm "
    "mean_curvature_per_mm max_curvature_per_mm total_curvature_rad mean_torsion_per_mm "
    "mean_abs_torsion_per_mm total_abs_torsion_rad torsion_defined_fraction mean_radius_mm "
    "min_radius_mm max_radius_mm start_x_mm start_y_mm start_z_mm end_x_mm end_y_mm end_z_mm step_mm"
).split()


_FLAGS = ("few_points", "short", "torsion_undefined", "radius_below_validated")
# flags added to a branch's context flags, by bit pattern (bit i set: _FLAGS[i]), in branch_row's order
_FLAG_SETS = tuple(tuple(f for i, f in enumerate(_FLAGS) if code >> i & 1) for code in range(16))
_FIXED = ("branch_id", "component_id", "kind", "start_node", "end_node")
# columns of branch_row's row between the context's and the flags, in its key order
_ROW_MEASURES = (
    "length_mm chord_mm distance_metric inflection_count inflection_count_metric sum_of_angles_per_mm "
    "mean_curvature_per_mm max_curvature_per_mm total_curvature_rad mean_torsion_per_mm "
    "mean_abs_torsion_per_mm total_abs_torsion_rad torsion_defined_fraction mean_radius_mm "
    "min_radius_mm max_radius_mm start_x_mm start_y_mm start_z_mm end_x_mm end_y_mm end_z_mm step_mm "
    "n_points"
).split()
# key order of branch_row's row for a failed fit
_FAILED_ORDER = (*_FIXED, *_MEASURES, "inflection_count", "n_points", "flags")


def branch_columns(
    lines: Sequence[Centerline | None],
    contexts: Sequence[BranchContext],
    *,
    settings: Settings,
    voxel_mm: float,
    coarsest_voxel_mm: float | None = None,
) -> dict[str, list]:
    """Columns of branches.csv for many traced centrelines at once: the values of :func:`branch_row`.

    Parameters
    ----------
    lines : sequence of Centerline or None
        Traced centrelines; None where tracing failed (NaN measures, flag ``fit_failed``).
    contexts : sequence of BranchContext
        One per centreline, in the same order.
    settings : Settings
    voxel_mm : float
        Mean voxel size, mm (sets the curvature floor).
    coarsest_voxel_mm : float, optional
        Largest voxel size, mm (sets the validated-radius limit); default ``voxel_mm``.

    Returns
    -------
    dict of str to list
        One list of len(lines) per column of :func:`branch_row`'s row, in its key order, holding the
        same Python values (float, int, str or None). Floats agree with :func:`branch_row` to rounding
        (the chord's length is one square root of a sum of squares here, a BLAS dot product there).

    Raises
    ------
    InputError
        When ``lines`` and ``contexts`` differ in length, or a centreline has no measured sample.
    """
    if len(lines) != len(contexts):
        raise InputError(
            f"<array>: {len(lines)} centrelines but {len(contexts)} branch contexts; pass one context per "
            "centreline, in the same order"
        )
    nb = len(lines)
    fitted = np.array([cl is not None for cl in lines], bool)
    cols: dict[str, list] = {
        "branch_id": [c.branch_id for c in contexts],
        "component_id": [c.component_id for c in contexts],
        "kind": [c.kind for c in contexts],
        "start_node": [c.start_node for c in contexts],
        "end_node": [c.end_node for c in contexts],
    }
    found = _measure_many(
        [cl for cl in lines if cl is not None],
        [c.branch_id for c, cl in zip(contexts, lines, strict=True) if cl is not None],
        settings=settings,
        voxel_mm=voxel_mm,
        coarsest_voxel_mm=coarsest_voxel_mm,
    )
    codes = np.full(nb, -1)
    codes[fitted] = found.pop("flag_code")
    every = bool(fitted.all())
    for name in _ROW_MEASURES:
        if every:
            cols[name] = found[name].tolist()
            continue
        integer = name in ("inflection_count", "n_points")
        full = np.zeros(nb, np.int64) if integer else np.full(nb, np.nan)
        full[fitted] = found[name]
        cols[name] = full.tolist()
    cols["flags"] = [
        ";".join((*c.flags, *(_FLAG_SETS[code] if code >= 0 else ("fit_failed",))))
        for c, code in zip(contexts, codes.tolist(), strict=True)
    ]
    return cols


def branch_rows(
    lines: Sequence[Centerline | None],
    contexts: Sequence[BranchContext],
    *,
    settings: Settings,
    voxel_mm: float,
    coarsest_voxel_mm: float | None = None,
) -> list[dict]:
    """Rows of branches.csv for many traced centrelines: ``[branch_row(cl, ctx, ...) for ...]`` at once.

    Parameters
    ----------
    lines, contexts, settings, voxel_mm, coarsest_voxel_mm
        As for :func:`branch_columns`.

    Returns
    -------
    list of dict
        One row per centreline, in input order, with :func:`branch_row`'s keys in its order (a failed
        fit's row has that row's own key order) and the same values to rounding (see
        :func:`branch_columns`). :func:`branch_columns` gives the same values without building dicts.
    """
    cols = branch_columns(
        lines, contexts, settings=settings, voxel_mm=voxel_mm, coarsest_voxel_mm=coarsest_voxel_mm
    )
    keys = tuple(cols)
    rows = [dict(zip(keys, values, strict=True)) for values in zip(*cols.values(), strict=True)]
    for i, cl in enumerate(lines):
        if cl is None:
            rows[i] = {key: rows[i][key] for key in _FAILED_ORDER}
    return rows


def _measure_many(
    lines: list[Centerline],
    branch_ids: list[int],
    *,
    settings: Settings,
    voxel_mm: float,
    coarsest_voxel_mm: float | None,
) -> dict[str, np.ndarray]:
    """The measures of :func:`branch_row` for every (traced) line, as (len(lines),) arrays."""
    nl = len(lines)
    n = np.fromiter((len(cl.arc) for cl in lines), np.intp, nl)
    off = _offsets_of(n)
    g = np.repeat(np.arange(nl), n)
    head, tail = off[:-1], off[1:] - 1

    def cat(get, shape=(0,), dtype=float):
        return np.concatenate([get(cl) for cl in lines]) if nl else np.zeros(shape, dtype)

    arc = cat(lambda c: c.arc)
    pts = cat(lambda c: c.points, (0, 3))
    k = cat(lambda c: c.frame.curvature)
    tau = cat(lambda c: c.frame.torsion)
    binormal = cat(lambda c: c.frame.binormal, (0, 3))
    radius = cat(lambda c: c.radius)
    m = cat(lambda c: c.measured, dtype=bool).astype(bool)
    closed = np.fromiter((cl.closed for cl in lines), bool, nl)
    step = np.fromiter((cl.step_mm for cl in lines), float, nl)
    scale = np.fromiter((cl.scale_mm for cl in lines), float, nl)
    degree = np.fromiter((cl.degree for cl in lines), np.intp, nl)
    floor = settings.curvature_floor_per_voxel / voxel_mm
    nan = np.nan

    last = arc[tail]
    length = np.where(closed, last + step, last)
    chord = np.where(closed, nan, np.linalg.norm(pts[tail] - pts[head], axis=1))
    with np.errstate(invalid="ignore", divide="ignore"):
        dm = np.where(np.isfinite(chord) & (chord > 0), length / chord, nan)

    # the measured stretch
    mi = np.flatnonzero(m)
    m_n = np.bincount(g[mi], minlength=nl)
    if nl and not m_n.all():
        bad = branch_ids[int(np.argmin(m_n))]
        raise InputError(
            f"<array>: the centreline of branch {bad} has no measured sample; a traced centreline keeps "
            "at least one (see vesselgeom.centerline.trace_centerlines)"
        )
    moff = _offsets_of(m_n)
    am0, am1 = arc[mi[moff[:-1]]], arc[mi[moff[1:] - 1]]
    measured_len = np.where(closed, length, np.where(m_n > 1, am1 - am0, 0.0))
    km = k[mi]
    k_max = np.maximum.reduceat(km, moff[:-1]) if nl else np.zeros(0)
    k_mean = _group_sum(km, moff) / np.maximum(m_n, 1)

    # integrals: open lines over the measured samples, closed ones over one whole period
    ii = np.flatnonzero(m | closed[g])
    i_n = np.bincount(g[ii], minlength=nl)
    at = np.cumsum(i_n)[closed]
    ii = np.insert(ii, at, head[closed])
    wrap = np.insert(np.zeros(len(ii) - len(at), bool), at, True)
    ioff = _offsets_of(i_n + closed)
    xs = arc[ii]
    xs[wrap] = length[closed]
    total_k = integrate_many(k[ii], xs, ioff)
    defined = m & np.isfinite(tau)
    abs_tau = np.where(defined, np.abs(np.nan_to_num(tau)), 0.0)
    total_abs_t = integrate_many(abs_tau[ii], xs, ioff)

    # torsion: median over the defined measured samples (np.median: middle one, or mean of the two)
    di = np.flatnonzero(defined)
    d_n = np.bincount(g[di], minlength=nl)
    tau_sorted = tau[di][np.lexsort((tau[di], g[di]))]
    doff = _offsets_of(d_n)
    has_t = d_n > 0
    lo = np.where(has_t, doff[:-1] + (d_n - 1) // 2, 0)
    hi = np.where(has_t, doff[:-1] + d_n // 2, 0)
    tau_sorted = np.append(tau_sorted, nan)
    median = np.where(has_t, (tau_sorted[lo] + tau_sorted[hi]) / 2.0, nan)
    fraction = d_n / np.maximum(m_n, 1)
    defined_len = measured_len * fraction

    # radius over the finite measured samples
    ri = np.flatnonzero(m & np.isfinite(radius))
    r_n = np.bincount(g[ri], minlength=nl)
    roff = _offsets_of(r_n)
    has_r = r_n > 0
    rv = radius[ri]
    r_mean = np.where(has_r, _group_sum(rv, roff) / np.maximum(r_n, 1), nan)
    r_min, r_max = np.full(nl, nan), np.full(nl, nan)
    if has_r.any():
        r_min[has_r] = np.minimum.reduceat(rv, roff[:-1][has_r])
        r_max[has_r] = np.maximum.reduceat(rv, roff[:-1][has_r])

    inflections = count_inflections_many(
        arc,
        k,
        binormal,
        off,
        floor=floor,
        dip=settings.inflection_dip,
        end_exclusion_mm=settings.inflection_end_radii * scale,
        closed=closed,
        measured=m,
    )
    limit = settings.min_validated_radius_voxels * (coarsest_voxel_mm or voxel_mm)
    code = (
        (degree < 5) * 1
        + (measured_len < settings.smoothing_radii * scale) * 2
        + (d_n == 0) * 4
        + (np.isfinite(r_mean) & (r_mean < limit)) * 8
    )
    end = np.where(closed, head, tail)  # a loop ends where it starts
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_k = np.where(measured_len > 0, total_k / measured_len, k_mean)
        mean_abs_t = np.where(has_t & (defined_len > 0), total_abs_t / defined_len, nan)
    return {
        "length_mm": length,
        "chord_mm": chord,
        "distance_metric": dm,
        "inflection_count": inflections,
        "inflection_count_metric": (inflections + 1) * dm,
        "sum_of_angles_per_mm": sum_of_angles_many(pts, off, closed=closed, straight=k <= floor),
        "mean_curvature_per_mm": mean_k,
        "max_curvature_per_mm": k_max,
        "total_curvature_rad": total_k,
        "mean_torsion_per_mm": median,
        "mean_abs_torsion_per_mm": mean_abs_t,
        "total_abs_torsion_rad": np.where(has_t, total_abs_t, nan),
        "torsion_defined_fraction": fraction,
        "mean_radius_mm": r_mean,
        "min_radius_mm": r_min,
        "max_radius_mm": r_max,
        "start_x_mm": pts[head, 0],
        "start_y_mm": pts[head, 1],
        "start_z_mm": pts[head, 2],
        "end_x_mm": pts[end, 0],
        "end_y_mm": pts[end, 1],
        "end_z_mm": pts[end, 2],
        "step_mm": step,
        "n_points": n,
        "flag_code": code,
    }


def point_columns(cl: Centerline, branch_id: int) -> dict[str, np.ndarray]:
    """Columns of points.csv for one branch."""
    t = cl.frame.tangent
    return {
        "branch_id": np.full(len(cl.arc), branch_id),
        "arc_mm": cl.arc,
        "x_mm": cl.points[:, 0],
        "y_mm": cl.points[:, 1],
        "z_mm": cl.points[:, 2],
        "curvature_per_mm": cl.frame.curvature,
        "torsion_per_mm": cl.frame.torsion,
        "radius_mm": cl.radius,
        "tangent_x": t[:, 0],
        "tangent_y": t[:, 1],
        "tangent_z": t[:, 2],
        "in_summary": cl.measured,
    }


def point_columns_many(
    lines: Sequence[Centerline | None], branch_ids: Sequence[int]
) -> dict[str, np.ndarray]:
    """Columns of points.csv for many branches: :func:`point_columns` of each traced one, concatenated.

    Parameters
    ----------
    lines : sequence of Centerline or None
        None (a failed fit) contributes no row.
    branch_ids : sequence of int
        One per centreline.

    Returns
    -------
    dict of str to (n,) array
        ``arc_mm`` and ``x_mm``, ``y_mm``, ``z_mm`` in mm, ``curvature_per_mm`` and ``torsion_per_mm``
        in 1/mm, ``radius_mm`` in mm, unit tangents, ``in_summary`` bool; n = total samples.
    """
    if len(lines) != len(branch_ids):
        raise InputError(
            f"<array>: {len(lines)} centrelines but {len(branch_ids)} branch ids; pass one id per centreline"
        )
    kept = [(cl, b) for cl, b in zip(lines, branch_ids, strict=True) if cl is not None]
    if not kept:
        empty = np.zeros(0)
        cols = dict.fromkeys(_POINT_KEYS, empty)
        return cols | {"branch_id": np.zeros(0, int), "in_summary": np.zeros(0, bool)}
    n = [len(cl.arc) for cl, _ in kept]
    pts = np.concatenate([cl.points for cl, _ in kept])
    t = np.concatenate([cl.frame.tangent for cl, _ in kept])
    return {
        "branch_id": np.repeat(np.array([b for _, b in kept]), n),
        "arc_mm": np.concatenate([cl.arc for cl, _ in kept]),
        "x_mm": pts[:, 0],
        "y_mm": pts[:, 1],
        "z_mm": pts[:, 2],
        "curvature_per_mm": np.concatenate([cl.frame.curvature for cl, _ in kept]),
        "torsion_per_mm": np.concatenate([cl.frame.torsion for cl, _ in kept]),
        "radius_mm": np.concatenate([cl.radius for cl, _ in kept]),
        "tangent_x": t[:, 0],
        "tangent_y": t[:, 1],
        "tangent_z": t[:, 2],
        "in_summary": np.concatenate([cl.measured for cl, _ in kept]),
    }


_POINT_KEYS = (
    "branch_id arc_mm x_mm y_mm z_mm curvature_per_mm torsion_per_mm radius_mm tangent_x tangent_y "
    "tangent_z in_summary"
).split()


def _outgoing(cl: Centerline, at_start: bool, reach_mm: float) -> np.ndarray:
    """Unit tangent pointing away from a junction, ``reach_mm`` along the branch (at most half way)."""
    s = min(reach_mm, 0.5 * cl.arc[-1])
    i = int(np.argmin(np.abs(cl.arc - (s if at_start else cl.arc[-1] - s))))
    return cl.frame.tangent[i] * (1.0 if at_start else -1.0)


def end_directions(cl: Centerline, *, settings: Settings) -> tuple[np.ndarray, np.ndarray]:
    """The branch's directions away from its start and its end, as :func:`junction_row` uses them.

    Each is the unit tangent ``junction_angle_radii`` smoothing scales (about a radius) from that end,
    pointing away from it (METHODS: tangents 1-3 radii from the junction), so junction angles do not
    depend on where thinning put the junction voxels.
    """
    reach = settings.junction_angle_radii * cl.scale_mm
    return _outgoing(cl, True, reach), _outgoing(cl, False, reach)


def junction_row(
    node_id: int,
    component_id: int,
    position: np.ndarray,
    radius_mm: float,
    ends: list[tuple[int, np.ndarray | None]],
) -> dict:
    """One row of junctions.csv.

    ``ends`` lists (branch_id, direction) for every branch end at the node: the branch's unit direction
    away from the node (:func:`end_directions`), or None where its tracing failed.
    """
    dirs = [(bid, d) for bid, d in ends if d is not None]
    parts, angles = [], []
    for i in range(len(dirs)):
        for j in range(i + 1, len(dirs)):
            (a, da), (b, db) = sorted([dirs[i], dirs[j]], key=lambda x: x[0])
            ang = float(np.degrees(np.arccos(np.clip(np.dot(da, db), -1.0, 1.0))))
            angles.append(ang)
            parts.append((a, b, ang))
    parts.sort()
    return {
        "node_id": node_id,
        "component_id": component_id,
        "x_mm": float(position[0]),
        "y_mm": float(position[1]),
        "z_mm": float(position[2]),
        "degree": len(ends),
        "branch_ids": ";".join(str(b) for b in sorted(b for b, _ in ends)),
        "radius_mm": radius_mm,
        "min_angle_deg": min(angles) if angles else float("nan"),
        "max_angle_deg": max(angles) if angles else float("nan"),
        "angles_deg": ";".join(f"{a}-{b}:{ang:.1f}" for a, b, ang in parts),
    }
