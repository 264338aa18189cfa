"""Tests for vesselgeom.io.volume: the Volume container and foreground selection rules.

Expected masks are built first and the images are generated from them, so every check compares
against a mask known before the code under test runs.
"""

import re

import numpy as np
import pytest

from vesselgeom.errors import AffineError, InputError, VesselgeomWarning
from vesselgeom.io.volume import Volume, select_foreground, volume_from_array

RNG_SEED = 7


def _truth(shape=(6, 7, 8), fraction=0.3, seed=RNG_SEED):
    return np.random.default_rng(seed).random(shape) < fraction


def _assert_one_line(exc_info, source="<array>"):
    message = str(exc_info.value)
    assert "\n" not in message
    assert message.startswith(f"{source}: ")


# --- volume_from_array -------------------------------------------------------------------------


def test_volume_from_array_with_spacing():
    truth = _truth()
    vol = volume_from_array(truth.astype(np.uint8), spacing=(0.5, 0.25, 2.0))
    np.testing.assert_array_equal(vol.mask, truth)
    assert vol.mask.dtype == np.bool_
    assert vol.shape == (6, 7, 8)
    np.testing.assert_allclose(vol.spacing, (0.5, 0.25, 2.0))
    assert vol.voxel_volume_mm3 == pytest.approx(0.25)  # 0.5 * 0.25 * 2.0
    np.testing.assert_array_equal(vol.affine, np.diag([0.5, 0.25, 2.0, 1.0]))
    assert vol.orientation == "RAS"
    assert vol.input_units == "mm"
    assert vol.dtype_in == "uint8"
    assert vol.source == "<array>"
    assert vol.warnings == ()
    assert re.fullmatch(r"[0-9a-f]{64}", vol.sha256)


def test_volume_from_array_with_affine_keeps_it():
    affine = np.array([[0.0, 0.0, -0.8, 10.0], [-0.5, 0.0, 0.0, 3.0], [0.0, 0.6, 0.0, -2.0], [0, 0, 0, 1]])
    vol = volume_from_array(_truth(), affine=affine, source="case7")
    np.testing.assert_array_equal(vol.affine, affine)
    np.testing.assert_allclose(vol.spacing, (0.5, 0.6, 0.8))  # column norms
    assert vol.orientation == "PSL"  # i -> -y, j -> +z, k -> -x (RAS+ convention)
    assert vol.source == "case7"


def test_volume_without_geometry_warns_and_records():
    with pytest.warns(VesselgeomWarning, match="assumed 1 mm isotropic") as record:
        vol = volume_from_array(_truth())
    assert len(record) == 1
    assert vol.warnings == (str(record[0].message),)
    np.testing.assert_array_equal(vol.affine, np.eye(4))
    assert vol.input_units == "unknown"
    # the warning points at the caller (this file), not at vesselgeom internals
    assert record[0].filename == __file__


def test_affine_and_spacing_together_is_an_error():
    with pytest.raises(InputError, match="both affine and spacing") as exc_info:
        volume_from_array(_truth(), affine=np.eye(4), spacing=1.0)
    _assert_one_line(exc_info)


def test_bad_affine_and_bad_spacing_are_errors():
    with pytest.raises(AffineError):
        volume_from_array(_truth(), affine=np.diag([1.0, 0.0, 1.0, 1.0]), source="x.nii")
    with pytest.raises(InputError, match="spacing"):
        volume_from_array(_truth(), spacing=(1.0, -1.0, 1.0))


@pytest.mark.parametrize("shape", [(6, 7, 8, 1), (6, 7, 8, 1, 1)])
def test_trailing_singleton_axes_are_squeezed(shape):
    truth = _truth()
    vol = volume_from_array(truth.reshape(shape), spacing=1.0)
    assert vol.shape == (6, 7, 8)
    np.testing.assert_array_equal(vol.mask, truth)


@pytest.mark.parametrize(("shape", "ndim"), [((6, 7, 8, 2), 4), ((6, 7), 2), ((6,), 1), ((2, 6, 7, 8), 4)])
def test_non_3d_arrays_are_errors(shape, ndim):
    with pytest.raises(InputError, match=f"mask has {ndim} dimensions") as exc_info:
        volume_from_array(np.zeros(shape, dtype=np.uint8), spacing=1.0)
    assert "pass a 3D volume" in str(exc_info.value)
    _assert_one_line(exc_info)


def test_zero_size_array_is_an_error():
    with pytest.raises(InputError, match="no voxels"):
        volume_from_array(np.zeros((0, 4, 4), dtype=bool), spacing=1.0)


