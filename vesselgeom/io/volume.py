"""The in-memory mask every loader returns, and the rules that turn an image into a mask.

A :class:`Volume` is a 3D boolean mask plus its voxel-to-world affine in mm and what is needed for
provenance (source, hash, units, warnings). Loaders (NIfTI files, in-memory arrays) differ only in
how they obtain the image, the affine and the hash; dimension checks and foreground selection are
shared here so that a file and the same array give the same mask.
"""

from __future__ import annotations

import hashlib
import warnings as _warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from numbers import Integral, Real

import numpy as np

from vesselgeom.errors import InputError, VesselgeomWarning
from vesselgeom.io.affine import (
    affine_from_spacing,
    check_spacing,
    orientation,
    validate_affine,
    voxel_sizes,
    voxel_volume,
)

__all__ = ["INPUT_UNITS", "Volume", "volume_from_array", "select_foreground"]

#: Spatial units an input may declare; the affine of a :class:`Volume` is always in mm.
INPUT_UNITS = ("mm", "um", "m", "unknown")

_MAX_LISTED_LABELS = 10


@dataclass(frozen=True, eq=False, repr=False)
class Volume:
    """A 3D binary vessel mask with its voxel-to-world affine in mm.

    Attributes
    ----------
    mask : (I, J, K) bool array
        Foreground voxels; read-only.
    affine : (4, 4) float64 array, mm
        Voxel index ``(i, j, k)`` to world ``(x, y, z)`` in mm; read-only.
    source : str
        File path as given, or ``"<array>"``.
    sha256 : str
        Hex digest of the file bytes, or of the input array (dtype, shape, bytes) and affine.
    input_units : str
        Spatial units the input declared: one of ``"mm"``, ``"um"``, ``"m"``, ``"unknown"``.
        The affine has already been converted to mm.
    warnings : tuple of str
        Recoverable problems found while loading (each was also emitted as VesselgeomWarning).
    dtype_in : str
        Data type of the input image before foreground selection (on-disk type for files).

    Notes
    -----
    Equality and hashing are by identity (``eq=False``): arrays have no single truth value.
    Compare ``sha256`` and ``np.array_equal(a.mask, b.mask)`` instead.
    """

    mask: np.ndarray
    affine: np.ndarray
    source: str = "<array>"
    sha256: str = ""
    input_units: str = "mm"
    warnings: tuple[str, ...] = field(default=())
    dtype_in: str = "bool"

    def __post_init__(self) -> None:
        mask = self.mask
        if not isinstance(mask, np.ndarray) or mask.dtype != np.bool_ or mask.ndim != 3:
            got = (
                f"{mask.dtype} array of shape {mask.shape}"
                if isinstance(mask, np.ndarray)
                else type(mask).__name__
            )
            raise InputError(
                f"{self.source}: Volume.mask must be a 3D bool array, got {got}; use volume_from_array"
            )
        if self.input_units not in INPUT_UNITS:
            raise InputError(f"{self.source}: input_units {self.input_units!r} is not one of {INPUT_UNITS}")
        mask = mask.view()
        mask.flags.writeable = False
        affine = validate_affine(self.affine, source=self.source)
        affine.flags.writeable = False
        object.__setattr__(self, "mask", mask)
        object.__setattr__(self, "affine", affine)
        object.__setattr__(self, "warnings", tuple(str(w) for w in self.warnings))

    @property
    def spacing(self) -> np.ndarray:
        """(3,) float array, mm: voxel edge lengths along i, j, k (column norms of the affine)."""
        return voxel_sizes(self.affine)

    @property
    def shape(self) -> tuple[int, int, int]:
        """Number of voxels along i, j, k."""
        i, j, k = self.mask.shape
        return (int(i), int(j), int(k))

    @property
    def orientation(self) -> str:
        """Axis codes such as ``"RAS"`` (see :func:`vesselgeom.io.affine.orientation`)."""
        return orientation(self.affine)

    @property
    def voxel_volume_mm3(self) -> float:
        """Volume of one voxel in mm^3."""
        return voxel_volume(self.affine)

    def __repr__(self) -> str:
        spacing = ", ".join(f"{s:.4g}" for s in self.spacing)
        return (
            f"Volume(source={self.source!r}, shape={self.shape}, spacing_mm=({spacing}), "
            f"orientation={self.orientation!r}, input_units={self.input_units!r}, "
            f"sha256={self.sha256[:12]!r}..., warnings={len(self.warnings)})"
        )


