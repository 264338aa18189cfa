"""Small pure functions on 4 x 4 voxel-to-world affines.

An affine maps voxel indices ``(i, j, k)`` to world coordinates ``(x, y, z)`` in mm::

    [x, y, z, 1]^T = affine @ [i, j, k, 1]^T

Every function here takes the affine first and validates it with :func:`validate_affine`, so a
non-finite or non-invertible affine fails the same way wherever it is used. The maths is delegated
to :mod:`nibabel.affines` and :mod:`nibabel.orientations`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from numbers import Real

import numpy as np
from nibabel.affines import apply_affine
from nibabel.affines import voxel_sizes as _nib_voxel_sizes
from nibabel.orientations import aff2axcodes

from vesselgeom.errors import AffineError, InputError

__all__ = [
    "MAX_CONDITION",
    "MIN_ABS_DET",
    "validate_affine",
    "check_spacing",
    "voxel_sizes",
    "voxel_volume",
    "orientation",
    "affine_from_spacing",
    "index_to_world",
    "world_to_index",
]

#: Largest accepted condition number of the 3 x 3 linear part (ratio of largest to smallest
#: singular value). Beyond this, mapping world points back to indices loses about half of the
#: float64 digits, and a real scanner never produces such a skewed voxel.
MAX_CONDITION = 1e8

#: Smallest accepted ``|det|`` of the 3 x 3 part, mm^3: a voxel of 1 nm edge (1e-6 mm). Anything
#: smaller is a header with zeroed or unit-less scales, not an image.
MIN_ABS_DET = 1e-18

_BOTTOM_ROW = np.array([0.0, 0.0, 0.0, 1.0])


def validate_affine(affine: np.ndarray | Sequence, *, source: str = "<array>") -> np.ndarray:
    """Check a voxel-to-world affine and return a float64 copy.

    Parameters
    ----------
    affine : (4, 4) array-like, mm
        Maps voxel indices ``(i, j, k)`` to world ``(x, y, z)`` in mm.
    source : str
        File path or ``"<array>"``, used to start the error message.

    Returns
    -------
    (4, 4) float64 array
        A new array; the input is never modified.

    Raises
    ------
    AffineError
        If the affine is not numeric, not 4 x 4, not finite, its last row is not ``[0, 0, 0, 1]``,
        or its 3 x 3 part is singular (``|det| <= MIN_ABS_DET``) or ill-conditioned
        (condition number ``> MAX_CONDITION``).

    Examples
    --------
    >>> validate_affine(np.diag([0.5, 0.5, 2.0, 1.0])).dtype
    dtype('float64')
    """
    try:
        out = np.array(affine, dtype=np.float64, copy=True)
    except (TypeError, ValueError):
        raise AffineError(f"{source}: affine is not a numeric array; pass a 4x4 float array in mm") from None
    problem = _affine_problem(out)
    if problem is not None:
        raise AffineError(f"{source}: {problem}; {_AFFINE_HINT}")
    return out


_AFFINE_HINT = "fix the sform/qform of the file or pass a valid 4x4 affine in mm"


def _affine_problem(affine: np.ndarray) -> str | None:
    """Describe what is wrong with a float64 array meant as an affine, or None if it is fine."""
    if affine.shape != (4, 4):
        return f"affine has shape {affine.shape}, expected (4, 4)"
    if not np.all(np.isfinite(affine)):
        return "affine contains NaN or infinite values"
    if not np.array_equal(affine[3], _BOTTOM_ROW):
        return f"affine last row is {affine[3].tolist()}, expected [0, 0, 0, 1]"
    linear = affine[:3, :3]
    det = float(np.linalg.det(linear))
    singular_values = np.linalg.svd(linear, compute_uv=False)
    smallest = singular_values[-1]
    cond = math.inf if smallest == 0 else float(singular_values[0] / smallest)
    if abs(det) <= MIN_ABS_DET or cond > MAX_CONDITION:
        return (
            f"affine 3x3 part is singular or ill-conditioned "
            f"(det={det:.3g} mm^3, condition number={cond:.3g})"
        )
    return None


def check_spacing(
    spacing: float | Sequence[float] | np.ndarray, *, source: str = "<array>"
) -> tuple[float, float, float]:
    """Normalise a voxel spacing to three positive finite floats.

    Parameters
    ----------
    spacing : float or (3,) array-like, mm
        Voxel size along axes i, j, k. A scalar means isotropic voxels.
    source : str
        File path or ``"<array>"``, used to start the error message.

    Returns
    -------
    tuple of 3 float, mm

    Raises
    ------
    InputError
        If the spacing is not numeric, not a scalar or length 3, not finite, or not positive.

    Examples
    --------
    >>> check_spacing(0.5)
    (0.5, 0.5, 0.5)
    """
    if isinstance(spacing, bool | np.bool_) or isinstance(spacing, str | bytes):
        raise InputError(
            f"{source}: spacing {spacing!r} is not a number; "
            "pass voxel sizes in mm, e.g. 0.5 or (0.5, 0.5, 1.0)"
        )
    if isinstance(spacing, Real):
        values = np.full(3, float(spacing))
    else:
        try:
            values = np.asarray(spacing, dtype=np.float64)
        except (TypeError, ValueError):
            raise InputError(
                f"{source}: spacing {spacing!r} is not numeric; pass voxel sizes in mm, e.g. (0.5, 0.5, 1.0)"
            ) from None
        if values.ndim == 0:
            values = np.full(3, float(values))
        if values.shape != (3,):
            raise InputError(
                f"{source}: spacing has shape {values.shape}, expected a scalar or 3 values; "
                "pass one voxel size per axis in mm"
            )
    if not np.all(np.isfinite(values)) or not np.all(values > 0):
        raise InputError(
            f"{source}: spacing {values.tolist()} must be finite and positive; pass voxel sizes in mm"
        )
    return (float(values[0]), float(values[1]), float(values[2]))


def voxel_sizes(affine: np.ndarray) -> np.ndarray:
    """Voxel edge lengths along the i, j, k axes.

    Parameters
    ----------
    affine : (4, 4) array-like, mm

    Returns
    -------
    (3,) float64 array, mm
        Euclidean norms of the columns of the 3 x 3 part (what nibabel calls ``voxel_sizes``).
    """
    return np.asarray(_nib_voxel_sizes(validate_affine(affine)), dtype=np.float64)


def voxel_volume(affine: np.ndarray) -> float:
    """Volume of one voxel, ``|det(affine[:3, :3])|``, in mm^3 (exact also for sheared voxels)."""
    return float(abs(np.linalg.det(validate_affine(affine)[:3, :3])))


def orientation(affine: np.ndarray) -> str:
    """Axis codes of the voxel axes, e.g. ``"RAS"`` or ``"LPI"``.

    Each letter is the world direction (R/L, A/P, S/I) closest to the positive direction of voxel
    axis i, j and k respectively, as given by :func:`nibabel.orientations.aff2axcodes`.
    """
    return "".join(aff2axcodes(validate_affine(affine)))


def affine_from_spacing(spacing: float | Sequence[float] | np.ndarray) -> np.ndarray:
    """Diagonal affine ``diag(sx, sy, sz, 1)`` for axis-aligned voxels at the origin.

    Parameters
    ----------
    spacing : float or (3,) array-like, mm

    Returns
    -------
    (4, 4) float64 array, mm
    """
    return np.diag([*check_spacing(spacing), 1.0])


def _as_points(points: np.ndarray | Sequence, *, name: str) -> np.ndarray:
    try:
        arr = np.asarray(points, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"<array>: {name} is not numeric; pass an (N, 3) float array") from None
    if arr.ndim == 0 or arr.shape[-1] != 3:
        raise InputError(f"<array>: {name} has shape {arr.shape}, expected (N, 3); pass one row per point")
    return arr


def index_to_world(affine: np.ndarray, ijk: np.ndarray | Sequence) -> np.ndarray:
    """Map voxel indices to world coordinates through the full affine.

    Parameters
    ----------
    affine : (4, 4) array-like, mm
    ijk : (N, 3) array-like
        Voxel indices (may be fractional). Any shape ``(..., 3)`` is accepted.

    Returns
    -------
    (N, 3) float64 array, mm
        Rotation, flips, shear and anisotropy are all applied; this is never ``ijk * spacing``.

    Examples
    --------
    >>> index_to_world(np.diag([2.0, 2.0, 2.0, 1.0]), [[1, 2, 3]])
    array([[2., 4., 6.]])
    """
    return apply_affine(validate_affine(affine), _as_points(ijk, name="ijk"))


def world_to_index(affine: np.ndarray, xyz: np.ndarray | Sequence) -> np.ndarray:
    """Map world coordinates to continuous (not rounded) voxel indices.

    Parameters
    ----------
    affine : (4, 4) array-like, mm
    xyz : (N, 3) array-like, mm
        Any shape ``(..., 3)`` is accepted.

    Returns
    -------
    (N, 3) float64 array
        Fractional voxel indices; round them yourself if you need voxel centres.
    """
    inverse = np.linalg.inv(validate_affine(affine))
    return apply_affine(inverse, _as_points(xyz, name="xyz"))