def test_empty_mask_is_not_an_error():
    # the pipeline turns an all-background mask into empty tables, so io must let it through
    vol = volume_from_array(np.zeros((3, 3, 3), dtype=np.uint8), spacing=1.0)
    assert not vol.mask.any()


def test_mask_is_read_only_and_does_not_alias_the_input():
    truth = _truth()
    given = truth.copy()
    vol = volume_from_array(given, spacing=1.0)
    assert not vol.mask.flags.writeable
    assert not vol.affine.flags.writeable
    given[:] = ~given  # the caller keeps changing its array
    np.testing.assert_array_equal(vol.mask, truth)
    assert given.flags.writeable  # the caller's array is still writable


def test_volume_is_frozen_and_compares_by_identity():
    vol = volume_from_array(_truth(), spacing=1.0)
    with pytest.raises(AttributeError):
        vol.source = "other"  # frozen dataclass
    twin = volume_from_array(_truth(), spacing=1.0)
    assert vol != twin  # eq=False: identity, because arrays have no single truth value
    assert vol.sha256 == twin.sha256


def test_sha256_depends_on_values_shape_dtype_and_affine():
    truth = _truth()
    base = volume_from_array(truth.astype(np.uint8), spacing=1.0).sha256
    flipped = truth.astype(np.uint8)
    flipped[0, 0, 0] ^= 1
    variants = {
        "value": volume_from_array(flipped, spacing=1.0).sha256,
        "dtype": volume_from_array(truth.astype(np.int16), spacing=1.0).sha256,
        "shape": volume_from_array(truth.astype(np.uint8).reshape(7, 6, 8), spacing=1.0).sha256,
        "affine": volume_from_array(truth.astype(np.uint8), spacing=1.5).sha256,
    }
    for name, digest in variants.items():
        assert digest != base, name
    # deterministic, and independent of memory layout (Fortran order holds the same values)
    again = volume_from_array(np.asfortranarray(truth.astype(np.uint8)), spacing=1.0).sha256
    assert again == base


def test_volume_constructor_validates_fields():
    with pytest.raises(InputError, match="3D bool array"):
        Volume(mask=np.zeros((2, 2, 2), dtype=np.uint8), affine=np.eye(4))
    with pytest.raises(InputError, match="3D bool array"):
        Volume(mask=np.zeros((2, 2), dtype=bool), affine=np.eye(4))
    with pytest.raises(InputError, match="input_units"):
        Volume(mask=np.zeros((2, 2, 2), dtype=bool), affine=np.eye(4), input_units="inch")
    with pytest.raises(AffineError):
        Volume(mask=np.zeros((2, 2, 2), dtype=bool), affine=np.zeros((4, 4)))


def test_repr_is_one_short_line():
    text = repr(volume_from_array(_truth(), spacing=(0.5, 0.5, 1.0), source="a.nii"))
    assert "\n" not in text
    assert "a.nii" in text and "(6, 7, 8)" in text


# --- select_foreground -------------------------------------------------------------------------


def test_bool_is_returned_as_is():
    truth = _truth()
    assert select_foreground(truth) is truth


@pytest.mark.parametrize("dtype", [np.uint8, np.int8, np.uint16, np.int16, np.int32, np.uint64])
def test_integer_default_is_nonzero(dtype):
    truth = _truth()
    image = np.where(truth, 3, 0).astype(dtype)
    np.testing.assert_array_equal(select_foreground(image), truth)


def test_integer_label_selects_that_label():
    rng = np.random.default_rng(RNG_SEED)
    labels = rng.choice([0, 1, 2, 7], size=(5, 6, 7))
    np.testing.assert_array_equal(select_foreground(labels.astype(np.uint16), label=7), labels == 7)
    np.testing.assert_array_equal(select_foreground(labels.astype(np.int32), label=np.int64(2)), labels == 2)


def test_negative_labels_work_on_signed_images():
    image = np.array([[[0, -3, 5]]], dtype=np.int16)
    np.testing.assert_array_equal(select_foreground(image, label=-3), [[[False, True, False]]])


def test_absent_label_lists_present_labels():
    image = np.array([[[0, 1, 2, 7]]], dtype=np.uint8)
    with pytest.raises(
        InputError, match=r"label 5 is not in the image \(labels present: 1, 2, 7\)"
    ) as exc_info:
        select_foreground(image, label=5, source="seg.nii.gz")
    _assert_one_line(exc_info, "seg.nii.gz")