def _squeeze_shape(shape: tuple[int, ...], *, source: str) -> tuple[int, int, int]:
    """3D shape after dropping trailing singleton axes beyond the third; fail if not 3D."""
    squeezed = tuple(shape)
    while len(squeezed) > 3 and squeezed[-1] == 1:
        squeezed = squeezed[:-1]
    if len(squeezed) != 3:
        hint = "pass a 3D volume"
        if len(shape) > 3:
            volumes = int(np.prod(shape[3:]))
            hint += f" (this image holds {volumes} volumes; extract one first)"
        raise InputError(f"{source}: mask has {len(shape)} dimensions (shape {shape}); {hint}")
    if min(squeezed) == 0:
        raise InputError(f"{source}: mask has shape {squeezed} with no voxels; pass a non-empty 3D volume")
    return (int(squeezed[0]), int(squeezed[1]), int(squeezed[2]))


def _list_labels(values: np.ndarray) -> str:
    nonzero = values[values != 0]
    if nonzero.size == 0:
        return "the image has no non-zero labels"
    shown = ", ".join(str(v.item()) for v in nonzero[:_MAX_LISTED_LABELS])
    more = f" ... ({nonzero.size} in total)" if nonzero.size > _MAX_LISTED_LABELS else ""
    return f"labels present: {shown}{more}"


def _check_label(label: object, *, source: str) -> int:
    if isinstance(label, bool | np.bool_) or not isinstance(label, Integral):
        raise InputError(f"{source}: label {label!r} is not an integer; pass an integer label value")
    if int(label) == 0:
        raise InputError(f"{source}: label 0 is the background; pass a non-zero label value")
    return int(label)


def _check_threshold(threshold: object, *, source: str) -> float:
    if (
        isinstance(threshold, bool | np.bool_)
        or not isinstance(threshold, Real)
        or not np.isfinite(float(threshold))
    ):
        raise InputError(
            f"{source}: threshold {threshold!r} is not a finite number; pass e.g. --threshold 0.5"
        )
    return float(threshold)


def _select_label_int(array: np.ndarray, label: int, *, source: str, whole_image: bool) -> np.ndarray:
    info = np.iinfo(array.dtype)
    mask = array == label if info.min <= label <= info.max else np.zeros(array.shape, dtype=bool)
    if whole_image and not mask.any():
        raise InputError(
            f"{source}: label {label} is not in the image "
            f"({_list_labels(np.unique(array))}); pass one of those"
        )
    return mask


def _all_integral(array: np.ndarray) -> bool:
    """True if every non-NaN value is a finite whole number (one i-slice at a time: less memory)."""
    return all(
        bool(np.all(np.isnan(s) | (np.isfinite(s) & (np.floor(s) == s)))) for s in np.atleast_1d(array)
    )


def select_foreground(
    array: np.ndarray,
    *,
    label: int | None = None,
    threshold: float | None = None,
    source: str = "<array>",
    whole_image: bool = True,
) -> np.ndarray:
    """Turn an image into a boolean foreground mask.

    Parameters
    ----------
    array : ndarray of bool, integer or float
        The image (any shape; no dimension check here).
    label : int, optional
        Select voxels equal to this non-zero label (label maps). Not together with `threshold`.
    threshold : float, optional
        Select voxels ``>= threshold``; NaN voxels are background. Not together with `label`.
    source : str
        File path or ``"<array>"``, used to start error messages.
    whole_image : bool
        True (default) when `array` is the whole image. False for one block of a larger image
        (chunked processing): the two checks that need the whole image (the label occurs somewhere;
        a float image is not all NaN) are then left to the caller.

    Returns
    -------
    bool ndarray, same shape as `array`
        For a bool input without options this is `array` itself (no copy).

    Raises
    ------
    InputError
        `label` and `threshold` both given; `label` absent from the image (the message lists up
        to 10 labels present); a float image that is all NaN; a float image with values other than
        0 and 1 and no `threshold`; a float image with fractional values and a `label`;
        an unsupported dtype (complex, object, strings).

    Notes
    -----
    - bool: as is. With `label` or `threshold` it is read as integers 0/1.
    - integer: ``array == label`` if `label` is given, ``array >= threshold`` if `threshold` is
      given, else ``array != 0``.
    - float: ``array >= threshold`` if `threshold` is given; ``array == label`` if `label` is
      given and every value is whole (label maps saved as float); else the values must be only
      0 and 1 (NaN ignored) and the mask is ``array == 1``.

    Examples
    --------
    >>> select_foreground(np.array([0, 2, 3]), label=2)
    array([False,  True, False])
    """
    if label is not None and threshold is not None:
        raise InputError(
            f"{source}: both label and threshold given; pass only one "
            "(--label for label maps, --threshold for probability maps)"
        )
    if label is not None:
        label = _check_label(label, source=source)
    if threshold is not None:
        threshold = _check_threshold(threshold, source=source)
    array = np.asarray(array)
    kind = array.dtype.kind

    if kind == "b":
        if label is None and threshold is None:
            return array
        array, kind = array.view(np.uint8), "u"
    if kind in "iu":
        if label is not None:
            return _select_label_int(array, label, source=source, whole_image=whole_image)
        if threshold is not None:
            return array >= threshold
        return array != 0
    if kind == "f":
        nan = np.isnan(array)
        if whole_image and nan.all():
            raise InputError(f"{source}: image is all NaN; check that the file holds a segmentation")
        if threshold is not None:
            return array >= threshold  # NaN >= t is False: NaN voxels are background
        if label is not None:
            if not _all_integral(array):
                raise InputError(
                    f"{source}: label given but the float image has fractional values; "
                    "pass --threshold T instead"
                )
            mask = array == label
            if whole_image and not mask.any():
                present = np.unique(array[~nan]).astype(np.int64)
                raise InputError(
                    f"{source}: label {label} is not in the image "
                    f"({_list_labels(present)}); pass one of those"
                )
            return mask
        ones = array == 1
        if not np.all(ones | (array == 0) | nan):
            raise InputError(
                f"{source}: float image with non-binary values; "
                "pass --threshold T (e.g. 0.5 for a probability map)"
            )
        return ones
    raise InputError(
        f"{source}: image dtype {array.dtype} is not supported; pass a bool, integer or float image"
    )


