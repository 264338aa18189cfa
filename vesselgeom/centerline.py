"""From ordered skeleton paths in world mm to smooth, arc-length parametrised centrelines with their frames.

Per branch: fit a penalised quintic spline (smoothing tied to the vessel radius), recentre points
sampled along it on the mask's cross-section (batched over all branches of a component), refit, repeat;
extend terminal ends that thinning retracted; resample at a fixed arc-length step; compute the
Frenet-Serret frame, curvature, torsion and radius at every sample.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .crosssection import CrossSection
from .frames import Frame, frenet_frame
from .radius import BoundaryDistance
from .settings import Settings
from .spline import CurveFit, arc_length_samples, fit_curve

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


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


def _exit_distance(
    start: np.ndarray, direction: np.ndarray, reach: float, section: CrossSection, voxel: float
) -> float:
    """Distance from ``start`` along ``direction`` to where the interpolated mask falls below 0.5 (mm).

    Returns ``reach`` when the mask does not end within it.
    """
    d = np.arange(0.0, reach + 0.25 * voxel, 0.25 * voxel)
    vals = section.sample(start[None, :] + d[:, None] * direction[None, :])
    outside = np.flatnonzero(vals < 0.5)
    if outside.size == 0:
        return float(reach)
    i = outside[0]
    if i == 0:
        return 0.0
    return float(d[i - 1] + (vals[i - 1] - 0.5) / (vals[i - 1] - vals[i]) * (d[i] - d[i - 1]))


def _extend_free_ends(
    fit: CurveFit,
    b: BranchInput,
    scale: float,
    section: CrossSection,
    boundary: BoundaryDistance,
    voxel: float,
    settings: Settings,
) -> tuple[CurveFit, np.ndarray]:
    """Replace the last ``scale`` of each terminal end by a straight stub reaching the axis end.

    Thinning stops a round-ended vessel's skeleton short of the axis end, and a spline is least
    constrained over its last smoothing length. From the point one scale inside the end, along the tangent
    there, the mask is followed to where it ends; the axis end is
    placed one local radius short of that (the mask surface of a rounded end lies one radius beyond
    the axis end). Returns the refitted curve and the stub lengths (mm) at the start and the end.
    """
    stubs = np.zeros(2)
    lo, hi = fit.u0, fit.u1
    heads: list[np.ndarray] = []
    tails: list[np.ndarray] = []
    for side, free in ((0, b.free_start), (1, b.free_end)):
        if not free:
            continue
        sign = 1.0 if side == 0 else -1.0
        u_end = fit.u0 if side == 0 else fit.u1
        u_a = float(np.clip(u_end + sign * scale, fit.u0, fit.u1))
        p_a = fit(np.array([u_a]))[0]
        direction = -sign * _unit(fit(np.array([u_a]), 1)[0])
        r_a = float(boundary(p_a[None])[0])
        reach = abs(u_end - u_a) + 8.0 * max(r_a, voxel)
        stubs[side] = max(_exit_distance(p_a, direction, reach, section, voxel) - r_a, 0.0)
        n = max(int(np.ceil(stubs[side] / (0.5 * voxel))), 1)
        stub = p_a + np.linspace(0.0, stubs[side], n + 1)[1:, None] * direction
        if side == 0:
            lo = u_a
            heads.append(stub[::-1])
        else:
            hi = u_a
            tails.append(stub)
    if lo >= hi:
        return fit, np.zeros(2)
    u = np.linspace(lo, hi, max(int(np.ceil((hi - lo) / (0.5 * voxel))), 2) + 1)
    pts = np.concatenate([*heads, fit(u), *tails])
    refit = fit_curve(pts, smoothing_mm=settings.smoothing_radii * scale, closed=False)
    return (refit, stubs) if refit is not None else (fit, np.zeros(2))


def trace_centerlines(
    branches: list[BranchInput],
    *,
    section: CrossSection,
    boundary: BoundaryDistance,
    voxel_mm: float,
    settings: Settings,
) -> list[Centerline | None]:
    """Trace every branch of one component; None for a branch that cannot be fitted.

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
    step = settings.step_mm or settings.step_voxels * voxel_mm
    scales, fits = [], []
    for b in branches:
        r = boundary(b.path)
        core = r[1:-1] if len(r) > 4 else r
        scale = max(float(np.nanmedian(core)) if core.size else 0.0, settings.min_scale_voxels * voxel_mm)
        scales.append(scale)
        fits.append(fit_curve(b.path, smoothing_mm=settings.smoothing_radii * scale, closed=b.closed))

    for _ in range(settings.recentre_passes):
        us = [(_even_samples(f, voxel_mm) if f is not None else np.zeros(0)) for f in fits]
        centres = [f(u) if f is not None else np.zeros((0, 3)) for f, u in zip(fits, us, strict=True)]
        tangents = [
            _unit(f(u, 1)) if f is not None else np.zeros((0, 3)) for f, u in zip(fits, us, strict=True)
        ]
        allc = np.concatenate(centres)
        if not len(allc):
            break
        rad = boundary(allc)
        disc = 1.5 * np.maximum(rad, voxel_mm) + voxel_mm
        moved, _ = section.centroids(allc, np.concatenate(tangents), disc)
        splits = np.cumsum([len(c) for c in centres])[:-1]
        for i, new in enumerate(np.split(moved, splits)):
            if fits[i] is None:
                continue
            fits[i] = (
                fit_curve(
                    new,
                    smoothing_mm=settings.smoothing_radii * scales[i],
                    closed=branches[i].closed,
                )
                or fits[i]
            )

    out: list[Centerline | None] = []
    for b, fit, scale in zip(branches, fits, scales, strict=True):
        if fit is None:
            out.append(None)
            continue
        ext = np.zeros(2)
        if not b.closed and (b.free_start or b.free_end):
            fit, ext = _extend_free_ends(fit, b, scale, section, boundary, voxel_mm, settings)
        arc, _u, r, d1, d2, d3 = arc_length_samples(fit, step)
        floor = settings.curvature_floor_per_voxel / voxel_mm
        frame = frenet_frame(d1, d2, d3, curvature_floor=floor)
        # torsion from a smoother fit of the same curve, parametrised (to 1e-4) by the same arc length
        dense = fit(_even_samples(fit, 0.5 * voxel_mm))
        smooth = fit_curve(dense, smoothing_mm=settings.torsion_smoothing_radii * scale, closed=fit.closed)
        if smooth is not None:
            a = np.clip(arc, smooth.u0, smooth.u1)
            tau = frenet_frame(smooth(a, 1), smooth(a, 2), smooth(a, 3)).torsion
            frame = replace(frame, torsion=np.where(np.isfinite(frame.torsion), tau, np.nan))
        radius = boundary(r)
        length = arc[-1]
        measured = np.ones(len(arc), bool)
        if not b.closed:
            trim_start = ext[0] + settings.end_trim_radii * scale
            trim_end = ext[1] + settings.end_trim_radii * scale
            measured = (arc >= trim_start - 1e-9) & (arc <= length - trim_end + 1e-9)
            if not measured.any():  # a branch shorter than its trims: keep its middle sample
                measured[len(arc) // 2] = True
        step_used = float(arc[1] - arc[0]) if len(arc) > 1 else 0.0
        out.append(Centerline(arc, r, frame, radius, measured, b.closed, step_used, scale, fit.degree, ext))
    return out
