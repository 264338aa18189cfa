"""Open Zarr inputs lazily: OME-Zarr images (NGFF 0.4 and 0.5) and plain Zarr arrays.

Nothing is read but metadata: the array handle is returned for slicing chunk by chunk. The optional
``zarr`` package is imported inside the functions, so ``import vesselgeom`` works without it.

OME-Zarr (NGFF) keeps its image metadata in the group attributes: ``multiscales`` (NGFF 0.4, in
``.zattrs``) or ``ome.multiscales`` (NGFF 0.5, in ``zarr.json``). Dataset 0 (the full resolution) is used;
its voxel size is the product of the dataset's ``scale`` transformation and the multiscale's own (if any)
for the spatial axes, in the units of ``axes[].unit``, converted to mm. A ``translation`` is applied too.
Spatial axes named ``x``, ``y`` and ``z`` are mapped to world x, y and z whatever their order on disk, so a
``(z, y, x)`` array keeps its handedness (and the sign of torsion).

References
----------
Open Microscopy Environment, "Next-generation file formats (NGFF)", versions 0.4 and 0.5,
sections "axes metadata", "coordinateTransformations metadata" and "multiscales metadata".
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from vesselgeom.errors import InputError
from vesselgeom.io.affine import affine_from_spacing, check_spacing, validate_affine

__all__ = ["ZarrInput", "NGFF_UNITS_TO_MM", "open_zarr", "is_zarr_path"]

#: NGFF / UDUNITS-2 length unit names -> (short code recorded in run.json, factor to mm).
NGFF_UNITS_TO_MM: dict[str, tuple[str, float]] = {
    "meter": ("m", 1e3),
    "millimeter": ("mm", 1.0),
    "micrometer": ("um", 1e-3),
    "micron": ("um", 1e-3),
    "nanometer": ("nm", 1e-6),
}


@dataclass(frozen=True, eq=False)
class ZarrInput:
    """A Zarr array opened for lazy reading, with its voxel-to-world affine in mm.

    Attributes
    ----------
    array : zarr.Array
        The image, possibly with leading singleton non-spatial axes (see ``index``).
    index : tuple
        Prefix that selects the 3 spatial axes: integers 0 for singleton time/channel axes.
    shape : (3,) tuple of int
        Spatial shape (voxels along i, j, k).
    affine : (4, 4) float array, mm
    input_units : str
        Unit code of the metadata ("mm", "um", "nm", "m", or "unknown").
    kind : str
        "ome-zarr 0.4", "ome-zarr 0.5" or "zarr".
    warnings : tuple of str
    """

    array: Any
    index: tuple
    shape: tuple[int, int, int]
    affine: np.ndarray
    input_units: str
    kind: str
    warnings: tuple[str, ...] = field(default=())


def is_zarr_path(path: str | os.PathLike[str]) -> bool:
    """True for a folder holding Zarr metadata (``.zgroup``, ``.zarray`` or ``zarr.json``)."""
    p = Path(path)
    return p.is_dir() and any((p / n).exists() for n in (".zgroup", ".zarray", "zarr.json"))


def _zarr():
    try:
        import zarr
    except ImportError:  # pragma: no cover - depends on the environment
        raise InputError(
            "<zarr>: the zarr package is not installed; install the optional extra: "
            "pip install 'vesselgeom[chunked]'"
        ) from None
    return zarr


def open_zarr(
    path: str | os.PathLike[str],
    *,
    spacing: float | tuple[float, float, float] | None = None,
) -> ZarrInput:
    """Open an OME-Zarr image or a plain Zarr array without reading its voxels.

    Parameters
    ----------
    path : str or path-like
        An OME-Zarr group (NGFF 0.4 or 0.5) or a plain Zarr array folder.
    spacing : float or 3 floats, mm, optional
        Voxel size along the array axes; required for a plain Zarr array, refused for OME-Zarr (which
        carries its own).

    Returns
    -------
    ZarrInput

    Raises
    ------
    InputError
        Missing path, not Zarr, multiscales metadata without spatial axes or scale, non-singleton
        time/channel axes, a plain array without ``spacing``, or ``spacing`` given for OME-Zarr.
    """
    zarr = _zarr()
    source = os.fspath(path)
    if not Path(source).exists():
        raise InputError(f"{source}: no such file or folder; check the path")
    try:
        node = zarr.open(source, mode="r")
    except Exception as exc:  # zarr raises several unrelated types for a non-Zarr folder
        raise InputError(
            f"{source}: not a readable Zarr store ({type(exc).__name__}); pass a .zarr folder"
        ) from exc
    if isinstance(node, zarr.Array):
        if spacing is None:
            raise InputError(f"{source}: a plain Zarr array has no voxel size; pass spacing (mm)")
        return _plain(node, spacing, source)
    attrs = dict(node.attrs)
    if "ome" in attrs and "multiscales" in attrs["ome"]:
        meta, version = attrs["ome"]["multiscales"], str(attrs["ome"].get("version", "0.5"))
    elif "multiscales" in attrs:
        meta = attrs["multiscales"]
        version = str(meta[0].get("version", "0.4")) if meta else "0.4"
    else:
        raise InputError(
            f"{source}: Zarr group without OME multiscales metadata; pass an OME-Zarr image or an array"
        )
    if spacing is not None:
        raise InputError(f"{source}: OME-Zarr carries its own voxel size; do not pass spacing")
    return _ome(node, meta[0], version, source)


def _plain(array: Any, spacing: Any, source: str) -> ZarrInput:
    shape, index = _spatial(tuple(int(n) for n in array.shape), list(range(array.ndim))[-3:], source)
    affine = affine_from_spacing(check_spacing(spacing, source=source))
    return ZarrInput(array, index, shape, affine, "mm", "zarr")


def _spatial(shape: tuple[int, ...], spatial: list[int], source: str) -> tuple[tuple[int, int, int], tuple]:
    """Spatial shape and the index prefix that drops singleton non-spatial axes (leading axes only)."""
    if len(spatial) != 3 or spatial != list(range(len(shape) - 3, len(shape))):
        raise InputError(f"{source}: needs 3 spatial axes after any time/channel axes, got shape {shape}")
    extra = shape[: len(shape) - 3]
    if any(n != 1 for n in extra):
        raise InputError(f"{source}: image has non-spatial axes of size {extra}; extract one 3D volume first")
    sp = shape[-3:]
    if min(sp) == 0:
        raise InputError(f"{source}: image has shape {shape} with no voxels; pass a non-empty volume")
    return (int(sp[0]), int(sp[1]), int(sp[2])), (0,) * len(extra)


def _scale_and_shift(transforms: list[dict], ndim: int, source: str) -> tuple[np.ndarray, np.ndarray]:
    scale, shift = np.ones(ndim), np.zeros(ndim)
    for t in transforms or []:
        if t.get("type") == "scale":
            if "scale" not in t:
                raise InputError(
                    f"{source}: a scale transformation given by path is not supported; inline it"
                )
            scale = scale * np.asarray(t["scale"], float)
        elif t.get("type") == "translation" and "translation" in t:
            shift = shift + np.asarray(t["translation"], float)
    return scale, shift


def _ome(group: Any, ms: dict, version: str, source: str) -> ZarrInput:
    axes = ms.get("axes")
    datasets = ms.get("datasets") or []
    if not axes or not datasets:
        raise InputError(f"{source}: multiscales metadata lacks axes or datasets; fix the OME-Zarr metadata")
    axes = [a if isinstance(a, dict) else {"name": a, "type": "space" if a in "zyx" else ""} for a in axes]
    ndim = len(axes)
    spatial = [i for i, a in enumerate(axes) if a.get("type") == "space"]
    first = datasets[0]
    try:
        array = group[first["path"]]
    except KeyError:
        raise InputError(f"{source}: dataset {first['path']!r} named in multiscales is missing") from None
    if array.ndim != ndim:
        raise InputError(f"{source}: dataset 0 has {array.ndim} axes but multiscales lists {ndim}")
    shape, index = _spatial(tuple(int(n) for n in array.shape), spatial, source)
    scale, shift = _scale_and_shift(first.get("coordinateTransformations"), ndim, source)
    s2, t2 = _scale_and_shift(ms.get("coordinateTransformations"), ndim, source)
    scale, shift = scale * s2, shift * s2 + t2
    warnings: list[str] = []
    units = {a.get("unit") for a in (axes[i] for i in spatial)}
    if len(units) > 1:
        raise InputError(
            f"{source}: spatial axes have different units {sorted(map(str, units))}; use one unit"
        )
    unit = units.pop()
    if unit is None:
        code, factor = "unknown", 1.0
        warnings.append(f"{source}: spatial axes declare no unit; assumed millimeter")
    elif unit in NGFF_UNITS_TO_MM:
        code, factor = NGFF_UNITS_TO_MM[unit]
    else:
        raise InputError(
            f"{source}: spatial unit {unit!r} is not supported; use one of {sorted(NGFF_UNITS_TO_MM)}"
        )
    sizes = check_spacing(scale[spatial] * factor, source=source)
    names = [str(axes[i].get("name", "")).lower() for i in spatial]
    if sorted(names) == ["x", "y", "z"]:
        linear = np.zeros((3, 3))
        for col, name in enumerate(names):
            linear["xyz".index(name), col] = sizes[col]
        origin = np.zeros(3)
        for col, name in enumerate(names):
            origin["xyz".index(name)] = shift[spatial][col] * factor
        affine = np.eye(4)
        affine[:3, :3], affine[:3, 3] = linear, origin
    else:
        affine = affine_from_spacing(sizes)
        affine[:3, 3] = shift[spatial] * factor
    affine = validate_affine(affine, source=source)
    return ZarrInput(array, index, shape, affine, code, f"ome-zarr {version}", tuple(warnings))