def _array_sha256(array: np.ndarray, affine: np.ndarray) -> str:
    """sha256 over dtype, shape, C-order bytes (one i-slice at a time) and the float64 affine."""
    digest = hashlib.sha256()
    digest.update(f"dtype={array.dtype.str};shape={array.shape};".encode())
    for plane in array:
        digest.update(np.ascontiguousarray(plane).tobytes())
    digest.update(np.ascontiguousarray(affine, dtype="<f8").tobytes())
    return digest.hexdigest()


def _build_volume(
    image: np.ndarray,
    affine: np.ndarray,
    *,
    label: int | None,
    threshold: float | None,
    source: str,
    sha256: str,
    input_units: str,
    dtype_in: str,
    warnings: Sequence[str],
) -> Volume:
    """Shared tail of every loader: select the foreground of a 3D image and wrap it.

    `warnings` are emitted as VesselgeomWarning only once the Volume exists, so a load that fails
    later does not also print warnings. They point at the caller of the public loader, which
    must call this function directly.
    """
    mask = select_foreground(image, label=label, threshold=threshold, source=source)
    if np.may_share_memory(mask, image):
        mask = mask.copy()  # the Volume must not alias an array the caller can still modify
    volume = Volume(
        mask=mask,
        affine=affine,
        source=source,
        sha256=sha256,
        input_units=input_units,
        warnings=tuple(warnings),
        dtype_in=dtype_in,
    )
    for message in volume.warnings:
        # stack: warn <- _build_volume <- public loader <- user code
        _warnings.warn(message, VesselgeomWarning, stacklevel=3)
    return volume


def volume_from_array(
    array: np.ndarray,
    *,
    affine: np.ndarray | None = None,
    spacing: float | Sequence[float] | None = None,
    label: int | None = None,
    threshold: float | None = None,
    source: str = "<array>",
) -> Volume:
    """Wrap an in-memory image as a :class:`Volume`.

    Parameters
    ----------
    array : (I, J, K) array-like of bool, integer or float
        The image; ``(I, J, K, 1)`` is squeezed to 3D. The array is never modified.
    affine : (4, 4) array-like, mm, optional
        Voxel-to-world affine. Not together with `spacing`.
    spacing : float or (3,) array-like, mm, optional
        Voxel sizes for an axis-aligned grid at the origin. Not together with `affine`.
    label, threshold : optional
        Foreground selection, see :func:`select_foreground`.
    source : str
        Name used in messages and provenance.

    Returns
    -------
    Volume
        With neither `affine` nor `spacing`, the voxels are taken as 1 mm cubes, ``input_units``
        is ``"unknown"`` and a VesselgeomWarning is emitted and recorded.

    Raises
    ------
    InputError
        Both `affine` and `spacing`; not 3D; empty shape; bad spacing/affine; selection errors.
        An all-background mask is *not* an error.

    Examples
    --------
    >>> vol = volume_from_array(np.ones((2, 3, 4), dtype=np.uint8), spacing=(0.5, 0.5, 2.0))
    >>> vol.shape, vol.voxel_volume_mm3
    ((2, 3, 4), 0.5)
    """
    if affine is not None and spacing is not None:
        raise InputError(f"{source}: both affine and spacing given; pass only one")
    image = np.asarray(array)
    image = image.reshape(_squeeze_shape(image.shape, source=source))
    found: list[str] = []
    if affine is not None:
        world = validate_affine(affine, source=source)
        units = "mm"
    elif spacing is not None:
        world = affine_from_spacing(check_spacing(spacing, source=source))
        units = "mm"
    else:
        world = np.eye(4)
        units = "unknown"
        found.append(f"{source}: no affine or spacing given; assumed 1 mm isotropic voxels")
    return _build_volume(
        image,
        world,
        label=label,
        threshold=threshold,
        source=source,
        sha256=_array_sha256(image, world),
        input_units=units,
        dtype_in=str(image.dtype),
        warnings=found,
    )
