"""Tests for vesselgeom.labelling against scipy's whole-array reference operations.

References: :func:`scipy.ndimage.label` (26-connected foreground, full 3x3x3 structure) and
:func:`scipy.ndimage.binary_fill_holes` (background 6-connected to the array's faces is outside; the rest
is filled), each run on the whole array at once. The slab versions must agree exactly for any slab size,
so each case is run with one-plane slabs (every plane a seam), a few planes, and a single slab.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from vesselgeom.labelling import enclosed_background, fill_holes, label_foreground


def _masks():
    rng = np.random.default_rng(7)
    out = {f"random{i}": rng.random(tuple(rng.integers(3, 18, 3))) < rng.uniform(0.2, 0.8) for i in range(12)}
    z, y, x = np.mgrid[:30, :30, :30]
    r = np.sqrt((z - 15) ** 2 + (y - 15) ** 2 + (x - 15) ** 2)
    out["nested shells"] = ((r < 12) & (r > 9)) | ((r < 6) & (r > 4)) | (r < 2)
    diag = np.zeros((12, 12, 12), bool)
    diag[np.arange(12), np.arange(12), np.arange(12)] = True  # joined only through 26-neighbours
    out["diagonal"] = diag
    out["empty"] = np.zeros((4, 5, 6), bool)
    out["full"] = np.ones((4, 5, 6), bool)
    return out


def _slab_sizes(shape):
    plane = shape[1] * shape[2]
    return [1, 3 * plane, None]


@pytest.mark.parametrize("name", list(_masks()))
def test_foreground_labels_equal_scipy_label(name):
    mask = _masks()[name]
    ref, n_ref = ndimage.label(mask, structure=np.ones((3, 3, 3)))
    for slab in _slab_sizes(mask.shape):
        flat, labels, n = label_foreground(mask, slab_voxels=slab)
        assert n == n_ref
        np.testing.assert_array_equal(flat, np.flatnonzero(ref))
        np.testing.assert_array_equal(labels, ref.ravel()[flat])  # same numbering (raster order)


@pytest.mark.parametrize("name", list(_masks()))
def test_enclosed_background_equals_fill_holes(name):
    mask = _masks()[name]
    filled = ndimage.binary_fill_holes(mask) & ~mask
    regions, n_regions = ndimage.label(filled)  # 6-connected, scipy's default structure
    for slab in _slab_sizes(mask.shape):
        ijk, region = enclosed_background(mask, slab_voxels=slab)
        np.testing.assert_array_equal(ijk, np.argwhere(filled))
        # the same partition into regions: each scipy region maps to exactly one of ours and back
        ref = regions[tuple(ijk.T)] if len(ijk) else np.zeros(0, int)
        pairs = set(zip(ref.tolist(), region.tolist(), strict=True))
        assert len(pairs) == n_regions == len(set(region.tolist()))


def test_nested_shells_have_their_regions():
    # by construction: background between the outer and middle shells, and between the middle shell and
    # the core ball; everything beyond the outer shell reaches the faces
    ijk, region = enclosed_background(_masks()["nested shells"], slab_voxels=30)
    assert len(set(region.tolist())) == 2


@pytest.mark.parametrize("name", list(_masks()))
def test_fill_holes_equals_scipy(name):
    # reference: scipy.ndimage.binary_fill_holes (6-connected background from the array's faces)
    mask = _masks()[name]
    for slab in _slab_sizes(mask.shape):
        got = fill_holes(mask, slab_voxels=slab)
        np.testing.assert_array_equal(got, ndimage.binary_fill_holes(mask))
        assert got is not mask
