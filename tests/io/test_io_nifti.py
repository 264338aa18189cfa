"""Tests for vesselgeom.io.nifti.load_nifti on tiny NIfTI files generated with nibabel."""

import gzip
import hashlib
import struct

import nibabel as nib
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from vesselgeom.errors import AffineError, InputError, VesselgeomWarning
from vesselgeom.io.affine import index_to_world
from vesselgeom.io.nifti import load_nifti

RNG_SEED = 11
SHAPE = (7, 8, 9)


def _truth(shape=SHAPE, seed=RNG_SEED):
    return np.random.default_rng(seed).random(shape) < 0.3


def _save(path, data, affine=None, *, units="mm", klass=nib.Nifti1Image, header=None):
    img = klass(data, np.eye(4) if affine is None and header is None else affine, header=header)
    if units is not None:
        img.header.set_xyzt_units(xyz=units)
    nib.save(img, path)
    return path


def _assert_error(exc_info, path):
    """Errors are single lines that start with the path."""
    message = str(exc_info.value)
    assert "\n" not in message
    assert message.startswith(f"{path}: ")


# --- round trips -------------------------------------------------------------------------------


@pytest.mark.parametrize("klass", [nib.Nifti1Image, nib.Nifti2Image])
@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_round_trip_nifti1_nifti2_plain_and_gzip(tmp_path, klass, suffix):
    truth = _truth()
    affine = np.diag([0.5, 0.6, 0.8, 1.0])
    affine[:3, 3] = (-10.0, 4.0, 2.5)
    path = _save(tmp_path / f"mask{suffix}", truth.astype(np.uint8), affine, klass=klass)
    vol = load_nifti(path)
    np.testing.assert_array_equal(vol.mask, truth)
    np.testing.assert_allclose(vol.affine, affine, rtol=0, atol=1e-6)  # sform is float32 in NIfTI-1
    np.testing.assert_allclose(vol.spacing, (0.5, 0.6, 0.8), rtol=1e-6)
    assert vol.source == str(path)
    assert vol.input_units == "mm"
    assert vol.dtype_in == "uint8"
    assert vol.warnings == ()
    # reference: hashlib over the whole file read at once
    assert vol.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert isinstance(nib.load(path), klass)


def test_rotated_flipped_affine_gives_world_coordinates_by_hand(tmp_path):
    # Affine assembled by hand from a scipy Rotation, a flip of the j axis and anisotropic voxels.
    rotation = Rotation.from_euler("zyx", [35.0, -15.0, 60.0], degrees=True).as_matrix()
    spacing = np.array([0.4, 0.5, 0.9])
    flip = np.array([1.0, -1.0, 1.0])
    translation = np.array([12.0, -30.0, 45.0])
    affine = np.eye(4)
    affine[:3, :3] = rotation @ np.diag(spacing * flip)
    affine[:3, 3] = translation
    truth = _truth()
    path = _save(tmp_path / "rot.nii.gz", truth.astype(np.uint8), affine, klass=nib.Nifti2Image)

    vol = load_nifti(path)
    ijk = np.argwhere(vol.mask).astype(float)
    # independent: x = R (ijk * spacing * flip) + t with the scipy matrix, not the loaded affine
    expected = (ijk * spacing * flip) @ rotation.T + translation
    np.testing.assert_allclose(index_to_world(vol.affine, ijk), expected, rtol=0, atol=1e-9)
    np.testing.assert_allclose(vol.spacing, spacing, rtol=1e-12)
    assert np.linalg.det(vol.affine[:3, :3]) < 0  # the flip survives loading (handedness)


def test_nifti1_sform_precision_is_float32(tmp_path):
    # NIfTI-1 stores srow_* as float32: world coordinates agree with the hand-built affine to
    # float32 precision (~1e-7 relative), which bounds the error at 1e-5 mm for 100 mm offsets.
    rotation = Rotation.from_euler("xyz", [10.0, 20.0, 30.0], degrees=True).as_matrix()
    affine = np.eye(4)
    affine[:3, :3] = rotation @ np.diag([0.3, 0.3, 0.7])
    affine[:3, 3] = (100.0, -80.0, 60.0)
    path = _save(tmp_path / "n1.nii", _truth().astype(np.uint8), affine)
    vol = load_nifti(path)
    ijk = np.array([[0.0, 0.0, 0.0], [6.0, 7.0, 8.0]])
    expected = ijk @ affine[:3, :3].T + affine[:3, 3]
    np.testing.assert_allclose(index_to_world(vol.affine, ijk), expected, rtol=0, atol=1e-5)


