"""Load a NIfTI-1 or NIfTI-2 mask (``.nii`` / ``.nii.gz``) as a :class:`~vesselgeom.io.Volume`.

nibabel does the reading; this module turns everything that can go wrong with a file into a
one-line :class:`~vesselgeom.errors.InputError` that starts with the path, converts the affine to
mm, and records recoverable header problems as warnings.
"""

from __future__ import annotations

import hashlib
import os
import zlib
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np
from nibabel.filebasedimages import ImageFileError
from nibabel.spatialimages import HeaderDataError, ImageDataError

from vesselgeom.errors import AffineError, InputError
from vesselgeom.io.affine import _affine_problem, affine_from_spacing, check_spacing
from vesselgeom.io.volume import Volume, _build_volume, _squeeze_shape

__all__ = ["load_nifti", "open_nifti", "file_sha256"]

#: NIfTI spatial unit label (nibabel) -> (Volume.input_units, factor to mm).
_UNITS_TO_MM = {
    "mm": ("mm", 1.0),
    "micron": ("um", 1e-3),
    "meter": ("m", 1e3),
    "unknown": ("unknown", 1.0),
}

#: What nibabel, gzip and the OS raise on unreadable, damaged or truncated files.
_READ_ERRORS = (
    ImageFileError,
    HeaderDataError,
    ImageDataError,
    OSError,
    EOFError,
    zlib.error,
    ValueError,
    MemoryError,
)

_CHUNK = 1 << 20  # 1 MiB


def _reason(exc: BaseException) -> str:
    """Short, single-line description of an exception."""
    text = str(exc).strip().splitlines()
    first = text[0] if text else ""
    if len(first) > 160:
        first = first[:157] + "..."
    return f"{type(exc).__name__}: {first}" if first else type(exc).__name__


def file_sha256(path: str | os.PathLike[str], *, source: str | None = None) -> str:
    """SHA-256 hex digest of a file's bytes, read in chunks (the input hash recorded in run.json)."""
    path = Path(path)
    source = str(path) if source is None else source
    digest = hashlib.sha256()
    try:
        with path.open("rb") as handle:
            while chunk := handle.read(_CHUNK):
                digest.update(chunk)
    except OSError as exc:
        raise InputError(f"{source}: cannot read the file ({_reason(exc)})") from exc
    return digest.hexdigest()


def _spatial_units(header: nib.Nifti1Header, *, source: str, found: list[str]) -> tuple[str, float]:
    """Declared spatial units and the factor that converts them to mm."""
    try:
        label = header.get_xyzt_units()[0]
    except KeyError:
        label = "invalid"
    if label not in _UNITS_TO_MM:
        found.append(f"{source}: spatial units code is invalid; assumed mm")
        label = "unknown"
    elif label == "unknown":
        found.append(f"{source}: spatial units unknown; assumed mm")
    return _UNITS_TO_MM[label]


def _world_affine(img: nib.Nifti1Image, factor: float, *, source: str, found: list[str]) -> np.ndarray:
    """The image affine in mm, or a diagonal one from the voxel sizes if it is unusable."""
    header = img.header
    affine = np.array(img.affine, dtype=np.float64)
    affine[:3, :] *= factor
    problem = _affine_problem(affine)
    if problem is None:
        if int(header["sform_code"]) == 0 and int(header["qform_code"]) == 0:
            found.append(
                f"{source}: header has no sform or qform (both codes 0); orientation unknown, "
                "used nibabel's default affine (x axis flipped), so left/right and the sign of "
                "torsion may be wrong"
            )
        return affine
    zooms = np.array(header.get_zooms()[:3], dtype=np.float64) * factor
    shown = "(" + ", ".join(f"{z:.6g}" for z in zooms) + ")"
    try:
        fallback = affine_from_spacing(check_spacing(zooms, source=source))
    except InputError:
        raise AffineError(
            f"{source}: header affine is unusable ({problem}) and the voxel sizes {shown} mm "
            "are invalid too; fix sform/qform and pixdim in the header"
        ) from None
    found.append(
        f"{source}: header affine is unusable ({problem}); used a diagonal affine from the "
        f"voxel sizes {shown} mm, so orientation is lost"
    )
    return fallback


