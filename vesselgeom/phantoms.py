"""Synthetic vessel phantoms: tubes voxelised around analytic curves, with their ground truth.

A phantom is the set of voxel centres within ``radius_mm`` of a curve (a tube with rounded ends), sampled on
a grid with any voxel spacing under any rotation, flip or axis permutation. The curve is defined in world
millimetres and the grid is laid around it, so the same physical vessel can be stored under many affines.

Ground truth (length, chord, curvature, torsion, inflections) comes from the analytic derivatives of each
curve through the regular-parametrisation formulas

    kappa = |r' x r''| / |r'|^3,    tau = ((r' x r'') . r''') / |r' x r''|^2

(do Carmo 1976, sec. 1-5), integrated with :func:`scipy.integrate.quad`. ``tests/test_phantoms.py`` checks
these numbers against the closed forms listed in ``METHODS.md``.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import integrate
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

__all__ = [
    "Curve",
    "Phantom",
    "Truth",
    "helix",
    "sinusoid",
    "ring",
    "straight",
    "curve_truth",
    "make_grid_affine",
    "voxelize_tubes",
    "tube_phantom",
    "y_phantom",
    "tree_phantom",
    "random_rotation",
    "network_phantom",
    "network_polylines",
]

Vec = Callable[[np.ndarray], np.ndarray]


@dataclass(frozen=True)
class Curve:
    """An analytic space curve r(t) in mm with its first three derivatives.

    Attributes
    ----------
    name : str
        Short label used in reports.
    r, d1, d2, d3 : callable
        ``f(t)`` for a (n,) float array of parameters returning (n, 3) float arrays in mm (and mm per
        parameter unit for the derivatives).
    t0, t1 : float
        Parameter range.
    closed : bool
        Whether r(t0) == r(t1) with matching derivatives (a ring).
    inflections : int
        Number of interior points where the principal normal flips (planar inflections), known analytically.
    """

    name: str
    r: Vec
    d1: Vec
    d2: Vec
    d3: Vec
    t0: float
    t1: float
    closed: bool = False
    inflections: int = 0


@dataclass(frozen=True)
class Truth:
    """Analytic ground truth of one branch, in mm and per mm."""

    name: str
    length_mm: float
    chord_mm: float
    distance_metric: float
    mean_curvature_per_mm: float
    max_curvature_per_mm: float
    mean_torsion_per_mm: float
    mean_abs_torsion_per_mm: float
    inflection_count: int
    closed: bool
    radius_mm: float


@dataclass(frozen=True)
class Phantom:
    """A voxelised phantom: boolean mask, its affine (index -> world mm) and the truth per branch.

    ``branches`` lists the truth of each analytic branch; ``n_junctions`` counts the junctions the vessel
    tree has by construction.
    """

    mask: np.ndarray
    affine: np.ndarray
    branches: tuple[Truth, ...]
    n_junctions: int = 0
    curves: tuple[Curve, ...] = field(default=(), repr=False)


# --------------------------------------------------------------------------- curves


def _stack(*cols: np.ndarray) -> np.ndarray:
    return np.stack(np.broadcast_arrays(*cols), axis=-1).astype(float)


def helix(a: float = 10.0, b: float = 3.0, *, turns: float = 2.0, right_handed: bool = True) -> Curve:
    """Circular helix (a cos t, s a sin t, b t), s = +1 right-handed, -1 left-handed.

    Curvature a/(a^2+b^2) and torsion s b/(a^2+b^2) per mm (do Carmo 1976, sec. 1-5, example).
    """
    s = 1.0 if right_handed else -1.0
    z0 = np.zeros(1)
    return Curve(
        name=f"helix_{'right' if right_handed else 'left'}",
        r=lambda t: _stack(a * np.cos(t), s * a * np.sin(t), b * t),
        d1=lambda t: _stack(-a * np.sin(t), s * a * np.cos(t), b + 0 * t),
        d2=lambda t: _stack(-a * np.cos(t), -s * a * np.sin(t), z0 * t),
        d3=lambda t: _stack(a * np.sin(t), -s * a * np.cos(t), z0 * t),
        t0=0.0,
        t1=2 * np.pi * turns,
    )


def sinusoid(amplitude: float = 4.0, wavelength: float = 40.0, *, periods: int = 3) -> Curve:
    """Planar sinusoid y = A sin(2 pi x / lambda) over whole periods; 2N-1 interior inflections."""
    w = 2 * np.pi / wavelength
    A = amplitude
    return Curve(
        name="sinusoid",
        r=lambda t: _stack(t, A * np.sin(w * t), 0 * t),
        d1=lambda t: _stack(1 + 0 * t, A * w * np.cos(w * t), 0 * t),
        d2=lambda t: _stack(0 * t, -A * w**2 * np.sin(w * t), 0 * t),
        d3=lambda t: _stack(0 * t, -A * w**3 * np.cos(w * t), 0 * t),
        t0=0.0,
        t1=periods * wavelength,
        inflections=2 * periods - 1,
    )


def ring(radius: float = 12.0) -> Curve:
    """Circle of radius R in the xy plane: curvature 1/R, torsion 0, closed (no chord)."""
    R = radius
    return Curve(
        name="ring",
        r=lambda t: _stack(R * np.cos(t), R * np.sin(t), 0 * t),
        d1=lambda t: _stack(-R * np.sin(t), R * np.cos(t), 0 * t),
        d2=lambda t: _stack(-R * np.cos(t), -R * np.sin(t), 0 * t),
        d3=lambda t: _stack(R * np.sin(t), -R * np.cos(t), 0 * t),
        t0=0.0,
        t1=2 * np.pi,
        closed=True,
    )


def straight(length: float = 40.0, *, start: Sequence[float] = (0, 0, 0), direction=(1, 0, 0)) -> Curve:
    """Straight segment from ``start`` along ``direction``: curvature 0, distance metric 1."""
    p0 = np.asarray(start, float)
    u = np.asarray(direction, float)
    u = u / np.linalg.norm(u)
    return Curve(
        name="straight",
        r=lambda t: p0 + np.asarray(t, float)[:, None] * u,
        d1=lambda t: np.tile(u, (len(t), 1)),
        d2=lambda t: np.zeros((len(t), 3)),
        d3=lambda t: np.zeros((len(t), 3)),
        t0=0.0,
        t1=float(length),
    )


# --------------------------------------------------------------------------- truth


def _kappa_tau(curve: Curve, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    d1, d2, d3 = curve.d1(t), curve.d2(t), curve.d3(t)
    speed = np.linalg.norm(d1, axis=1)
    c = np.cross(d1, d2)
    cn2 = np.einsum("ij,ij->i", c, c)
    kappa = np.sqrt(cn2) / speed**3
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = np.where(cn2 > 1e-24, np.einsum("ij,ij->i", c, d3) / cn2, 0.0)
    return speed, kappa, tau


def _integral(curve: Curve, f: Callable[[np.ndarray], np.ndarray]) -> float:
    """Integral over the curve of f ds, with quad over t (adaptive, tight tolerance)."""

    def g(t: float) -> float:
        tt = np.array([t])
        speed, kappa, tau = _kappa_tau(curve, tt)
        return float(f(np.stack([kappa, tau]))[0] * speed[0])

    val, _ = integrate.quad(g, curve.t0, curve.t1, limit=400, epsabs=1e-10, epsrel=1e-10)
    return float(val)


def curve_truth(curve: Curve, *, radius_mm: float) -> Truth:
    """Ground-truth summaries of a curve: length, chord, DM, mean curvature, mean torsion.

    Means are arc-length weighted over the whole curve: mean kappa = (1/L) integral kappa ds. The signed mean
    torsion is the arc-length mean of tau (constant on a helix, zero on planar curves).
    """
    length = _integral(curve, lambda kt: np.ones_like(kt[0]))
    total_k = _integral(curve, lambda kt: kt[0])
    total_t = _integral(curve, lambda kt: kt[1])
    total_abs_t = _integral(curve, lambda kt: np.abs(kt[1]))
    tt = np.linspace(curve.t0, curve.t1, 20001)
    _, kappa, _ = _kappa_tau(curve, tt)
    ends = curve.r(np.array([curve.t0, curve.t1]))
    chord = 0.0 if curve.closed else float(np.linalg.norm(ends[1] - ends[0]))
    return Truth(
        name=curve.name,
        length_mm=length,
        chord_mm=chord,
        distance_metric=float("nan") if curve.closed else length / chord,
        mean_curvature_per_mm=total_k / length,
        max_curvature_per_mm=float(kappa.max()),
        mean_torsion_per_mm=total_t / length,
        mean_abs_torsion_per_mm=total_abs_t / length,
        inflection_count=curve.inflections,
        closed=curve.closed,
        radius_mm=float(radius_mm),
    )


def sample_curve(curve: Curve, step_mm: float) -> np.ndarray:
    """Points along the curve at (about) ``step_mm`` spacing, (n, 3) mm, ends included."""
    tt = np.linspace(curve.t0, curve.t1, 4001)
    p = curve.r(tt)
    s = np.concatenate([[0], np.cumsum(np.linalg.norm(np.diff(p, axis=0), axis=1))])
    n = max(int(np.ceil(s[-1] / step_mm)) + 1, 2)
    t = np.interp(np.linspace(0, s[-1], n), s, tt)
    return curve.r(t)


# --------------------------------------------------------------------------- voxelisation


def random_rotation(seed: int, *, flip: bool = False, permute: bool = False) -> np.ndarray:
    """A reproducible 3x3 orthogonal matrix; ``flip`` makes it improper (det -1), ``permute`` swaps axes."""
    rng = np.random.default_rng(seed)
    m = Rotation.random(random_state=rng).as_matrix()
    if permute:
        m = m[:, rng.permutation(3)]
    if (np.linalg.det(m) < 0) != flip:  # an odd permutation is itself improper
        m = m @ np.diag([1.0, 1.0, -1.0])
    return m


def make_grid_affine(
    points: np.ndarray,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    rotation: np.ndarray | None = None,
    margin_mm: float = 5.0,
) -> tuple[np.ndarray, tuple[int, int, int]]:
    """An affine and grid shape whose voxels cover ``points`` plus a margin.

    Parameters
    ----------
    points : (n, 3) float array, mm
        World points the grid must contain.
    spacing : 3 floats, mm
        Voxel size along the index axes i, j, k.
    rotation : (3, 3) array, optional
        Orthogonal matrix (det +1 or -1) mapping index axes to world directions; identity by default.
    margin_mm : float
        Extra room around the points on every side.

    Returns
    -------
    affine : (4, 4) float array
    shape : tuple of 3 ints
    """
    rot = np.eye(3) if rotation is None else np.asarray(rotation, float)
    lin = rot @ np.diag(np.asarray(spacing, float))
    inv = np.linalg.inv(lin)
    idx = points @ inv.T
    pad = margin_mm / np.asarray(spacing, float)
    lo = np.floor(idx.min(axis=0) - pad)
    hi = np.ceil(idx.max(axis=0) + pad)
    affine = np.eye(4)
    affine[:3, :3] = lin
    affine[:3, 3] = lin @ lo
    shape = tuple(int(v) for v in (hi - lo + 1))
    return affine, shape  # type: ignore[return-value]


def voxelize_tubes(
    polylines: Sequence[np.ndarray],
    radii: Sequence[float],
    affine: np.ndarray,
    shape: tuple[int, int, int],
) -> np.ndarray:
    """Boolean mask of voxel centres within each polyline's radius (union of round-ended tubes).

    Polylines should be sampled densely (spacing well below the voxel size); the distance to the
    nearest sample then approximates the distance to the curve to within (spacing/2)^2 / (2 radius).
    """
    mask = np.zeros(shape, dtype=bool)
    inv = np.linalg.inv(affine)
    for pts, rad in zip(polylines, radii, strict=True):
        idx = pts @ inv[:3, :3].T + inv[:3, 3]
        reach = rad / np.min(np.linalg.norm(affine[:3, :3], axis=0)) + 2
        lo = np.maximum(np.floor(idx.min(axis=0) - reach), 0).astype(int)
        hi = np.minimum(np.ceil(idx.max(axis=0) + reach) + 1, shape).astype(int)
        if np.any(hi <= lo):  # entirely outside the grid
            continue
        grids = np.meshgrid(*[np.arange(a, b) for a, b in zip(lo, hi, strict=True)], indexing="ij")
        ijk = np.stack([g.ravel() for g in grids], axis=1).astype(float)
        xyz = ijk @ affine[:3, :3].T + affine[:3, 3]
        dist, _ = cKDTree(pts).query(xyz, distance_upper_bound=rad * 1.0000001)
        inside = np.isfinite(dist).reshape(grids[0].shape)
        sub = tuple(slice(a, b) for a, b in zip(lo, hi, strict=True))
        mask[sub] |= inside
    return mask


def tube_phantom(
    curve: Curve,
    radius_mm: float,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    rotation: np.ndarray | None = None,
    offset_mm: Sequence[float] = (0.0, 0.0, 0.0),
) -> Phantom:
    """Voxelise a tube of ``radius_mm`` around ``curve`` on a grid with the given spacing and rotation.

    Examples
    --------
    >>> ph = tube_phantom(helix(turns=1), 2.0, spacing=(0.8, 0.8, 1.0))
    >>> ph.mask.ndim, round(ph.branches[0].mean_curvature_per_mm, 4)
    (3, 0.0917)
    """
    step = 0.1 * float(np.min(spacing))
    pts = sample_curve(curve, step) + np.asarray(offset_mm, float)
    affine, shape = make_grid_affine(
        pts, spacing=spacing, rotation=rotation, margin_mm=radius_mm + 3 * max(spacing)
    )
    mask = voxelize_tubes([pts], [radius_mm], affine, shape)
    return Phantom(mask, affine, (curve_truth(curve, radius_mm=radius_mm),), 0, (curve,))


def y_phantom(
    radius_mm: float = 2.0,
    *,
    arm_mm: float = 30.0,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    rotation: np.ndarray | None = None,
) -> Phantom:
    """A Y bifurcation: a parent and two daughters, straight, meeting at the origin.

    The daughters leave at +-37.5 degrees from the parent's direction (the symmetric optimum of Murray's
    law, Murray 1926), so three branches and one junction of degree 3.
    """
    half = np.deg2rad(37.47)
    dirs = [np.array([-1.0, 0, 0]), np.array([np.cos(half), np.sin(half), 0])]
    dirs.append(np.array([np.cos(half), -np.sin(half), 0]))
    curves = tuple(straight(arm_mm, start=(0, 0, 0), direction=d) for d in dirs)
    return _union(curves, [radius_mm] * 3, spacing, rotation, n_junctions=1)


def tree_phantom(
    depth: int = 3,
    *,
    root_radius_mm: float = 3.0,
    root_length_mm: float = 30.0,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    rotation: np.ndarray | None = None,
    seed: int = 0,
) -> Phantom:
    """A small binary tree of straight tubes; radii follow Murray's law (r_child = r_parent / 2^(1/3)).

    ``depth`` levels give 2^depth - 1 branches and 2^(depth-1) - 1 junctions of degree 3.
    """
    rng = np.random.default_rng(seed)
    curves: list[Curve] = []
    radii: list[float] = []

    def grow(start, direction, length, rad, level):
        curves.append(straight(length, start=start, direction=direction))
        radii.append(rad)
        if level + 1 >= depth:
            return
        end = np.asarray(start) + length * direction
        # a plane containing the direction, turned at random about it
        perp = np.cross(direction, rng.normal(size=3))
        perp /= np.linalg.norm(perp)
        for sign in (1, -1):
            ang = np.deg2rad(rng.uniform(30, 45))
            d = np.cos(ang) * direction + sign * np.sin(ang) * perp
            grow(end, d / np.linalg.norm(d), length * 0.8, rad / 2 ** (1 / 3), level + 1)

    grow(np.zeros(3), np.array([0.0, 0.0, 1.0]), root_length_mm, root_radius_mm, 0)
    return _union(tuple(curves), radii, spacing, rotation, n_junctions=2 ** (depth - 1) - 1)


def _union(curves, radii, spacing, rotation, *, n_junctions: int) -> Phantom:
    step = 0.1 * float(np.min(spacing))
    polys = [sample_curve(c, step) for c in curves]
    affine, shape = make_grid_affine(
        np.concatenate(polys), spacing=spacing, rotation=rotation, margin_mm=max(radii) + 3
    )
    mask = voxelize_tubes(polys, radii, affine, shape)
    truth = tuple(curve_truth(c, radius_mm=r) for c, r in zip(curves, radii, strict=True))
    return Phantom(mask, affine, truth, n_junctions, tuple(curves))


def network_polylines(
    extent_mm: Sequence[float],
    *,
    n_trees: int = 8,
    depth: int = 5,
    radius_mm: tuple[float, float] = (1.0, 5.0),
    undulation_radii: float = 0.0,
    step_mm: float = 0.1,
    seed: int = 0,
) -> tuple[list[np.ndarray], list[float]]:
    """Polylines (world mm, box from 0 to ``extent_mm``) and radii of random vessel trees.

    Each tree starts at a random point with a random direction; every segment is a circular arc
    (curvature up to 1/(8 r)) of length 6-14 radii; children leave at 25-50 degrees with Murray's-law
    radii (r / 2^(1/3)) until ``depth`` levels or the minimum radius. ``undulation_radii`` > 0 adds a
    lateral sine wave of that amplitude (in radii) and a wavelength of about 12 radii to every segment,
    making the network more tortuous without changing its radii. Points are ``step_mm`` apart.
    """
    rng = np.random.default_rng(seed)
    extent = np.asarray(extent_mm, float)
    polys: list[np.ndarray] = []
    radii: list[float] = []
    r_min, r_max = radius_mm

    def arc(start, direction, length, rad):
        # circular arc in a random plane containing the direction
        normal = np.cross(direction, rng.normal(size=3))
        normal /= np.linalg.norm(normal)
        kappa = rng.uniform(0.0, 1.0 / (8 * rad))
        s = np.arange(0.0, length + step_mm, step_mm)
        kappa = max(kappa, 1e-6)
        th = kappa * s
        pts = start + (np.sin(th)[:, None] * direction + (1 - np.cos(th))[:, None] * normal) / kappa
        end_dir = np.cos(th[-1]) * direction + np.sin(th[-1]) * normal
        if undulation_radii > 0:  # whole periods, so the segment still ends where the arc ends
            periods = max(1, int(round(length / (12 * rad))))
            wave = undulation_radii * rad * np.sin(2 * np.pi * periods * s / s[-1])
            side = np.cross(np.sin(th)[:, None] * normal + np.cos(th)[:, None] * direction, normal)
            pts = pts + wave[:, None] * side
        return pts, end_dir

    def grow(start, direction, rad, level):
        pts, end_dir = arc(start, direction, rng.uniform(6, 14) * rad, rad)
        polys.append(pts)
        radii.append(rad)
        child = rad / 2 ** (1 / 3)
        if level + 1 >= depth or child < r_min:
            return
        perp = np.cross(end_dir, rng.normal(size=3))
        perp /= np.linalg.norm(perp)
        for sign in (1, -1):
            ang = np.deg2rad(rng.uniform(25, 50))
            d = np.cos(ang) * end_dir + sign * np.sin(ang) * perp
            grow(pts[-1], d / np.linalg.norm(d), child, level + 1)

    for _ in range(n_trees):
        start = rng.uniform(0.15, 0.85, size=3) * extent
        direction = rng.normal(size=3)
        grow(start, direction / np.linalg.norm(direction), r_max, 0)
    return polys, radii


def network_phantom(
    shape: tuple[int, int, int] = (128, 128, 128),
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    n_trees: int = 8,
    depth: int = 5,
    radius_voxels: tuple[float, float] = (1.0, 5.0),
    undulation_radii: float = 0.0,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray]:
    """A synthetic vascular network filling a box: :func:`network_polylines` voxelised.

    Radii are given in voxels of the finest axis. Segments leaving the box are kept (they are clipped
    by the grid, as a field of view clips real vessels).

    Returns
    -------
    mask : bool array of ``shape``
    affine : (4, 4) float array, axis-aligned with the given spacing
    """
    sp = np.asarray(spacing, float)
    affine = np.diag([*sp, 1.0])
    vox = float(sp.min())
    polys, radii = network_polylines(
        np.asarray(shape) * sp,
        n_trees=n_trees,
        depth=depth,
        radius_mm=(radius_voxels[0] * vox, radius_voxels[1] * vox),
        undulation_radii=undulation_radii,
        step_mm=0.1 * vox,
        seed=seed,
    )
    mask = voxelize_tubes(polys, radii, affine, tuple(int(v) for v in shape))
    return mask, affine