def test_path_like_and_uppercase_extension(tmp_path):
    truth = _truth()
    path = _save(tmp_path / "MASK.NII.GZ", truth.astype(np.uint8))
    vol = load_nifti(str(path))
    np.testing.assert_array_equal(vol.mask, truth)
    assert vol.source == str(path)


def test_single_volume_4d_is_squeezed(tmp_path):
    truth = _truth()
    path = _save(tmp_path / "t1.nii.gz", truth.astype(np.uint8)[..., None])
    vol = load_nifti(path)
    assert vol.shape == SHAPE
    np.testing.assert_array_equal(vol.mask, truth)


# --- units -------------------------------------------------------------------------------------


def test_micron_units_are_converted_to_mm(tmp_path):
    affine = np.diag([2.0, 2.0, 5.0, 1.0])  # um
    affine[:3, 3] = (100.0, 200.0, 300.0)  # um
    path = _save(tmp_path / "um.nii", _truth().astype(np.uint8), affine, units="micron")
    vol = load_nifti(path)
    expected = np.diag([0.002, 0.002, 0.005, 1.0])  # 1 um = 1e-3 mm (SI)
    expected[:3, 3] = (0.1, 0.2, 0.3)
    np.testing.assert_allclose(vol.affine, expected, rtol=1e-6, atol=0)
    assert vol.input_units == "um"
    assert vol.voxel_volume_mm3 == pytest.approx(2e-3 * 2e-3 * 5e-3, rel=1e-6)


def test_meter_units_are_converted_to_mm(tmp_path):
    affine = np.diag([1e-4, 1e-4, 2e-4, 1.0])  # m
    path = _save(tmp_path / "m.nii", _truth().astype(np.uint8), affine, units="meter")
    vol = load_nifti(path)
    np.testing.assert_allclose(vol.spacing, (0.1, 0.1, 0.2), rtol=1e-6)  # 1 m = 1e3 mm (SI)
    assert vol.input_units == "m"


def test_unknown_units_warn_and_assume_mm(tmp_path):
    path = _save(tmp_path / "u.nii", _truth().astype(np.uint8), np.diag([0.7, 0.7, 0.7, 1.0]), units=None)
    assert nib.load(path).header.get_xyzt_units()[0] == "unknown"  # nibabel's default
    with pytest.warns(VesselgeomWarning, match="spatial units unknown; assumed mm") as record:
        vol = load_nifti(path)
    assert len(record) == 1
    assert vol.warnings == (str(record[0].message),)
    assert vol.warnings[0].startswith(str(path))
    assert vol.input_units == "unknown"
    np.testing.assert_allclose(vol.spacing, (0.7, 0.7, 0.7), rtol=1e-6)
    assert record[0].filename == __file__  # points at the caller


# --- data types and selection ------------------------------------------------------------------


def test_label_map(tmp_path):
    labels = np.random.default_rng(RNG_SEED).choice([0, 1, 2, 7], size=SHAPE).astype(np.uint16)
    path = _save(tmp_path / "labels.nii.gz", labels)
    np.testing.assert_array_equal(load_nifti(path, label=7).mask, labels == 7)
    np.testing.assert_array_equal(load_nifti(path).mask, labels != 0)
    with pytest.raises(
        InputError, match=r"label 5 is not in the image \(labels present: 1, 2, 7\)"
    ) as exc_info:
        load_nifti(path, label=5)
    _assert_error(exc_info, path)
    assert load_nifti(path).dtype_in == "uint16"


def test_probability_map_needs_threshold(tmp_path):
    prob = np.random.default_rng(RNG_SEED).random(SHAPE).astype(np.float32)
    prob[0, 0, 0] = np.nan
    path = _save(tmp_path / "prob.nii.gz", prob)
    with pytest.raises(InputError) as exc_info:
        load_nifti(path)
    assert str(exc_info.value) == (
        f"{path}: float image with non-binary values; pass --threshold T (e.g. 0.5 for a probability map)"
    )
    vol = load_nifti(path, threshold=0.5)
    np.testing.assert_array_equal(vol.mask, prob >= 0.5)  # NaN >= 0.5 is False (IEEE 754)
    assert not vol.mask[0, 0, 0]
    assert vol.dtype_in == "float32"


