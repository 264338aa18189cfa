"""Tests for vesselgeom.crosssection.CrossSection: mask sampling and cross-section centroids.

Independent references used below:
- :func:`scipy.ndimage.map_coordinates` (order 1, constant 0 outside) for trilinear mask values.
- A straight cylinder of radius R: every cross-section normal to its axis is a disc of area pi R^2
  centred on the axis (elementary geometry).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from vesselgeom import crosssection
from vesselgeom.crosssection import CrossSection, normal_basis
from vesselgeom.phantoms import random_rotation


def _cylinder(radius: float, spacing=(0.8, 1.0, 0.9), rotation_seed: int = 0):
    """A voxelised cylinder along a rotated axis through the array centre; returns mask, affine, axis."""
    shape = (40, 44, 42)
    aff = np.eye(4)
    aff[:3, :3] = random_rotation(rotation_seed) @ np.diag(spacing)
    aff[:3, 3] = (-3.0, 5.0, 1.0)
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), axis=-1).reshape(-1, 3)
    world = ijk @ aff[:3, :3].T + aff[:3, 3]
    centre = (np.array(shape) - 1) / 2 @ aff[:3, :3].T + aff[:3, 3]
    axis = np.array([1.0, 2.0, 2.5]) / np.linalg.norm([1.0, 2.0, 2.5])
    rel = world - centre
    dist = np.linalg.norm(rel - np.outer(rel @ axis, axis), axis=1)
    mask = (dist <= radius).reshape(shape)
    mask[[0, -1]] = mask[:, [0, -1]] = mask[:, :, [0, -1]] = False
    return mask, aff, centre, axis


def test_sample_matches_map_coordinates_on_threads(monkeypatch):
    # scipy reference: map_coordinates(mask, index coordinates, order=1, mode="constant") as float32
    # (to float32 rounding: the reference maps world to index coordinates by its own inverse); split
    # among threads the values are the same bits as on one thread
    mask, aff, centre, _axis = _cylinder(6.0)
    rng = np.random.default_rng(0)
    pts = centre + rng.uniform(-25, 25, (5000, 3))
    ijk = (pts - aff[:3, 3]) @ np.linalg.inv(aff[:3, :3]).T
    ref = ndimage.map_coordinates(mask.astype(np.uint8), ijk.T, order=1, mode="constant", output=np.float32)
    assert 0 < (ref > 0.5).sum() < len(ref)
    section = CrossSection(mask, aff)
    monkeypatch.setattr(crosssection, "_THREADS", 1)
    one = section.sample(pts)
    np.testing.assert_allclose(one, ref, rtol=0, atol=1e-6)
    monkeypatch.setattr(crosssection, "_PARALLEL_SAMPLES", 1)
    for threads in (2, 3):
        monkeypatch.setattr(crosssection, "_THREADS", threads)
        got = section.sample(pts.reshape(50, 100, 3))
        assert got.shape == (50, 100) and got.dtype == np.float32
        np.testing.assert_array_equal(got.ravel(), one)


@pytest.mark.parametrize("radius", [2.5, 5.0])
def test_centroid_of_cylinder_section_is_on_axis(radius):
    # elementary geometry: the section normal to the axis is a disc centred on it, of area pi R^2;
    # centres moved off the axis by up to 1 mm are brought back to it
    mask, aff, centre, axis = _cylinder(radius, rotation_seed=int(radius))
    rng = np.random.default_rng(1)
    along = centre + np.outer(rng.uniform(-8, 8, 40), axis)
    e1, e2 = normal_basis(np.tile(axis, (40, 1)))
    off = rng.uniform(-1, 1, (40, 1)) * e1 + rng.uniform(-1, 1, (40, 1)) * e2
    moved, area_r = CrossSection(mask, aff).centroids(
        along + off, np.tile(axis, (40, 1)), np.full(40, 2 * radius)
    )
    # to a sixth of a voxel (0.8-1 mm): the voxelised surface is not a perfect circle
    np.testing.assert_allclose(moved, along, atol=0.15)
    np.testing.assert_allclose(area_r, radius, rtol=0.05)
    assert np.linalg.norm(moved - along, axis=1).max() < 0.25 * np.linalg.norm(off, axis=1).max()


@pytest.mark.parametrize("side", [17, 20])
def test_centroids_independent_of_chunks_and_threads(monkeypatch, side):
    # reference: one disc at a time on one thread; any chunking and thread count give the same bits.
    # 20 samples per side: grid steps of 2/19 are not exact binary fractions, so sums round and a BLAS
    # product's row-position-dependent rounding would show (the default 17 hides it: steps of 1/8)
    mask, aff, centre, axis = _cylinder(4.0, rotation_seed=3)
    rng = np.random.default_rng(2)
    n = 300
    centres = centre + np.outer(rng.uniform(-10, 10, n), axis) + rng.uniform(-1.5, 1.5, (n, 3))
    tangents = axis + rng.uniform(-0.3, 0.3, (n, 3))
    tangents /= np.linalg.norm(tangents, axis=1, keepdims=True)
    radii = rng.uniform(2.0, 9.0, n)
    section = CrossSection(mask, aff, samples_per_side=side)
    monkeypatch.setattr(crosssection, "_THREADS", 1)
    ref = [section.centroids(centres[i : i + 1], tangents[i : i + 1], radii[i : i + 1]) for i in range(n)]
    ref_c = np.concatenate([r[0] for r in ref])
    ref_a = np.concatenate([r[1] for r in ref])
    monkeypatch.setattr(crosssection, "_PARALLEL_SAMPLES", 1)
    for threads, chunk in ((1, 7), (2, 64), (3, 1024), (2, 1)):
        monkeypatch.setattr(crosssection, "_THREADS", threads)
        got_c, got_a = section.centroids(centres, tangents, radii, chunk=chunk)
        np.testing.assert_array_equal(got_c, ref_c)
        np.testing.assert_array_equal(got_a, ref_a)


def test_single_threaded_is_per_thread_and_changes_no_result(monkeypatch):
    # reference: the standard library's threading semantics (a threading.local value is seen only by the
    # thread that set it), and the same centroids computed on several threads
    import threading

    monkeypatch.setattr(crosssection, "_THREADS", 3)
    monkeypatch.setattr(crosssection, "_PARALLEL_SAMPLES", 1)
    mask, aff, centre, axis = _cylinder(3.0, rotation_seed=1)
    rng = np.random.default_rng(5)
    centres = centre + np.outer(rng.uniform(-8, 8, 200), axis)
    tangents = np.tile(axis, (200, 1))
    radii = rng.uniform(3.0, 6.0, 200)
    section = CrossSection(mask, aff)
    many = section.centroids(centres, tangents, radii, chunk=16)
    seen = []
    with crosssection.single_threaded():
        assert crosssection._threads() == 1
        other = threading.Thread(target=lambda: seen.append(crosssection._threads()))
        other.start()
        other.join()
        one = section.centroids(centres, tangents, radii, chunk=16)
    assert seen == [3] and crosssection._threads() == 3
    np.testing.assert_array_equal(one[0], many[0])
    np.testing.assert_array_equal(one[1], many[1])