def open_nifti(source: str) -> tuple[Any, tuple[int, int, int], str, np.ndarray, list[str]]:
    """Open a NIfTI file without reading its data: image, 3D shape, units, affine in mm, warnings.

    Shared by :func:`load_nifti` and lazy (chunked) reading, so both apply the same checks, units
    conversion and affine fall-back; every problem is an :class:`InputError` naming the file.
    """
    file = Path(source)
    if not file.exists():
        raise InputError(f"{source}: no such file; check the path")
    if file.is_dir():
        raise InputError(f"{source}: is a folder, not a NIfTI file; pass a .nii or .nii.gz file")
    try:
        img = nib.load(source)
    except _READ_ERRORS as exc:
        raise InputError(
            f"{source}: not a readable NIfTI file ({_reason(exc)}); pass a .nii or .nii.gz image"
        ) from exc
    if not isinstance(img, nib.Nifti1Image):  # Nifti2Image is a subclass
        raise InputError(
            f"{source}: not a single-file NIfTI image (nibabel read it as "
            f"{type(img).__name__}); convert it to .nii or .nii.gz"
        )
    shape = _squeeze_shape(tuple(int(n) for n in img.shape), source=source)
    found: list[str] = []
    input_units, factor = _spatial_units(img.header, source=source, found=found)
    affine = _world_affine(img, factor, source=source, found=found)
    return img, shape, input_units, affine, found


def load_nifti(
    path: str | os.PathLike[str],
    *,
    label: int | None = None,
    threshold: float | None = None,
) -> Volume:
    """Read a NIfTI-1 or NIfTI-2 mask and return it as a :class:`Volume` in mm.

    Parameters
    ----------
    path : str or path-like
        A single-file NIfTI image (``.nii``, ``.nii.gz``; any name nibabel recognises).
    label : int, optional
        Select voxels equal to this non-zero label (label maps).
    threshold : float, optional
        Select voxels ``>= threshold`` (probability maps). See
        :func:`~vesselgeom.io.volume.select_foreground` for all selection rules.

    Returns
    -------
    Volume
        ``affine`` is ``img.affine`` (sform, else qform, else nibabel's default) converted from
        the declared spatial units to mm; ``sha256`` is the digest of the file bytes; ``dtype_in``
        is the on-disk data type.

    Raises
    ------
    InputError
        One line starting with the path: missing file, a folder, not a readable single-file
        NIfTI (garbage, text, truncated or damaged), more than one volume, unusable affine *and*
        voxel sizes (:class:`~vesselgeom.errors.AffineError`), or a foreground-selection problem.

    Warns
    -----
    VesselgeomWarning
        Spatial units unknown (mm assumed); no sform/qform (orientation unknown); unusable
        affine replaced by voxel sizes. Each is also stored in ``Volume.warnings``.

    Notes
    -----
    Integer images are read with ``np.asanyarray(img.dataobj)``, never converted to float64.
    Scaled images (``scl_slope``) are selected on their scaled values.

    Examples
    --------
    >>> vol = load_nifti("mask.nii.gz", label=1)  # doctest: +SKIP
    >>> vol.spacing, vol.orientation  # doctest: +SKIP
    (array([0.5, 0.5, 0.8]), 'RAS')
    """
    source = os.fspath(path)
    img, shape, input_units, affine, found = open_nifti(source)
    try:
        data = np.asanyarray(img.dataobj)
    except _READ_ERRORS as exc:
        raise InputError(
            f"{source}: cannot read the image data ({_reason(exc)}); the file may be truncated or damaged"
        ) from exc
    return _build_volume(
        data.reshape(shape),
        affine,
        label=label,
        threshold=threshold,
        source=source,
        sha256=file_sha256(source),
        input_units=input_units,
        dtype_in=np.dtype(img.get_data_dtype()).name,
        warnings=found,
    )
