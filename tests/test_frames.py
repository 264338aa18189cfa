"""Tests for vesselgeom.frames.frenet_frame against closed forms (METHODS.md, "Frenet-Serret" and
"Closed-form check curves").

Derivatives r', r'', r''' of each parametrisation are computed symbolically with sympy and evaluated
with ``sympy.lambdify``; the expected curvature and torsion are the published closed forms:
helix (do Carmo 1976, sec. 1-5), conical helix, and Viviani's curve (Gray 1993).
"""

from __future__ import annotations

import numpy as np
import pytest
import sympy as sp

from vesselgeom.frames import frenet_frame

_t = sp.symbols("t", real=True)


def _derivatives(r: sp.Matrix, t: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(n, 3) arrays of r', r'', r''' of a sympy parametrisation at parameters ``t``."""
    out = []
    for order in (1, 2, 3):
        d = r.diff(_t, order)
        fs = [sp.lambdify(_t, d[i], "numpy") for i in range(3)]
        cols = [np.broadcast_to(np.asarray(f(t), float), t.shape) for f in fs]
        out.append(np.stack(cols, axis=1))
    return out[0], out[1], out[2]


def _helix(a: float, b: float, s: int) -> sp.Matrix:
    return sp.Matrix([a * sp.cos(_t), s * a * sp.sin(_t), b * _t])


def _viviani(a: float) -> sp.Matrix:
    return a * sp.Matrix([1 + sp.cos(_t), sp.sin(_t), 2 * sp.sin(_t / 2)])


def _conical() -> sp.Matrix:
    return sp.Matrix([_t * sp.cos(_t), _t * sp.sin(_t), _t])


T_GRID = np.linspace(-3.0, 9.0, 61)


@pytest.mark.parametrize("s", [1, -1])
@pytest.mark.parametrize(("a", "b"), [(10.0, 2.0), (10.0, 3.0), (2.0, 5.0)])
def test_helix_both_hands(a, b, s):
    # METHODS.md helix: kappa = a/(a^2+b^2), tau = b/(a^2+b^2); mirrored (s = -1) gives tau < 0.
    f = frenet_frame(*_derivatives(_helix(a, b, s), T_GRID))
    np.testing.assert_allclose(f.curvature, a / (a**2 + b**2), rtol=1e-12)
    np.testing.assert_allclose(f.torsion, s * b / (a**2 + b**2), rtol=1e-12)
    assert np.all(np.sign(f.torsion) == s)


def test_helix_methods_numbers():
    # METHODS.md: a = 10, b = 2 -> kappa = 0.0961538, tau = 0.0192308.
    f = frenet_frame(*_derivatives(_helix(10.0, 2.0, 1), np.array([0.0, 1.0, 2.5])))
    np.testing.assert_array_equal(np.round(f.curvature, 7), 0.0961538)
    np.testing.assert_array_equal(np.round(f.torsion, 7), 0.0192308)


def test_helix_under_reparametrisation():
    # Curvature and torsion are geometric: the helix traced with t = u + u^3 / 10 (a regular,
    # non-constant-speed parameter) has the same kappa and tau (do Carmo 1976, sec. 1-5).
    a, b = 10.0, 3.0
    r = _helix(a, b, 1).subs(_t, _t + _t**3 / 10)
    f = frenet_frame(*_derivatives(r, T_GRID))
    np.testing.assert_allclose(f.curvature, a / (a**2 + b**2), rtol=1e-10)
    np.testing.assert_allclose(f.torsion, b / (a**2 + b**2), rtol=1e-10)


def test_conical_helix():
    # METHODS.md conical helix (t cos t, t sin t, t): kappa = sqrt(t^4+5t^2+8)/(t^2+2)^(3/2),
    # tau = (t^2+6)/(t^4+5t^2+8); at t = 0 kappa = 1, tau = 0.75.
    t = T_GRID
    f = frenet_frame(*_derivatives(_conical(), t))
    kappa = np.sqrt(t**4 + 5 * t**2 + 8) / (t**2 + 2) ** 1.5
    tau = (t**2 + 6) / (t**4 + 5 * t**2 + 8)
    np.testing.assert_allclose(f.curvature, kappa, rtol=1e-12)
    np.testing.assert_allclose(f.torsion, tau, rtol=1e-12)
    f0 = frenet_frame(*_derivatives(_conical(), np.array([0.0])))
    assert f0.curvature[0] == pytest.approx(1.0, rel=1e-14)
    assert f0.torsion[0] == pytest.approx(0.75, rel=1e-14)


@pytest.mark.parametrize("a", [1.0, 2.5])
def test_viviani(a):
    # Viviani's curve a(1+cos t, sin t, 2 sin(t/2)) (Gray 1993, METHODS.md):
    # kappa = sqrt(13+3cos t)/(a(3+cos t)^(3/2)), tau = 6 cos(t/2)/(a(13+3cos t)).
    t = np.linspace(0.0, 4 * np.pi, 73)
    f = frenet_frame(*_derivatives(_viviani(a), t))
    kappa = np.sqrt(13 + 3 * np.cos(t)) / (a * (3 + np.cos(t)) ** 1.5)
    tau = 6 * np.cos(t / 2) / (a * (13 + 3 * np.cos(t)))
    np.testing.assert_allclose(f.curvature, kappa, rtol=1e-12)
    np.testing.assert_allclose(f.torsion, tau, rtol=1e-10, atol=1e-14 / a)


def test_viviani_methods_numbers():
    # METHODS.md, a = 1: t = 0 -> kappa 0.5, tau 0.375; t = pi -> kappa 1.118034, tau 0
    # (torsion changes sign at t = pi where curvature is not zero).
    f = frenet_frame(*_derivatives(_viviani(1.0), np.array([0.0, np.pi, np.pi - 0.1, np.pi + 0.1])))
    assert f.curvature[0] == pytest.approx(0.5, abs=5e-8)
    assert f.torsion[0] == pytest.approx(0.375, abs=5e-8)
    assert f.curvature[1] == pytest.approx(1.118034, abs=5e-7)
    assert f.torsion[1] == pytest.approx(0.0, abs=1e-14)
    assert f.torsion[2] > 0 > f.torsion[3]


CURVES = {
    "helix_right": _helix(10.0, 3.0, 1),
    "helix_left": _helix(10.0, 3.0, -1),
    "viviani": _viviani(1.5),
    "conical": _conical(),
}


@pytest.mark.parametrize("name", sorted(CURVES))
def test_frame_orthonormal_and_right_handed(name):
    # Frenet frame (do Carmo 1976, sec. 1-5): T, N, B unit and mutually orthogonal, B = T x N;
    # T = r'/|r'|; N is the unit component of r'' normal to T (dT/ds = kappa N).
    d1, d2, d3 = _derivatives(CURVES[name], T_GRID)
    f = frenet_frame(d1, d2, d3)
    eye = np.eye(3)
    for i in range(len(T_GRID)):
        m = np.stack([f.tangent[i], f.normal[i], f.binormal[i]])
        np.testing.assert_allclose(m @ m.T, eye, atol=1e-12)
    np.testing.assert_allclose(f.binormal, np.cross(f.tangent, f.normal), atol=1e-12)
    np.testing.assert_allclose(f.tangent, d1 / np.linalg.norm(d1, axis=1)[:, None], atol=1e-12)
    perp = d2 - np.einsum("ij,ij->i", d2, f.tangent)[:, None] * f.tangent
    np.testing.assert_allclose(f.normal, perp / np.linalg.norm(perp, axis=1)[:, None], atol=1e-12)


@pytest.mark.parametrize("name", sorted(CURVES))
def test_reversal_leaves_kappa_tau_unchanged(name):
    # METHODS.md: kappa and tau are unchanged when the direction of travel is reversed. Tracing
    # r(-t) flips r' and r''' and keeps r''; T and B flip, N stays.
    r = CURVES[name]
    fwd = frenet_frame(*_derivatives(r, T_GRID))
    back = frenet_frame(*_derivatives(r.subs(_t, -_t), -T_GRID))
    np.testing.assert_allclose(back.curvature, fwd.curvature, rtol=1e-12)
    np.testing.assert_allclose(back.torsion, fwd.torsion, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(back.tangent, -fwd.tangent, atol=1e-12)
    np.testing.assert_allclose(back.normal, fwd.normal, atol=1e-12)
    np.testing.assert_allclose(back.binormal, -fwd.binormal, atol=1e-12)


def test_straight_line_torsion_undefined():
    # A straight line has kappa = 0 and no osculating plane: N, B and tau are undefined (NaN),
    # T is still the unit direction (do Carmo 1976, sec. 1-5).
    n = 5
    u = np.array([1.0, 2.0, 2.0])
    f = frenet_frame(np.tile(3 * u, (n, 1)), np.zeros((n, 3)), np.zeros((n, 3)))
    np.testing.assert_array_equal(f.curvature, 0.0)
    assert np.isnan(f.torsion).all()
    assert np.isnan(f.normal).all() and np.isnan(f.binormal).all()
    np.testing.assert_allclose(f.tangent, np.tile(u / 3, (n, 1)), atol=1e-15)


def test_curvature_floor():
    # Helix a = 10, b = 3: kappa = 10/109 = 0.0917. Below the floor tau, N, B are NaN; above it they
    # are defined; curvature itself is always reported.
    d = _derivatives(_helix(10.0, 3.0, 1), T_GRID)
    kappa = 10.0 / 109.0
    below = frenet_frame(*d, curvature_floor=kappa * 1.01)
    assert np.isnan(below.torsion).all()
    assert np.isnan(below.normal).all() and np.isnan(below.binormal).all()
    np.testing.assert_allclose(below.curvature, kappa, rtol=1e-12)
    above = frenet_frame(*d, curvature_floor=kappa * 0.99)
    np.testing.assert_allclose(above.torsion, 3.0 / 109.0, rtol=1e-12)


def test_curvature_floor_pointwise():
    # Conical helix: kappa(t) decreases from 1 at t = 0; a floor of 0.5 leaves tau defined exactly
    # where the closed-form curvature exceeds it (METHODS.md formula).
    t = np.linspace(0.0, 6.0, 41)
    f = frenet_frame(*_derivatives(_conical(), t), curvature_floor=0.5)
    kappa = np.sqrt(t**4 + 5 * t**2 + 8) / (t**2 + 2) ** 1.5
    assert (kappa > 0.5).any() and (kappa < 0.5).any()
    np.testing.assert_array_equal(np.isnan(f.torsion), kappa <= 0.5)
    tau = (t**2 + 6) / (t**4 + 5 * t**2 + 8)
    ok = kappa > 0.5
    np.testing.assert_allclose(f.torsion[ok], tau[ok], rtol=1e-12)
