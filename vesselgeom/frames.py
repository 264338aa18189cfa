"""Frenet-Serret frame, curvature and torsion from derivatives of a regular curve (pure array maths).

Conventions (do Carmo 1976, sec. 1-5): arc length s; T = dr/ds; curvature kappa = |dT/ds|;
N = (dT/ds) / kappa; B = T x N; torsion tau from dB/ds = -tau N. For any regular parametrisation u,

    kappa = |r' x r''| / |r'|^3,        tau = ((r' x r'') . r''') / |r' x r''|^2,

so a right-handed helix has tau > 0, and both are unchanged when the direction of travel is reversed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Frame", "frenet_frame"]


@dataclass(frozen=True)
class Frame:
    """Per-point differential geometry of a curve.

    Attributes
    ----------
    tangent, normal, binormal : (n, 3) float arrays
        Unit vectors T, N, B = T x N. N and B are NaN where curvature is below the floor.
    curvature : (n,) float array, 1/mm
    torsion : (n,) float array, 1/mm
        NaN where curvature is below the floor (torsion is undefined on straight stretches).
    """

    tangent: np.ndarray
    normal: np.ndarray
    binormal: np.ndarray
    curvature: np.ndarray
    torsion: np.ndarray


def _rowdot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.einsum("ij,ij->i", a, b)


def frenet_frame(d1: np.ndarray, d2: np.ndarray, d3: np.ndarray, *, curvature_floor: float = 0.0) -> Frame:
    """Frenet-Serret frame, curvature and torsion from the first three derivatives.

    Parameters
    ----------
    d1, d2, d3 : (n, 3) float arrays
        r', r'', r''' with respect to any regular parameter (mm per unit parameter, etc.).
    curvature_floor : float, 1/mm
        Below this curvature the normal, binormal and torsion are set to NaN.

    Returns
    -------
    Frame

    References
    ----------
    M. P. do Carmo, Differential Geometry of Curves and Surfaces, Prentice-Hall 1976, sec. 1-5.

    Examples
    --------
    Helix (a cos t, a sin t, b t) with a = 10, b = 2: kappa = a / (a^2 + b^2), tau = b / (a^2 + b^2).

    >>> t = np.array([0.3])
    >>> a, b = 10.0, 2.0
    >>> d1 = np.array([[-a * np.sin(t[0]), a * np.cos(t[0]), b]])
    >>> d2 = np.array([[-a * np.cos(t[0]), -a * np.sin(t[0]), 0.0]])
    >>> d3 = np.array([[a * np.sin(t[0]), -a * np.cos(t[0]), 0.0]])
    >>> f = frenet_frame(d1, d2, d3)
    >>> round(float(f.curvature[0]), 7), round(float(f.torsion[0]), 7)
    (0.0961538, 0.0192308)
    """
    d1 = np.asarray(d1, float)
    d2 = np.asarray(d2, float)
    d3 = np.asarray(d3, float)
    speed = np.linalg.norm(d1, axis=1)
    tangent = d1 / speed[:, None]
    c = np.cross(d1, d2)
    cnorm = np.linalg.norm(c, axis=1)
    curvature = cnorm / speed**3
    defined = (curvature > curvature_floor) & (cnorm > 0)
    safe = np.where(defined, cnorm, 1.0)
    binormal = np.where(defined[:, None], c / safe[:, None], np.nan)
    normal = np.cross(binormal, tangent)
    torsion = np.where(defined, _rowdot(c, d3) / safe**2, np.nan)
    return Frame(tangent, normal, binormal, curvature, torsion)