def test_absent_label_list_is_capped_at_ten():
    image = np.arange(0, 15, dtype=np.int32).reshape(1, 3, 5)
    with pytest.raises(InputError) as exc_info:
        select_foreground(image, label=99)
    message = str(exc_info.value)
    assert "1, 2, 3, 4, 5, 6, 7, 8, 9, 10 ... (14 in total)" in message
    assert ", 11" not in message


def test_label_out_of_dtype_range_is_absent_not_overflow():
    with pytest.raises(InputError, match="label 300 is not in the image"):
        select_foreground(np.ones((2, 2, 2), dtype=np.uint8), label=300)


@pytest.mark.parametrize("label", [0, 1.5, "1", True])
def test_bad_label_values(label):
    with pytest.raises(InputError, match="label"):
        select_foreground(np.ones((2, 2, 2), dtype=np.uint8), label=label)


def test_threshold_on_integer_image():
    image = np.arange(27, dtype=np.uint8).reshape(3, 3, 3)
    np.testing.assert_array_equal(select_foreground(image, threshold=10), image >= 10)
    assert select_foreground(image, threshold=10).sum() == 17  # values 10..26


def test_label_and_threshold_together_is_an_error():
    with pytest.raises(InputError, match="both label and threshold") as exc_info:
        select_foreground(np.ones((2, 2, 2), dtype=np.uint8), label=1, threshold=0.5)
    _assert_one_line(exc_info)


@pytest.mark.parametrize("threshold", [np.nan, np.inf, "0.5", True])
def test_bad_threshold_values(threshold):
    with pytest.raises(InputError, match="threshold"):
        select_foreground(np.ones((2, 2, 2), dtype=np.float32), threshold=threshold)


@pytest.mark.parametrize("dtype", [np.float16, np.float32, np.float64])
def test_binary_float_with_nan_is_binary(dtype):
    truth = _truth()
    image = truth.astype(dtype)
    image[0, 0, :] = np.nan  # NaN voxels are background
    expected = truth.copy()
    expected[0, 0, :] = False
    np.testing.assert_array_equal(select_foreground(image), expected)


def test_float_non_binary_requires_threshold():
    image = np.random.default_rng(RNG_SEED).random((4, 4, 4)).astype(np.float32)
    with pytest.raises(InputError) as exc_info:
        select_foreground(image, source="prob.nii.gz")
    assert str(exc_info.value) == (
        "prob.nii.gz: float image with non-binary values; pass --threshold T (e.g. 0.5 for a probability map)"
    )


def test_float_threshold_is_inclusive_and_nan_is_background():
    image = np.array([[[0.1, 0.5, 0.49999, 0.9, np.nan, 1.0]]])
    expected = np.array([[[False, True, False, True, False, True]]])  # x >= 0.5
    np.testing.assert_array_equal(select_foreground(image, threshold=0.5), expected)


@pytest.mark.parametrize("threshold", [None, 0.5])
def test_all_nan_is_an_error(threshold):
    with pytest.raises(InputError, match="image is all NaN") as exc_info:
        select_foreground(np.full((3, 3, 3), np.nan, dtype=np.float32), threshold=threshold)
    _assert_one_line(exc_info)


def test_float_label_map():
    labels = np.random.default_rng(RNG_SEED).choice([0.0, 1.0, 4.0], size=(4, 5, 6))
    labels[0, 0, 0] = np.nan
    np.testing.assert_array_equal(select_foreground(labels, label=4), labels == 4.0)
    with pytest.raises(InputError, match=r"labels present: 1, 4\)"):
        select_foreground(labels, label=2)


def test_float_label_with_fractional_values_is_an_error():
    with pytest.raises(InputError, match="fractional values"):
        select_foreground(np.array([[[0.0, 0.5, 1.0]]]), label=1)


def test_bool_with_label_or_threshold_reads_as_zero_one():
    truth = _truth()
    np.testing.assert_array_equal(select_foreground(truth, label=1), truth)
    np.testing.assert_array_equal(select_foreground(truth, threshold=0.5), truth)
    with pytest.raises(InputError, match="labels present: 1"):
        select_foreground(truth, label=2)


@pytest.mark.parametrize("image", [np.ones((2, 2, 2), dtype=complex), np.array([[["a"]]])])
def test_unsupported_dtypes(image):
    with pytest.raises(InputError, match="not supported"):
        select_foreground(image)


def test_volume_from_array_passes_selection_options():
    prob = np.random.default_rng(RNG_SEED).random((5, 5, 5))
    vol = volume_from_array(prob, spacing=1.0, threshold=0.7)
    np.testing.assert_array_equal(vol.mask, prob >= 0.7)
    assert vol.dtype_in == "float64"
