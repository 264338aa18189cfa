"""Tests for vesselgeom.radius.BoundaryDistance against scipy's Euclidean distance transform.

Independent references used below:
- :func:`scipy.ndimage.distance_transform_edt` with ``sampling=`` (exact Euclidean distance from each
  foreground voxel centre to the nearest background voxel centre, anisotropic voxels).
- :func:`nibabel.affines.apply_affine` for index -> world mm.
- Euclidean distances are invariant under rotations and reflections (orthogonal maps), so a rotated
  affine R diag(spacing) gives the same distances as diag(spacing).
"""

from __future__ import annotations

import numpy as np
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage

from vesselgeom.phantoms import random_rotation
from vesselgeom.radius import BoundaryDistance

SPACING = (0.7, 1.0, 1.6)


def _blob(seed: int, shape=(28, 24, 20)) -> np.ndarray:
    """A random smooth blob (thresholded Gaussian-filtered noise) with a one-voxel empty border."""
    rng = np.random.default_rng(seed)
    field = ndimage.gaussian_filter(rng.normal(size=shape), sigma=2.5)
    mask = field > 0.02
    mask[[0, -1], :, :] = False
    mask[:, [0, -1], :] = False
    mask[:, :, [0, -1]] = False
    return mask


def _affine(linear: np.ndarray, offset=(-12.0, 3.5, 40.0)) -> np.ndarray:
    aff = np.eye(4)
    aff[:3, :3] = linear
    aff[:3, 3] = offset
    return aff


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_matches_edt_axis_aligned_anisotropic(seed):
    # BoundaryDistance equals scipy's distance_transform_edt(mask, sampling=spacing) at every
    # foreground voxel centre, both from index points and from world points (nibabel apply_affine).
    mask = _blob(seed)
    assert 200 < mask.sum() < mask.size // 2
    edt = ndimage.distance_transform_edt(mask, sampling=SPACING)
    aff = _affine(np.diag(SPACING))
    bd = BoundaryDistance(mask, aff)
    ijk = np.argwhere(mask)
    np.testing.assert_allclose(bd.at_index(ijk), edt[mask], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(bd(apply_affine(aff, ijk)), edt[mask], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize(("seed", "flip"), [(3, False), (4, True), (5, True)])
def test_rotated_affine_same_distances(seed, flip):
    # Distances are invariant under an orthogonal map: with affine R diag(spacing) and the rotated
    # world points of the same voxels, the distances equal the axis-aligned EDT (scipy reference).
    mask = _blob(seed)
    edt = ndimage.distance_transform_edt(mask, sampling=SPACING)
    rot = random_rotation(seed, flip=flip)
    aff = _affine(rot @ np.diag(SPACING), offset=(5.0, -7.0, 2.0))
    bd = BoundaryDistance(mask, aff)
    ijk = np.argwhere(mask)
    np.testing.assert_allclose(bd(apply_affine(aff, ijk)), edt[mask], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(bd.at_index(ijk), edt[mask], rtol=1e-12, atol=1e-12)
    # and the same off-grid points give the same answer whichever grid orientation stores the mask
    rng = np.random.default_rng(seed)
    pts = ijk[rng.choice(len(ijk), 50, replace=False)] + rng.uniform(-0.5, 0.5, (50, 3))
    plain = BoundaryDistance(mask, _affine(np.diag(SPACING)))
    np.testing.assert_allclose(bd.at_index(pts), plain.at_index(pts), rtol=1e-12, atol=1e-12)


def test_docstring_cube():
    # A 5x5x5 cube in a 9^3 array, unit voxels: its centre is 3 voxels from the nearest outside
    # voxel centre (EDT of the centre voxel), scaled by the spacing along the nearest axis.
    m = np.zeros((9, 9, 9), bool)
    m[2:7, 2:7, 2:7] = True
    assert BoundaryDistance(m, np.eye(4)).at_index(np.array([[4, 4, 4]]))[0] == 3.0
    aff = _affine(np.diag([2.0, 0.5, 1.0]))
    ref = ndimage.distance_transform_edt(m, sampling=(2.0, 0.5, 1.0))[4, 4, 4]
    assert ref == 1.5
    assert BoundaryDistance(m, aff).at_index(np.array([4, 4, 4]))[0] == pytest.approx(ref)


def test_no_boundary_gives_nan():
    # Documented: NaN when the mask has no boundary (no background voxel at all).
    bd = BoundaryDistance(np.ones((4, 4, 4), bool), np.eye(4))
    assert np.isnan(bd(np.zeros((2, 3)))).all()


def test_boundary_distance_equals_scipy_edt_on_random_masks():
    # reference: scipy.ndimage.distance_transform_edt with sampling= gives the distance from each
    # foreground voxel centre to the nearest background voxel centre (anisotropic voxels too)
    rng = np.random.default_rng(7)
    for spacing in ((1.0, 1.0, 1.0), (0.5, 0.7, 1.2)):
        mask = np.pad(ndimage.binary_opening(rng.random((18, 19, 20)) > 0.35), 1)
        aff = np.diag([*spacing, 1.0])
        ijk = np.argwhere(mask)
        got = BoundaryDistance(mask, aff).at_index(ijk)
        ref = ndimage.distance_transform_edt(mask, sampling=spacing)[mask]
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-12)
