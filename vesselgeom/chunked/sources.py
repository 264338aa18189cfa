"""Lazy inputs for chunked processing: a mask that is read one box at a time, never whole.

A :class:`LazyVolume` knows the shape and the voxel-to-world affine (mm) of an image on disk (OME-Zarr,
plain Zarr, NIfTI through nibabel's array proxy) or in memory, and turns any box of it into a boolean
foreground mask with the rules of :func:`vesselgeom.io.select_foreground`. Boxes may reach outside the
image: that part is background, as the in-memory pipeline pads each component with background.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import warnings as _warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from vesselgeom.errors import InputError, VesselgeomWarning
from vesselgeom.io.affine import affine_from_spacing, check_spacing
from vesselgeom.io.volume import (
    _array_sha256,
    _check_label,
    _check_threshold,
    _squeeze_shape,
    select_foreground,
)

__all__ = ["LazyVolume", "open_lazy"]


@dataclass(frozen=True, eq=False, repr=False)
class LazyVolume:
    """A 3D image read lazily, box by box, as a boolean foreground mask.

    Attributes
    ----------
    data : array-like
        Anything sliceable with numpy semantics: a ``zarr.Array``, a nibabel ``ArrayProxy`` or an ndarray.
        Picklable, so it can travel to Dask workers (zarr arrays and proxies re-open their file there).
    index : tuple
        Prefix selecting the three spatial axes (zeros for leading singleton axes); trailing
        singleton axes of NIfTI images are dropped by ``suffix``.
    shape : (3,) tuple of int
    affine : (4, 4) float array, mm
        Voxel index -> world mm.
    source : str
        Path or ``"<array>"`` (used in messages and run.json).
    kind : str
        "ome-zarr 0.4", "ome-zarr 0.5", "zarr", "nifti" or "array".
    input_units : str
    dtype_in : str
        Data type on disk.
    label, threshold : optional
        Foreground selection (see :func:`vesselgeom.io.select_foreground`).
    sha256 : str
        Digest of the file bytes (NIfTI), of every file of the store (Zarr) or of the array.
    warnings : tuple of str
    suffix : tuple
        Index suffix for trailing singleton axes (NIfTI ``(I, J, K, 1)``).
    """

    data: Any
    index: tuple
    shape: tuple[int, int, int]
    affine: np.ndarray
    source: str = "<array>"
    kind: str = "array"
    input_units: str = "mm"
    dtype_in: str = "bool"
    label: int | None = None
    threshold: float | None = None
    sha256: str = ""
    warnings: tuple[str, ...] = field(default=())
    suffix: tuple = ()

    def __repr__(self) -> str:
        return f"LazyVolume(source={self.source!r}, kind={self.kind!r}, shape={self.shape})"

    def with_selection(self, *, label: int | None, threshold: float | None) -> LazyVolume:
        """The same image with another foreground selection."""
        if label is not None:
            label = _check_label(label, source=self.source)
        if threshold is not None:
            threshold = _check_threshold(threshold, source=self.source)
        if label is not None and threshold is not None:
            raise InputError(f"{self.source}: both label and threshold given; pass only one")
        return dataclasses.replace(self, label=label, threshold=threshold)

    def read_raw(self, slices: tuple[slice, slice, slice]) -> np.ndarray:
        """The image values in a box inside the image, shape of the box, on-disk dtype (or scaled)."""
        return np.asarray(self.data[(*self.index, *slices, *self.suffix)])

    def read(self, slices: tuple[slice, slice, slice]) -> np.ndarray:
        """Foreground (bool) of a box inside the image; ``slices`` have explicit, in-range bounds."""
        return _foreground(self.read_raw(slices), self.label, self.threshold, self.source)

    def read_box(self, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """Foreground of the box ``[lo, hi)`` (index space, may reach outside: background there)."""
        lo = np.asarray(lo, int)
        hi = np.asarray(hi, int)
        out = np.zeros(tuple(hi - lo), dtype=bool)
        a = np.maximum(lo, 0)
        b = np.minimum(hi, self.shape)
        if np.any(b <= a):
            return out
        inner = tuple(slice(int(x), int(y)) for x, y in zip(a, b, strict=True))
        dest = tuple(slice(int(x - o), int(y - o)) for x, y, o in zip(a, b, lo, strict=True))
        out[dest] = self.read(inner)
        return out


def _foreground(block: np.ndarray, label: int | None, threshold: float | None, source: str) -> np.ndarray:
    """:func:`vesselgeom.io.select_foreground` for one box.

    The rules are the same; the two checks that need the whole image (the label occurs somewhere; the
    image is not all NaN) are made by the caller over all boxes.
    """
    return select_foreground(block, label=label, threshold=threshold, source=source, whole_image=False)


def _store_sha256(path: Path) -> str:
    """sha256 over the relative names and bytes of every file of a Zarr store, in sorted order."""
    digest = hashlib.sha256()
    for f in sorted(p for p in path.rglob("*") if p.is_file()):
        digest.update(str(f.relative_to(path)).encode() + b"\0")
        with f.open("rb") as handle:
            while block := handle.read(1 << 20):
                digest.update(block)
    return digest.hexdigest()


def open_lazy(
    source: Any,
    *,
    spacing: float | tuple[float, float, float] | None = None,
    label: int | None = None,
    threshold: float | None = None,
) -> LazyVolume:
    """Open an image for chunked reading without loading its voxels.

    Parameters
    ----------
    source : path, zarr.Array, ndarray or LazyVolume
        An OME-Zarr group (NGFF 0.4/0.5), a plain Zarr array folder, a NIfTI file (read through
        nibabel's array proxy), an open Zarr array, or an in-memory array.
    spacing : float or 3 floats, mm, optional
        Voxel size for plain Zarr arrays and in-memory arrays; refused for files that carry their own.
    label, threshold : optional
        Foreground selection, as for :func:`vesselgeom.io.select_foreground`.

    Returns
    -------
    LazyVolume

    Warns
    -----
    VesselgeomWarning
        Units missing from the metadata (mm assumed), NIfTI header problems, an array without spacing.
    """
    if isinstance(source, LazyVolume):
        if spacing is not None:
            raise InputError(f"{source.source}: a LazyVolume carries its own affine; do not pass spacing")
        return source.with_selection(label=label, threshold=threshold)
    vol = _open(source, spacing)
    for message in vol.warnings:
        _warnings.warn(message, VesselgeomWarning, stacklevel=3)
    return vol.with_selection(label=label, threshold=threshold)


def _open(source: Any, spacing: Any) -> LazyVolume:
    if isinstance(source, np.ndarray):
        shape = _squeeze_shape(source.shape, source="<array>")
        found: list[str] = []
        if spacing is None:
            affine, units = np.eye(4), "unknown"
            found.append("<array>: no spacing given; assumed 1 mm isotropic voxels")
        else:
            affine, units = affine_from_spacing(check_spacing(spacing, source="<array>")), "mm"
        data = source.reshape(shape)
        return LazyVolume(
            data, (), shape, affine, "<array>", "array", units, str(source.dtype),
            sha256=_array_sha256(data, affine), warnings=tuple(found),
        )  # fmt: skip
    if not isinstance(source, str | os.PathLike):
        if hasattr(source, "shape") and hasattr(source, "store"):  # an open zarr.Array
            from vesselgeom.io.zarr import _plain

            if spacing is None:
                raise InputError("<zarr>: a plain Zarr array has no voxel size; pass spacing (mm)")
            z = _plain(source, spacing, "<zarr>")
            return LazyVolume(z.array, z.index, z.shape, z.affine, "<zarr>", "zarr", "mm", str(source.dtype))
        raise InputError(
            f"<array>: cannot read a {type(source).__name__}; pass a path, a zarr array or an ndarray"
        )
    path = os.fspath(source)
    from vesselgeom.io.zarr import is_zarr_path, open_zarr

    if is_zarr_path(path):
        z = open_zarr(path, spacing=spacing)
        return LazyVolume(
            z.array, z.index, z.shape, z.affine, path, z.kind, z.input_units, str(z.array.dtype),
            sha256=_store_sha256(Path(path)), warnings=z.warnings,
        )  # fmt: skip
    if spacing is not None:
        raise InputError(f"{path}: a NIfTI file carries its own affine; do not pass spacing")
    return _open_nifti(path)


def _open_nifti(path: str) -> LazyVolume:
    from vesselgeom.io.nifti import file_sha256, open_nifti

    if Path(path).is_dir():
        raise InputError(f"{path}: a folder without Zarr metadata; pass a .zarr store or a NIfTI file")
    img, shape, units, affine, found = open_nifti(path)
    full = tuple(int(n) for n in img.shape)
    return LazyVolume(
        img.dataobj, (), shape, affine, path, "nifti", units, np.dtype(img.get_data_dtype()).name,
        sha256=file_sha256(path), warnings=tuple(found), suffix=(0,) * (len(full) - 3),
    )  # fmt: skip
