"""Tests for vesselgeom.io.affine against linear algebra done by hand and scipy's Rotation."""

import re

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vesselgeom.errors import AffineError, InputError
from vesselgeom.io.affine import (
    affine_from_spacing,
    check_spacing,
    index_to_world,
    orientation,
    validate_affine,
    voxel_sizes,
    voxel_volume,
    world_to_index,
)

RNG_SEED = 20240611


def _rotated_affine(angles_deg, spacing, translation, *, flip=(1.0, 1.0, 1.0)):
    """Affine built by hand: world = R @ diag(spacing) @ diag(flip) @ ijk + t.

    R comes from scipy.spatial.transform.Rotation (an independent reference implementation).
    """
    rotation = Rotation.from_euler("zyx", angles_deg, degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rotation @ np.diag(spacing) @ np.diag(flip)
    affine[:3, 3] = translation
    return affine, rotation


def _assert_one_line(exc_info, source):
    message = str(exc_info.value)
    assert "\n" not in message
    assert message.startswith(f"{source}: ")


# --- validate_affine ---------------------------------------------------------------------------


def test_validate_affine_returns_float64_copy():
    given = np.diag([2, 3, 4, 1])  # integer input
    out = validate_affine(given)
    assert out.dtype == np.float64
    assert out.shape == (4, 4)
    np.testing.assert_array_equal(out, np.diag([2.0, 3.0, 4.0, 1.0]))
    out[0, 0] = 99.0
    assert given[0, 0] == 2  # a copy, not a view


@pytest.mark.parametrize(
    ("affine", "fragment"),
    [
        (np.eye(3), "shape (3, 3)"),
        (np.eye(5), "shape (5, 5)"),
        (np.diag([1.0, np.nan, 1.0, 1.0]), "NaN or infinite"),
        (np.diag([1.0, 1.0, np.inf, 1.0]), "NaN or infinite"),
        (np.array([[1, 0, 0, 0], [0, 1, 0, 0], [0, 0, 1, 0], [0, 0, 0.5, 1.0]]), "last row"),
        (np.diag([1.0, 0.0, 1.0, 1.0]), "singular"),  # a zero column: det = 0
        (np.diag([1.0, 1.0, 1e-9, 1.0]), "ill-conditioned"),  # condition number 1e9 > 1e8
        (np.diag([1e-7, 1e-7, 1e-7, 1.0]), "singular"),  # det = 1e-21 mm^3 < 1e-18 (1 nm voxel)
        ("not an affine", "not a numeric array"),
    ],
)
def test_validate_affine_rejects(affine, fragment):
    with pytest.raises(AffineError, match=re.escape(fragment)) as exc_info:
        validate_affine(affine, source="scan.nii.gz")
    _assert_one_line(exc_info, "scan.nii.gz")


def test_affine_error_is_an_input_error_and_value_error():
    # errors.py: AffineError(InputError(ValueError)) so callers can catch either
    with pytest.raises(ValueError):
        validate_affine(np.zeros((4, 4)))
    with pytest.raises(InputError, match="^<array>: "):
        validate_affine(np.zeros((4, 4)))


def test_validate_affine_accepts_microscopy_voxels_in_mm():
    # 0.1 um voxels = 1e-4 mm: det 1e-12 mm^3 is well above the 1 nm floor
    out = validate_affine(np.diag([1e-4, 1e-4, 1e-4, 1.0]))
    assert out[0, 0] == pytest.approx(1e-4)


# --- voxel sizes, volume, orientation ----------------------------------------------------------


def test_voxel_sizes_and_volume_of_rotated_flipped_affine():
    spacing = (0.4, 0.55, 1.3)
    affine, _ = _rotated_affine([30.0, -20.0, 75.0], spacing, [5.0, -3.0, 11.0], flip=(-1, 1, 1))
    # Textbook: a rotation preserves column lengths, so the column norms are the spacings,
    # and |det(R S F)| = |det R| |det S| |det F| = 1 * prod(spacing) * 1.
    np.testing.assert_allclose(voxel_sizes(affine), spacing, rtol=1e-12)
    assert voxel_volume(affine) == pytest.approx(0.4 * 0.55 * 1.3, rel=1e-12)
    assert voxel_sizes(affine).shape == (3,)


@pytest.mark.parametrize(
    ("columns", "codes"),
    [
        # Each column is the world direction of voxel axis i, j, k; codes by the NIfTI/RAS+
        # convention (+x = Right, +y = Anterior, +z = Superior).
        (np.eye(3), "RAS"),
        (np.diag([-1.0, -1.0, 1.0]), "LPS"),
        (np.diag([1.0, 1.0, -1.0]), "RAI"),
        (np.array([[0.0, 0.0, -1.0], [-1.0, 0.0, 0.0], [0.0, 1.0, 0.0]]), "PSL"),
    ],
)
def test_orientation_codes(columns, codes):
    affine = np.eye(4)
    affine[:3, :3] = columns * 0.7
    assert orientation(affine) == codes


# --- spacing -----------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("spacing", "expected"),
    [
        (0.5, (0.5, 0.5, 0.5)),
        (2, (2.0, 2.0, 2.0)),
        ((0.5, 0.6, 0.7), (0.5, 0.6, 0.7)),
        (np.array([1.0, 2.0, 3.0], dtype=np.float32), (1.0, 2.0, 3.0)),
        (np.float64(0.25), (0.25, 0.25, 0.25)),
    ],
)
def test_check_spacing_normalises(spacing, expected):
    out = check_spacing(spacing)
    assert isinstance(out, tuple)
    assert all(isinstance(v, float) for v in out)
    np.testing.assert_allclose(out, expected)


