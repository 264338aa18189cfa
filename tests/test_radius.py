"""Tests for vesselgeom.radius.BoundaryDistance against scipy's Euclidean distance transform.

Independent references used below:
- :func:`scipy.ndimage.distance_transform_edt` with ``sampling=`` (exact Euclidean distance from each
  foreground voxel centre to the nearest background voxel centre, anisotropic voxels).
- :func:`nibabel.affines.apply_affine` for index -> world mm.
- Euclidean distances are invariant under rotations and reflections (orthogonal maps), so a rotated
  affine R diag(spacing) gives the same distances as diag(spacing).
- :func:`scipy.ndimage.binary_dilation` for the outer boundary voxels, and a default
  :class:`scipy.spatial.cKDTree` for nearest-neighbour distances.
"""

from __future__ import annotations

import numpy as np
import pytest
from nibabel.affines import apply_affine
from scipy import ndimage
from scipy.spatial import cKDTree

from vesselgeom import crosssection, radius
from vesselgeom.phantoms import random_rotation
from vesselgeom.radius import BoundaryDistance, _outer_boundary_slabs

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


@pytest.mark.parametrize("planes", [1, 2, 5, 16])
def test_outer_boundary_slabs_match_scipy_dilation(planes):
    # scipy reference: argwhere(binary_dilation(mask, 6-connected) & ~mask), in raster order, whatever
    # the slab size (with and without a background border, which takes the whole-array path)
    rng = np.random.default_rng(planes)
    for trial in range(12):
        shape = tuple(rng.integers(3, 25, 3))
        mask = ndimage.gaussian_filter(rng.normal(size=shape), 1.5) > rng.uniform(-0.1, 0.3)
        if trial % 3:
            mask[[0, -1]] = False
            mask[:, [0, -1]] = False
            mask[:, :, [0, -1]] = False
        six = ndimage.generate_binary_structure(3, 1)
        ref = np.argwhere(ndimage.binary_dilation(mask, structure=six) & ~mask)
        got = np.concatenate(list(_outer_boundary_slabs(mask, planes=planes)))
        np.testing.assert_array_equal(got, ref)


def test_tree_shape_and_threads_do_not_change_distances(monkeypatch):
    # scipy reference: a default cKDTree over the same boundary voxel centres (world mm) queried on one
    # thread; BoundaryDistance (other leaf size, threads) gives the same distances bit for bit
    mask = _blob(11, shape=(40, 36, 30))
    aff = _affine(random_rotation(11) @ np.diag(SPACING))
    rng = np.random.default_rng(11)
    pts = apply_affine(aff, np.argwhere(mask) + rng.uniform(-0.5, 0.5, (int(mask.sum()), 3)))
    six = ndimage.generate_binary_structure(3, 1)
    outer = np.argwhere(ndimage.binary_dilation(mask, structure=six) & ~mask).astype(float)
    ref, _ = cKDTree(outer @ aff[:3, :3].T + aff[:3, 3]).query(pts)
    monkeypatch.setattr(radius, "_PARALLEL_POINTS", 1)
    for threads in (1, 2, 3):
        monkeypatch.setattr(crosssection, "_THREADS", threads)
        np.testing.assert_array_equal(BoundaryDistance(mask, aff)(pts), ref)