def test_scaled_integer_image_is_selected_on_scaled_values(tmp_path):
    # NIfTI-1 standard: value = scl_slope * stored + scl_inter. A slope of 0.25 is exact in the
    # float32 header field, so stored 0..4 become exactly 0, 0.25, 0.5, 0.75, 1.0.
    stored = np.random.default_rng(RNG_SEED).integers(0, 5, size=SHAPE).astype(np.int16)
    img = nib.Nifti1Image(stored, np.eye(4))
    img.header.set_xyzt_units(xyz="mm")
    img.header.set_slope_inter(0.25, 0.0)
    path = tmp_path / "scaled.nii"
    nib.save(img, path)
    with pytest.raises(InputError, match="non-binary values"):  # 0.25 and 0.75 are present
        load_nifti(path)
    vol = load_nifti(path, threshold=0.5)
    np.testing.assert_array_equal(vol.mask, stored >= 2)  # 0.25 * 2 = 0.5 >= 0.5
    assert vol.dtype_in == "int16"


def test_integer_images_are_not_read_as_float(tmp_path, monkeypatch):
    # the loader must use dataobj; get_fdata would make a float64 copy of the whole volume
    path = _save(tmp_path / "int.nii.gz", _truth().astype(np.uint8))

    def _forbidden(*args, **kwargs):
        raise AssertionError("get_fdata must not be used")

    monkeypatch.setattr(nib.Nifti1Image, "get_fdata", _forbidden)
    assert load_nifti(path).mask.sum() == _truth().sum()


def test_all_nan_image_is_an_error(tmp_path):
    path = _save(tmp_path / "nan.nii", np.full(SHAPE, np.nan, dtype=np.float32))
    with pytest.raises(InputError, match="image is all NaN") as exc_info:
        load_nifti(path, threshold=0.5)
    _assert_error(exc_info, path)


def test_multi_volume_4d_is_an_error(tmp_path):
    path = _save(tmp_path / "series.nii.gz", np.zeros((*SHAPE, 3), dtype=np.uint8))
    with pytest.raises(InputError, match="mask has 4 dimensions") as exc_info:
        load_nifti(path)
    assert "3 volumes" in str(exc_info.value)
    _assert_error(exc_info, path)


# --- header problems ---------------------------------------------------------------------------


def _header_with_sform(srow, zooms=(0.5, 0.6, 0.7), shape=SHAPE):
    header = nib.Nifti1Header()
    header.set_data_shape(shape)
    header.set_data_dtype(np.uint8)
    header.set_zooms(zooms)
    header.set_xyzt_units("mm")
    for name, row in zip(("srow_x", "srow_y", "srow_z"), srow, strict=True):
        header[name] = row
    header["sform_code"] = 1
    header["qform_code"] = 0
    return header


def test_singular_sform_falls_back_to_zooms_with_warning(tmp_path):
    truth = _truth()
    header = _header_with_sform([[0, 0, 0, 1], [0, 0, 0, 2], [0, 0, 0, 3]])
    path = tmp_path / "singular.nii"
    nib.save(nib.Nifti1Image(truth.astype(np.uint8), None, header=header), path)
    assert np.linalg.det(nib.load(path).affine[:3, :3]) == 0  # nibabel hands us the bad sform
    with pytest.warns(VesselgeomWarning, match="header affine is unusable") as record:
        vol = load_nifti(path)
    assert len(record) == 1
    np.testing.assert_allclose(vol.affine, np.diag([0.5, 0.6, 0.7, 1.0]), rtol=1e-6)
    assert vol.warnings == (str(record[0].message),)
    assert "orientation is lost" in vol.warnings[0]
    np.testing.assert_array_equal(vol.mask, truth)


