"""Tests for vesselgeom.phantoms: analytic ground truth and voxelisation.

Independent references used below:
- Closed forms of METHODS.md ("Closed-form check curves"), re-derived here with sympy from the
  parametrisations through the regular-parametrisation formulas kappa = |r' x r''| / |r'|^3 and
  tau = ((r' x r'') . r''') / |r' x r''|^2 (do Carmo 1976, sec. 1-5).
- The sinusoid length via the complete elliptic integral of the second kind,
  :func:`scipy.special.ellipe` (parameter m), L = (2 lambda / pi) sqrt(1 + k^2) E(k^2 / (1 + k^2)).
- Tube volume pi r^2 L + 4/3 pi r^3 (cylinder plus two hemispherical caps; Pappus' theorem for a
  tube around a curve whose curvature radius exceeds r).
- Voxel-to-world mapping through :func:`nibabel.affines.apply_affine`; the exact distance from a
  point to a circle of radius R in the xy plane, sqrt((rho - R)^2 + z^2).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp
from nibabel.affines import apply_affine
from scipy.spatial import cKDTree
from scipy.special import ellipe

from vesselgeom.phantoms import (
    _kappa_tau,
    curve_truth,
    helix,
    random_rotation,
    ring,
    sinusoid,
    straight,
    tube_phantom,
)

# --------------------------------------------------------------------------- sympy closed forms

_t = sp.symbols("t", real=True)


def _sym_kappa_tau(r: sp.Matrix) -> tuple[sp.Expr, sp.Expr, sp.Expr]:
    """Speed, curvature and torsion of r(t) from the regular-parametrisation formulas (do Carmo 1-5)."""
    d1, d2, d3 = r.diff(_t), r.diff(_t, 2), r.diff(_t, 3)
    c = d1.cross(d2)
    speed = sp.sqrt(d1.dot(d1))
    kappa = sp.sqrt(c.dot(c)) / speed**3
    tau = c.dot(d3) / c.dot(c)
    return speed, kappa, tau


def test_sympy_helix_closed_form_matches_methods():
    # METHODS.md, helix: kappa = a/(a^2+b^2), tau = +-b/(a^2+b^2), speed sqrt(a^2+b^2) (sympy check).
    a, b = sp.symbols("a b", positive=True)
    for s in (1, -1):
        r = sp.Matrix([a * sp.cos(_t), s * a * sp.sin(_t), b * _t])
        speed, kappa, tau = _sym_kappa_tau(r)
        assert sp.simplify(speed - sp.sqrt(a**2 + b**2)) == 0
        assert sp.simplify(kappa - a / (a**2 + b**2)) == 0
        assert sp.simplify(tau - s * b / (a**2 + b**2)) == 0


@pytest.mark.parametrize("right_handed", [True, False])
@pytest.mark.parametrize(("a", "b"), [(10.0, 2.0), (10.0, 3.0), (4.0, 7.0)])
def test_kappa_tau_pointwise_matches_sympy_helix(a, b, right_handed):
    # do Carmo 1976 sec. 1-5 formulas evaluated by sympy (lambdify) vs the private truth helper.
    s = 1 if right_handed else -1
    r = sp.Matrix([a * sp.cos(_t), s * a * sp.sin(_t), b * _t])
    f_speed, f_kappa, f_tau = (sp.lambdify(_t, e, "numpy") for e in _sym_kappa_tau(r))
    t = np.linspace(0.0, 4 * np.pi, 37)
    speed, kappa, tau = _kappa_tau(helix(a, b, turns=2, right_handed=right_handed), t)
    np.testing.assert_allclose(speed, np.broadcast_to(f_speed(t), t.shape), rtol=1e-12)
    np.testing.assert_allclose(kappa, np.broadcast_to(f_kappa(t), t.shape), rtol=1e-12)
    np.testing.assert_allclose(tau, np.broadcast_to(f_tau(t), t.shape), rtol=1e-12)


def test_kappa_tau_pointwise_matches_sympy_sinusoid():
    # Sinusoid y = A sin(2 pi x / lambda): curvature from the sympy formula; planar, so tau = 0.
    A, lam = 4.0, 40.0
    r = sp.Matrix([_t, A * sp.sin(2 * sp.pi * _t / lam), 0])
    _, kappa_e, _ = _sym_kappa_tau(r)
    f_kappa = sp.lambdify(_t, kappa_e, "numpy")
    t = np.linspace(0.0, 3 * lam, 241)
    _, kappa, tau = _kappa_tau(sinusoid(A, lam, periods=3), t)
    np.testing.assert_allclose(kappa, f_kappa(t), rtol=1e-12, atol=1e-15)
    np.testing.assert_array_equal(tau, 0.0)


@pytest.mark.parametrize("right_handed", [True, False])
def test_helix_truth_summaries(right_handed):
    # METHODS.md helix: kappa = a/(a^2+b^2), tau = +-b/(a^2+b^2) (sign by handedness),
    # length 2 pi n sqrt(a^2+b^2), chord 2 pi n b, DM = sqrt(a^2+b^2)/b over whole turns (Bullitt 2003).
    a, b, turns = 10.0, 3.0, 2.0
    tr = curve_truth(helix(a, b, turns=turns, right_handed=right_handed), radius_mm=2.0)
    s = 1.0 if right_handed else -1.0
    c2 = a**2 + b**2
    assert tr.length_mm == pytest.approx(2 * np.pi * turns * np.sqrt(c2), rel=1e-9)
    assert tr.chord_mm == pytest.approx(2 * np.pi * turns * b, rel=1e-12)
    assert tr.distance_metric == pytest.approx(np.sqrt(c2) / b, rel=1e-9)
    assert tr.mean_curvature_per_mm == pytest.approx(a / c2, rel=1e-9)
    assert tr.max_curvature_per_mm == pytest.approx(a / c2, rel=1e-12)
    assert tr.mean_torsion_per_mm == pytest.approx(s * b / c2, rel=1e-9)
    assert tr.mean_abs_torsion_per_mm == pytest.approx(b / c2, rel=1e-9)
    assert tr.inflection_count == 0
    assert tr.closed is False
    assert tr.radius_mm == 2.0


def test_methods_helix_numbers():
    # METHODS.md: a=10, b=2 gives kappa = 0.0961538, tau = 0.0192308 (7 decimals).
    tr = curve_truth(helix(10.0, 2.0, turns=1), radius_mm=1.0)
    assert round(tr.mean_curvature_per_mm, 7) == 0.0961538
    assert round(tr.mean_torsion_per_mm, 7) == 0.0192308


def _sinusoid_length_per_wavelength(k: float, lam: float) -> float:
    # METHODS.md: L = (2 lambda / pi) sqrt(1 + k^2) E(k^2 / (1 + k^2)), scipy.special.ellipe (parameter m).
    return 2 * lam / np.pi * np.sqrt(1 + k**2) * ellipe(k**2 / (1 + k**2))


def test_sinusoid_ellipe_reference_value():
    # METHODS.md: L / lambda = 1.2160067 at k = 1 (checks the reference formula itself).
    assert _sinusoid_length_per_wavelength(1.0, 1.0) == pytest.approx(1.2160067, abs=5e-8)


def test_sympy_sinusoid_turning_per_wavelength():
    # Independent derivation of "integral |kappa| ds per wavelength = 4 arctan k" (METHODS.md):
    # for a graph y(x), signed kappa ds = y'' / (1 + y'^2) dx = d/dx arctan(y'), so each quarter
    # wavelength turns by arctan(k) and a wavelength by 4 arctan(k).
    A, lam = sp.symbols("A lambda", positive=True)
    y = A * sp.sin(2 * sp.pi * _t / lam)
    yp, ypp = y.diff(_t), y.diff(_t, 2)
    signed_kappa_ds_dx = ypp / (1 + yp**2)
    assert sp.simplify(sp.atan(yp).diff(_t) - signed_kappa_ds_dx) == 0
    k = 2 * sp.pi * A / lam
    quarter = sp.atan(yp).subs(_t, 0) - sp.atan(yp).subs(_t, lam / 4)
    assert sp.simplify(quarter - sp.atan(k)) == 0


@pytest.mark.parametrize(
    ("amplitude", "wavelength", "periods"),
    [(40 / (2 * np.pi), 40.0, 3), (4.0, 40.0, 2), (6.0, 25.0, 4)],
)
def test_sinusoid_truth_summaries(amplitude, wavelength, periods):
    # METHODS.md sinusoid: ellipe length, integral |kappa| ds = 4 arctan k per wavelength,
    # kappa_max = A (2 pi / lambda)^2, 2N - 1 interior inflections, planar (tau = 0), chord N lambda.
    k = 2 * np.pi * amplitude / wavelength
    tr = curve_truth(sinusoid(amplitude, wavelength, periods=periods), radius_mm=1.0)
    length = periods * _sinusoid_length_per_wavelength(k, wavelength)
    assert tr.length_mm == pytest.approx(length, rel=1e-9)
    assert tr.chord_mm == pytest.approx(periods * wavelength, rel=1e-12)
    assert tr.distance_metric == pytest.approx(length / (periods * wavelength), rel=1e-9)
    assert tr.mean_curvature_per_mm * tr.length_mm == pytest.approx(periods * 4 * np.arctan(k), rel=1e-8)
    # max is taken over 20001 samples, which can miss the exact peak by at most ~1e-6 relative
    # (kappa ~ kappa_max (1 - (1/2 + 3/2 k^2) e^2), e <= 2 pi N / 40000): never above the true max.
    kmax = amplitude * (2 * np.pi / wavelength) ** 2
    assert tr.max_curvature_per_mm <= kmax * (1 + 1e-12)
    assert tr.max_curvature_per_mm == pytest.approx(kmax, rel=1e-5)
    assert tr.mean_torsion_per_mm == 0.0
    assert tr.mean_abs_torsion_per_mm == 0.0
    assert tr.inflection_count == 2 * periods - 1


def test_sinusoid_k1_length_ratio():
    # METHODS.md: L / lambda = 1.2160067 at k = 1, here through the phantom's quad integration.
    lam = 30.0
    tr = curve_truth(sinusoid(lam / (2 * np.pi), lam, periods=1), radius_mm=1.0)
    assert tr.length_mm / lam == pytest.approx(1.2160067, abs=1e-7)


@pytest.mark.parametrize("radius", [5.0, 12.0])
def test_ring_truth(radius):
    # METHODS.md circle: kappa = 1/R, tau = 0, closed, chord 0; DM undefined for a loop (Bullitt 2003).
    tr = curve_truth(ring(radius), radius_mm=1.5)
    assert tr.closed is True
    assert tr.length_mm == pytest.approx(2 * np.pi * radius, rel=1e-10)
    assert tr.chord_mm == 0.0
    assert np.isnan(tr.distance_metric)
    assert tr.mean_curvature_per_mm == pytest.approx(1 / radius, rel=1e-10)
    assert tr.max_curvature_per_mm == pytest.approx(1 / radius, rel=1e-12)
    assert tr.mean_torsion_per_mm == 0.0
    assert tr.inflection_count == 0


def test_straight_truth():
    # METHODS.md / Bullitt 2003: DM = 1 for a straight segment; curvature 0.
    tr = curve_truth(straight(37.5, start=(1, -2, 3), direction=(1, 2, 3)), radius_mm=2.0)
    assert tr.length_mm == pytest.approx(37.5, rel=1e-10)
    assert tr.chord_mm == pytest.approx(37.5, rel=1e-12)
    assert tr.distance_metric == pytest.approx(1.0, rel=1e-10)
    assert tr.mean_curvature_per_mm == 0.0
    assert tr.max_curvature_per_mm == 0.0
    assert tr.mean_torsion_per_mm == 0.0


# --------------------------------------------------------------------------- voxelisation


@pytest.mark.parametrize(
    ("spacing", "seed"), [((0.5, 0.5, 0.5), None), ((0.6, 0.8, 1.0), None), ((0.6, 0.8, 1.0), 3)]
)
def test_straight_tube_volume(spacing, seed):
    # Cylinder plus two hemispherical caps: V = pi r^2 L + 4/3 pi r^3. A voxel count times the voxel
    # volume is a lattice-point estimate of V; at r = 3 to 6 voxels its error is a few per cent.
    r, length = 3.0, 40.0
    rot = None if seed is None else random_rotation(seed, flip=True, permute=True)
    ph = tube_phantom(straight(length, direction=(1, 2, 3)), r, spacing=spacing, rotation=rot)
    volume = ph.mask.sum() * abs(np.linalg.det(ph.affine[:3, :3]))
    assert abs(np.linalg.det(ph.affine[:3, :3])) == pytest.approx(np.prod(spacing), rel=1e-12)
    expected = np.pi * r**2 * length + 4 / 3 * np.pi * r**3
    assert volume == pytest.approx(expected, rel=0.03)


def _ring_distance(xyz: np.ndarray, radius: float) -> np.ndarray:
    # Exact distance from points to the circle of radius R in the xy plane centred at the origin.
    rho = np.hypot(xyz[:, 0], xyz[:, 1])
    return np.hypot(rho - radius, xyz[:, 2])


@pytest.mark.parametrize(
    ("spacing", "seed"), [((1.0, 1.0, 1.0), None), ((0.7, 0.9, 1.3), 5), ((0.8, 0.8, 1.2), 11)]
)
def test_ring_mask_is_tube_in_world_mm(spacing, seed):
    # Every mask voxel centre, mapped to world mm by nibabel's apply_affine, lies within r of the
    # analytic circle; every voxel outside lies beyond r minus the polyline sagitta bound
    # (h/2)^2 / (2 r) stated in voxelize_tubes (h = 0.1 * min spacing, the sampling step).
    R, r = 12.0, 2.5
    rot = None if seed is None else random_rotation(seed, flip=True, permute=True)
    ph = tube_phantom(ring(R), r, spacing=spacing, rotation=rot)
    ijk = np.argwhere(np.ones(ph.mask.shape, bool))
    d = _ring_distance(apply_affine(ph.affine, ijk), R).reshape(ph.mask.shape)
    assert ph.mask.any()
    assert d[ph.mask].max() <= r * (1 + 1e-6)
    h = 0.1 * min(spacing)
    assert d[~ph.mask].min() > r - (h / 2) ** 2 / (2 * r) * 1.01
    # the grid margin leaves room: no mask voxel on the array border
    assert not (ph.mask[0].any() or ph.mask[-1].any() or ph.mask[:, 0].any())
    assert not (ph.mask[:, -1].any() or ph.mask[:, :, 0].any() or ph.mask[:, :, -1].any())


def test_helix_mask_within_radius_of_curve():
    # Mask voxel centres (world mm through the affine, nibabel apply_affine) are within r of the helix:
    # the distance to a very fine sampling of the analytic curve (step 0.005 mm) overestimates the true
    # distance by at most (0.0025)^2 / (2 r) < 2e-6 mm.
    a, b, r = 10.0, 3.0, 2.0
    curve = helix(a, b, turns=1)
    ph = tube_phantom(curve, r, spacing=(0.9, 1.0, 1.1), rotation=random_rotation(2, flip=True))
    xyz = apply_affine(ph.affine, np.argwhere(ph.mask))
    n = int(np.ceil(2 * np.pi * np.hypot(a, b) / 0.005)) + 1
    tt = np.linspace(0.0, 2 * np.pi, n)
    fine = np.stack([a * np.cos(tt), a * np.sin(tt), b * tt], axis=1)
    d, _ = cKDTree(fine).query(xyz)
    assert d.max() <= r + 2e-6


@pytest.mark.parametrize(
    ("seed", "flip", "permute"),
    [(0, True, True), (1, True, False), (2, False, True), (3, True, True)],
)
def test_voxel_count_invariant_under_rotation(seed, flip, permute):
    # The same physical tube stored under a rotated / flipped / permuted grid has the same volume:
    # the lattice-count error at r = 3 mm on (0.6, 0.8, 1.0) mm voxels is well below 2 %.
    rot = random_rotation(seed, flip=flip, permute=permute)
    np.testing.assert_allclose(rot @ rot.T, np.eye(3), atol=1e-12)  # orthogonal
    curve, r, spacing = helix(10.0, 3.0, turns=1), 3.0, (0.6, 0.8, 1.0)
    base = tube_phantom(curve, r, spacing=spacing).mask.sum()
    turned = tube_phantom(curve, r, spacing=spacing, rotation=rot).mask.sum()
    assert turned == pytest.approx(base, rel=0.02)


def test_random_rotation_reproducible():
    # Fixed seed, fixed matrix (numpy Generator determinism); different seeds differ.
    np.testing.assert_array_equal(random_rotation(7, flip=True), random_rotation(7, flip=True))
    assert not np.allclose(random_rotation(7), random_rotation(8))


@pytest.mark.parametrize("flip", [False, True])
def test_random_rotation_handedness_without_permutation(flip):
    # Docstring contract: orthogonal; ``flip`` makes the matrix improper (det -1), else det +1.
    for seed in range(10):
        rot = random_rotation(seed, flip=flip)
        np.testing.assert_allclose(rot @ rot.T, np.eye(3), atol=1e-12)
        assert np.linalg.det(rot) == pytest.approx(-1.0 if flip else 1.0, abs=1e-12)


@pytest.mark.parametrize("flip", [False, True])
def test_random_rotation_handedness_with_permutation(flip):
    # Docstring contract: ``flip`` makes the matrix improper (det -1), ``permute`` only swaps axes;
    # the determinant of an orthogonal matrix is +-1 and must follow ``flip`` alone.
    for seed in range(10):
        rot = random_rotation(seed, flip=flip, permute=True)
        np.testing.assert_allclose(rot @ rot.T, np.eye(3), atol=1e-12)
        assert np.linalg.det(rot) == pytest.approx(-1.0 if flip else 1.0, abs=1e-12)
