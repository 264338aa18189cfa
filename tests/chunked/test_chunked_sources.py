"""Lazy inputs: OME-Zarr 0.4 and 0.5 metadata, plain Zarr with a voxel size, NIfTI via nibabel's proxy.

OME-Zarr metadata is written by hand following the NGFF 0.4 and 0.5 specifications ("multiscales",
"axes" and "coordinateTransformations" sections); the expected voxel sizes follow from their definitions
(world = scale * index + translation, in the axis unit) and the SI prefixes (1 micrometre = 1e-3 mm).
NIfTI reference values come from nibabel itself (``get_fdata``, ``img.affine``); foreground rules are
checked against ``vesselgeom.io.select_foreground`` on the whole array.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from vesselgeom.errors import InputError, VesselgeomWarning
from vesselgeom.io import select_foreground

zarr = pytest.importorskip("zarr")
pytest.importorskip("dask")

from vesselgeom.chunked.sources import open_lazy  # noqa: E402

RNG = np.random.default_rng(5)
SHAPE = (12, 10, 8)


def _data():
    return (RNG.random(SHAPE) < 0.3).astype(np.uint8) * 2


def _ome(path, data, *, version, unit="micrometer", scale=(2.0, 0.5, 0.25), translation=None):
    """An OME-Zarr image with axes (z, y, x) and one dataset "0", metadata written by hand."""
    fmt = 2 if version == "0.4" else 3
    group = zarr.open_group(str(path), mode="w", zarr_format=fmt)
    arr = group.create_array("0", shape=data.shape, chunks=(5, 5, 5), dtype=data.dtype)
    arr[:] = data
    axes = [{"name": n, "type": "space", **({"unit": unit} if unit else {})} for n in "zyx"]
    transforms = [{"type": "scale", "scale": list(scale)}]
    if translation is not None:
        transforms.append({"type": "translation", "translation": list(translation)})
    ms = {"axes": axes, "datasets": [{"path": "0", "coordinateTransformations": transforms}], "name": "m"}
    if version == "0.4":
        ms["version"] = "0.4"
        meta = path / ".zattrs"
        meta.write_text(json.dumps({"multiscales": [ms]}))
    else:
        meta = path / "zarr.json"
        doc = json.loads(meta.read_text())
        doc["attributes"] = {"ome": {"version": "0.5", "multiscales": [ms]}}
        meta.write_text(json.dumps(doc))
    return path


@pytest.mark.parametrize("version", ["0.4", "0.5"])
def test_ome_zarr_micrometre_scale_and_axis_names(tmp_path, version):
    data = _data()
    path = _ome(tmp_path / "img.zarr", data, version=version, translation=(10.0, 0.0, 4.0))
    vol = open_lazy(path)
    assert vol.shape == SHAPE
    assert vol.kind == f"ome-zarr {version}"
    assert vol.input_units == "um"
    # NGFF: world = scale * index + translation, in micrometres; axis z is array axis 0, so the
    # world x column comes from array axis 2 (0.25 um = 2.5e-4 mm) and z from axis 0 (2 um)
    expected = np.zeros((4, 4))
    expected[0, 2], expected[1, 1], expected[2, 0], expected[3, 3] = 0.25e-3, 0.5e-3, 2e-3, 1.0
    expected[:3, 3] = [4e-3, 0.0, 10e-3]
    np.testing.assert_allclose(vol.affine, expected, rtol=1e-12, atol=1e-15)
    box = (slice(1, 9), slice(2, 7), slice(0, 8))
    np.testing.assert_array_equal(vol.read(box), data[box] != 0)


def test_ome_zarr_missing_unit_warns_and_assumes_mm(tmp_path):
    path = _ome(tmp_path / "img.zarr", _data(), version="0.5", unit=None, scale=(1.0, 1.0, 0.5))
    with pytest.warns(VesselgeomWarning, match="no unit"):
        vol = open_lazy(path)
    assert vol.input_units == "unknown"
    # no unit: the scale is read as mm (NGFF leaves the unit optional; we state the assumption)
    np.testing.assert_allclose(sorted(np.abs(vol.affine[:3, :3]).sum(axis=0)), [0.5, 1.0, 1.0])


def test_ome_zarr_nanometre_and_refuses_spacing(tmp_path):
    path = _ome(tmp_path / "img.zarr", _data(), version="0.4", unit="nanometer", scale=(100, 100, 100))
    vol = open_lazy(path)
    # 100 nm = 1e-4 mm (SI prefixes)
    np.testing.assert_allclose(np.linalg.norm(vol.affine[:3, :3], axis=0), [1e-4] * 3)
    with pytest.raises(InputError, match="carries its own voxel size"):
        open_lazy(path, spacing=1.0)


def test_plain_zarr_with_spacing(tmp_path):
    data = RNG.random(SHAPE).astype(np.float32)
    arr = zarr.create_array(str(tmp_path / "p.zarr"), shape=SHAPE, chunks=(4, 4, 4), dtype="float32")
    arr[:] = data
    with pytest.raises(InputError, match="pass spacing"):
        open_lazy(tmp_path / "p.zarr")
    vol = open_lazy(tmp_path / "p.zarr", spacing=(0.5, 0.5, 2.0), threshold=0.5)
    np.testing.assert_allclose(vol.affine, np.diag([0.5, 0.5, 2.0, 1.0]))
    box = (slice(0, 12), slice(3, 10), slice(2, 5))
    np.testing.assert_array_equal(vol.read(box), select_foreground(data[box], threshold=0.5))


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_nifti_read_lazily_through_the_proxy(tmp_path, suffix):
    data = RNG.integers(0, 4, size=SHAPE).astype(np.int16)
    affine = np.array([[0, 0, -0.8, 5], [0.5, 0, 0, -3], [0, 0.6, 0, 1], [0, 0, 0, 1.0]])
    img = nib.Nifti1Image(data, affine)
    img.header.set_xyzt_units(xyz="mm")
    path = tmp_path / f"m{suffix}"
    nib.save(img, path)
    vol = open_lazy(path, label=3)
    ref = nib.load(path)
    np.testing.assert_allclose(vol.affine, ref.affine)  # nibabel's own affine (sform)
    assert type(vol.data).__name__ == "ArrayProxy"  # never np.asarray of the whole image
    box = (slice(2, 9), slice(0, 4), slice(5, 8))
    np.testing.assert_array_equal(vol.read(box), ref.get_fdata()[box] == 3)


def test_box_outside_the_image_is_background():
    data = np.ones((4, 4, 4), bool)
    vol = open_lazy(data, spacing=1.0)
    box = vol.read_box(np.array([-2, 0, 0]), np.array([3, 4, 6]))
    assert box.shape == (5, 4, 6)
    # rows -2, -1 and columns 4, 5 are outside: background, as the pipeline pads components
    assert not box[:2].any() and not box[:, :, 4:].any() and box[2:, :, :4].all()


@pytest.mark.parametrize(
    "image,options",
    [
        (RNG.integers(0, 3, size=SHAPE), {"label": 2}),
        (RNG.integers(0, 3, size=SHAPE), {}),
        (RNG.random(SHAPE), {"threshold": 0.4}),
        (RNG.integers(0, 2, size=SHAPE).astype(float), {}),
        (RNG.random(SHAPE) < 0.5, {}),
    ],
)
def test_foreground_rules_match_select_foreground(image, options):
    vol = open_lazy(image, spacing=1.0, **options)
    box = (slice(0, 12), slice(0, 10), slice(0, 8))
    np.testing.assert_array_equal(vol.read(box), select_foreground(image, **options))


def test_non_binary_float_without_threshold_is_refused():
    vol = open_lazy(RNG.random(SHAPE), spacing=1.0)
    with pytest.raises(InputError, match="pass --threshold"):
        vol.read((slice(0, 4), slice(0, 4), slice(0, 4)))