def test_bad_sform_and_bad_zooms_is_an_error(tmp_path):
    header = _header_with_sform([[np.nan, 0, 0, 1], [0, 1, 0, 2], [0, 0, 1, 3]])
    path = tmp_path / "hopeless.nii"
    nib.save(nib.Nifti1Image(_truth().astype(np.uint8), None, header=header), path)
    raw = bytearray(path.read_bytes())
    raw[80:84] = struct.pack("<f", np.nan)  # pixdim[1] (NIfTI-1 header: pixdim at byte 76)
    path.write_bytes(bytes(raw))
    with pytest.raises(AffineError, match="voxel sizes") as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)


def test_no_sform_no_qform_warns_about_orientation(tmp_path):
    header = nib.Nifti1Header()
    header.set_data_shape(SHAPE)
    header.set_data_dtype(np.uint8)
    header.set_zooms((1.0, 2.0, 3.0))
    header.set_xyzt_units("mm")
    path = tmp_path / "nocode.nii"
    nib.save(nib.Nifti1Image(_truth().astype(np.uint8), None, header=header), path)
    assert nib.load(path).header["sform_code"] == 0 and nib.load(path).header["qform_code"] == 0
    with pytest.warns(VesselgeomWarning, match="no sform or qform"):
        vol = load_nifti(path)
    # nibabel's fallback (Nifti1Header.get_base_affine) flips x; the spacing is still right
    np.testing.assert_allclose(vol.spacing, (1.0, 2.0, 3.0))
    assert vol.orientation == "LAS"


# --- unreadable inputs -------------------------------------------------------------------------


def _valid_gzip_bytes(tmp_path):
    # random voxels do not compress, so half of the file still holds the full 352-byte header
    data = np.random.default_rng(RNG_SEED).integers(0, 255, size=(20, 20, 20)).astype(np.uint8)
    path = _save(tmp_path / "full.nii.gz", data)
    return path.read_bytes()


@pytest.mark.parametrize(
    ("name", "make"),
    [
        ("garbage.nii", lambda tmp: np.random.default_rng(1).bytes(2000)),
        ("garbage.nii.gz", lambda tmp: np.random.default_rng(2).bytes(2000)),
        ("notes.nii", lambda tmp: b"this is a text file, not an image\n" * 40),
        ("empty.nii", lambda tmp: b""),
        ("plain_named_gz.nii.gz", lambda tmp: b"\x00" * 400),
        ("gzipped_text.nii.gz", lambda tmp: gzip.compress(b"hello\n" * 100)),
        (
            "truncated.nii.gz",
            lambda tmp: _valid_gzip_bytes(tmp)[: len(_valid_gzip_bytes(tmp)) // 2],
        ),
        ("truncated_tail.nii.gz", lambda tmp: _valid_gzip_bytes(tmp)[:-20]),
        (
            "header_only.nii",
            lambda tmp: _save(tmp / "src.nii", _truth().astype(np.uint8)).read_bytes()[:360],
        ),
    ],
)
def test_unreadable_files_raise_one_line_input_errors(tmp_path, name, make):
    path = tmp_path / name
    path.write_bytes(make(tmp_path))
    with pytest.raises(InputError) as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)
    assert exc_info.type is InputError


def test_failed_load_emits_no_warnings(tmp_path):
    # units unknown would warn, but the data are truncated: only the error must come out
    # (pytest turns a VesselgeomWarning into an exception, so a warning would fail this test)
    data = np.random.default_rng(RNG_SEED).integers(0, 255, size=(20, 20, 20)).astype(np.uint8)
    full = _save(tmp_path / "full.nii.gz", data, units=None).read_bytes()
    path = tmp_path / "cut.nii.gz"
    path.write_bytes(full[: len(full) // 2])
    with pytest.raises(InputError, match="truncated or damaged") as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)


def test_missing_path(tmp_path):
    path = tmp_path / "nope" / "missing.nii.gz"
    with pytest.raises(InputError, match="no such file") as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)


def test_directory(tmp_path):
    path = tmp_path / "folder.nii.gz"
    path.mkdir()
    with pytest.raises(InputError, match="is a folder") as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)


def test_other_nibabel_format_is_rejected(tmp_path):
    path = tmp_path / "mask.mgz"
    nib.save(nib.MGHImage(_truth().astype(np.uint8), np.eye(4)), path)
    with pytest.raises(InputError, match="not a single-file NIfTI image") as exc_info:
        load_nifti(path)
    _assert_error(exc_info, path)