@pytest.mark.parametrize(
    "spacing",
    [
        0.0,
        -1.0,
        np.nan,
        np.inf,
        (1.0, 1.0),
        (1.0, 1.0, 1.0, 1.0),
        (1.0, 0.0, 1.0),
        (1.0, np.nan, 1.0),
        [[1.0, 1.0, 1.0]],
        True,
        "1.0",
        ("a", "b", "c"),
    ],
)
def test_check_spacing_rejects(spacing):
    with pytest.raises(InputError, match="spacing") as exc_info:
        check_spacing(spacing, source="vol.nii")
    _assert_one_line(exc_info, "vol.nii")


def test_affine_from_spacing_is_diagonal():
    np.testing.assert_array_equal(affine_from_spacing((0.5, 0.6, 2.0)), np.diag([0.5, 0.6, 2.0, 1]))
    np.testing.assert_array_equal(affine_from_spacing(3.0), np.diag([3.0, 3.0, 3.0, 1.0]))
    with pytest.raises(InputError):
        affine_from_spacing(-1.0)


# --- index <-> world ---------------------------------------------------------------------------


def test_index_to_world_matches_hand_computation_with_rotation_and_flip():
    spacing = np.array([0.3, 0.5, 1.2])
    translation = np.array([-12.0, 40.0, 7.5])
    affine, rotation = _rotated_affine([40.0, 10.0, -65.0], spacing, translation, flip=(1, -1, 1))
    ijk = np.random.default_rng(RNG_SEED).uniform(0, 50, size=(200, 3))
    # Independent computation: x = R (S F ijk) + t, written out with the scipy rotation matrix
    # rather than the assembled affine, and never as ijk * spacing.
    scaled = ijk * spacing * np.array([1.0, -1.0, 1.0])
    expected = scaled @ rotation.T + translation
    world = index_to_world(affine, ijk)
    assert world.shape == (200, 3)
    np.testing.assert_allclose(world, expected, rtol=0, atol=1e-10)
    # The flip makes the map orientation-reversing: det < 0 (textbook: det of a reflection is -1)
    assert np.linalg.det(affine[:3, :3]) < 0
    # ... and it really is different from index * spacing
    assert not np.allclose(world, ijk * spacing)


def test_world_to_index_inverts_index_to_world():
    affine, _ = _rotated_affine([5.0, 80.0, -30.0], (0.2, 0.2, 0.9), (1.0, 2.0, 3.0))
    ijk = np.random.default_rng(RNG_SEED + 1).uniform(-5, 60, size=(50, 3))
    back = world_to_index(affine, index_to_world(affine, ijk))
    np.testing.assert_allclose(back, ijk, rtol=0, atol=1e-9)
    # world_to_index returns continuous indices, not rounded ones
    assert not np.allclose(back, np.round(back))


def test_index_to_world_single_point_and_origin():
    affine = np.diag([2.0, 3.0, 4.0, 1.0])
    affine[:3, 3] = (10.0, 20.0, 30.0)
    # voxel (0, 0, 0) lands on the translation column (definition of the affine)
    np.testing.assert_array_equal(index_to_world(affine, [0, 0, 0]), [10.0, 20.0, 30.0])
    np.testing.assert_array_equal(index_to_world(affine, [[1, 1, 1]]), [[12.0, 23.0, 34.0]])


@pytest.mark.parametrize("points", [np.zeros((4, 2)), np.zeros(5), 3.0, [["a", "b", "c"]]])
def test_point_conversions_reject_bad_shapes(points):
    with pytest.raises(InputError):
        index_to_world(np.eye(4), points)
    with pytest.raises(InputError):
        world_to_index(np.eye(4), points)


def test_point_conversions_validate_the_affine():
    with pytest.raises(AffineError):
        index_to_world(np.diag([1.0, 0.0, 1.0, 1.0]), np.zeros((1, 3)))
    with pytest.raises(AffineError):
        world_to_index(np.full((4, 4), np.nan), np.zeros((1, 3)))
