"""Per-branch, per-point and per-junction measurements from traced centrelines (plain dicts of arrays).

Summaries of curvature, torsion and radius are taken over the *measured* stretch of each branch: the
centreline less about one radius at both ends (junctions distort the centreline there, and splines are
least constrained at their ends) and less the extrapolated part of terminal ends. Length, chord and the
tortuosity indices use the whole centreline.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .centerline import Centerline
from .metrics import count_inflections, distance_metric, integrate, sum_of_angles
from .settings import Settings

__all__ = ["BranchContext", "branch_row", "point_columns", "junction_row"]


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


def _outgoing(cl: Centerline, at_start: bool, reach_mm: float) -> np.ndarray:
    """Unit tangent pointing away from a junction, ``reach_mm`` along the branch (at most half way)."""
    s = min(reach_mm, 0.5 * cl.arc[-1])
    i = int(np.argmin(np.abs(cl.arc - (s if at_start else cl.arc[-1] - s))))
    return cl.frame.tangent[i] * (1.0 if at_start else -1.0)


def junction_row(
    node_id: int,
    component_id: int,
    position: np.ndarray,
    radius_mm: float,
    ends: list[tuple[int, Centerline | None, bool]],
    *,
    settings: Settings,
) -> dict:
    """One row of junctions.csv.

    ``ends`` lists (branch_id, centreline, at_start) for every branch end at the node. Each branch's
    direction is its tangent ``junction_angle_radii`` smoothing scales (about a radius) from the junction,
    pointing away from it (METHODS: tangents 1-3 radii from the junction), so the angles do not depend
    on where thinning put the junction voxels.
    """
    dirs = []
    for bid, cl, at_start in ends:
        if cl is not None:
            reach = settings.junction_angle_radii * cl.scale_mm
            dirs.append((bid, _outgoing(cl, at_start, reach)))
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
        "branch_ids": ";".join(str(b) for b in sorted(b for b, _, _ in ends)),
        "radius_mm": radius_mm,
        "min_angle_deg": min(angles) if angles else float("nan"),
        "max_angle_deg": max(angles) if angles else float("nan"),
        "angles_deg": ";".join(f"{a}-{b}:{ang:.1f}" for a, b, ang in parts),
    }
