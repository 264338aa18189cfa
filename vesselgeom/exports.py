"""Exports for general viewers: centrelines as VTK XML PolyData, and a branch-label volume.

``centerlines.vtp`` follows the VTK XML file format (PolyData, ASCII): points in world mm, one polyline
per branch (closed loops repeat their first point), point data ``curvature_per_mm``, ``torsion_per_mm``
(NaN where undefined), ``radius_mm``, ``arc_mm`` and ``branch_id``, and cell data ``branch_id``.
``branch_labels.nii.gz`` labels every mask voxel with the id of the nearest branch centreline (0 outside
the mask), on the input's own grid, header and affine.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import TextIO
from xml.sax.saxutils import quoteattr

import nibabel as nib
import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

__all__ = ["write_vtp", "branch_label_volume", "write_label_volume"]

# values formatted and written at a time by write_vtp, so memory stays bounded for large tables
_VTP_BLOCK = 65536


def _fmt(values: np.ndarray, fmt: str) -> str:
    """Text of ``values`` (any shape, flattened in C order), separated by single spaces.

    Floats are written with the printf-style ``fmt`` and every non-finite value (NaN, +-inf) as
    ``"nan"``; all other values as ``str(int(v))``. Float64 and integer arrays are formatted by one
    ``%`` over the whole block and one ``str`` per Python int, which gives the same text as a
    per-value loop, only faster.
    """
    flat = np.asarray(values).ravel()
    if flat.dtype.kind == "f":
        if flat.dtype.itemsize > 8:  # long double: keep numpy's own scalars, value by value
            return " ".join(fmt % v if np.isfinite(v) else "nan" for v in flat)
        # NaN of either sign and +-inf all format as "nan" through "%" (Python float formatting)
        finite = np.where(np.isfinite(flat), flat, np.nan).astype(np.float64, copy=False).tolist()
        return " ".join([fmt] * len(finite)) % tuple(finite)
    if flat.dtype.kind in "iu":
        return " ".join(map(str, flat.tolist()))
    if flat.dtype.kind == "b":
        return " ".join(map(str, flat.astype(np.int64).tolist()))
    return " ".join(str(int(v)) for v in flat)


def _polylines(ids: np.ndarray, loops: set[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    # One polyline per run of equal sorted ids; runs of a loop branch with more than two points are
    # closed by repeating their first point. Returns (starts, ends, closed, cell ids) per polyline:
    # arrays of the number of branches, not of points.
    n = len(ids)
    starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]]) if n else np.zeros(0, np.int64)
    ends = np.r_[starts[1:], n].astype(np.int64) if n else np.zeros(0, np.int64)
    cell_ids = ids[starts].astype(np.int64)
    closed = np.isin(cell_ids, np.fromiter(loops, np.int64, len(loops))) & (ends - starts > 2)
    return starts.astype(np.int64), ends, closed, cell_ids


def _connectivity(starts: np.ndarray, ends: np.ndarray, closed: np.ndarray) -> Iterator[np.ndarray]:
    # The polylines' point indices (0..n-1, each closed one followed by its first index again), about
    # _VTP_BLOCK at a time: whole polylines per block, so memory follows the block, not the table.
    i, m = 0, len(starts)
    while i < m:
        j = max(int(np.searchsorted(ends, starts[i] + _VTP_BLOCK, side="right")), i + 1)
        ids = np.arange(starts[i], ends[j - 1], dtype=np.int64)
        shut = np.flatnonzero(closed[i:j]) + i
        yield np.insert(ids, ends[shut] - starts[i], starts[shut])
        i = j


def _write_array(handle: TextIO, name: str, vtype: str, blocks: Iterable[np.ndarray], ncomp: int = 1) -> None:
    # One ascii DataArray element on one line: the values of the blocks, formatted block by block,
    # separated by single spaces.
    handle.write(
        f'<DataArray type="{vtype}" Name={quoteattr(name)} NumberOfComponents="{ncomp}" format="ascii">'
    )
    first = True
    for block in blocks:
        if not block.size:
            continue
        if not first:
            handle.write(" ")
        handle.write(_fmt(block, "%.9g"))
        first = False
    handle.write("</DataArray>")


def _blocks(n: int, block: Callable[[int, int], np.ndarray], ncomp: int = 1) -> Iterator[np.ndarray]:
    step = max(1, _VTP_BLOCK // ncomp)
    for start in range(0, n, step):
        yield block(start, min(start + step, n))


def write_vtp(points: pd.DataFrame, branches: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write ``points.csv``-shaped data as a VTK XML PolyData file of polylines, one per branch.

    Parameters
    ----------
    points : DataFrame, shape (n, ...)
        Columns branch_id, arc_mm, x_mm, y_mm, z_mm (world mm), curvature_per_mm, torsion_per_mm
        (1/mm), radius_mm (mm); rows of a branch in arc order.
    branches : DataFrame, shape (m, ...)
        Columns branch_id and kind (loops are closed by repeating their first point).
    path : path
        Destination ``.vtp`` file, replaced only once complete (temporary file in its folder, then
        ``os.replace``; the temporary file is removed on any error).

    Returns
    -------
    Path
        ``path``.

    Notes
    -----
    The text is streamed to the file: numbers are formatted ``_VTP_BLOCK`` at a time, so memory
    beyond ``points`` stays bounded by one block plus per-branch arrays (polyline starts, ends and
    offsets); rows not in branch order cost a sort order as well (8 bytes per point). Floats are
    written as ``"%.9g"``, non-finite values as ``"nan"``.
    """
    path = Path(path)
    loops = set(branches.loc[branches["kind"] == "loop", "branch_id"].astype(int))
    ids = points["branch_id"].to_numpy(np.int64)
    order = None  # rows already in branch order (both pipelines write them so): no index array at all
    if len(ids) and np.any(ids[1:] < ids[:-1]):
        order = np.argsort(ids, kind="stable")
        ids = ids[order]
    starts, ends, closed, cell_ids = _polylines(ids, loops)
    offsets = np.cumsum(ends - starts + closed, dtype=np.int64)
    n = len(ids)

    def rows(name: str, a: int, b: int) -> np.ndarray:
        values = points[name]
        picked = values.iloc[a:b] if order is None else values.take(order[a:b])
        return picked.to_numpy(float)

    def column(name: str) -> Callable[[int, int], np.ndarray]:
        return lambda a, b: rows(name, a, b)

    def xyz(a: int, b: int) -> np.ndarray:
        # column by column: selecting the three columns as one frame would copy them whole
        return np.column_stack([rows(c, a, b) for c in ("x_mm", "y_mm", "z_mm")])

    def part(array: np.ndarray) -> Callable[[int, int], np.ndarray]:
        return lambda a, b: array[a:b]

    temp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(6)}.tmp")
    try:
        # text mode with the platform's newline, as Path.write_text gave before; the text is ASCII
        with open(temp, "x", encoding="utf-8") as handle:
            handle.write(
                '<?xml version="1.0"?>\n'
                '<VTKFile type="PolyData" version="1.0" byte_order="LittleEndian">\n'
                "<PolyData>\n"
                f'<Piece NumberOfPoints="{n}" NumberOfVerts="0" NumberOfLines="{len(cell_ids)}" '
                'NumberOfStrips="0" NumberOfPolys="0">\n'
                '<PointData Scalars="curvature_per_mm">\n'
            )
            _write_array(handle, "branch_id", "Int32", _blocks(n, part(ids)))
            for name in ("arc_mm", "curvature_per_mm", "torsion_per_mm", "radius_mm"):
                handle.write("\n")
                _write_array(handle, name, "Float64", _blocks(n, column(name)))
            handle.write("\n</PointData>\n<CellData>\n")
            _write_array(handle, "branch_id", "Int32", _blocks(len(cell_ids), part(cell_ids)))
            handle.write("\n</CellData>\n<Points>\n")
            _write_array(handle, "Points", "Float64", _blocks(n, xyz, 3), ncomp=3)
            handle.write("\n</Points>\n<Lines>\n")
            _write_array(handle, "connectivity", "Int64", _connectivity(starts, ends, closed))
            handle.write("\n")
            _write_array(handle, "offsets", "Int64", _blocks(len(offsets), part(offsets)))
            handle.write("\n</Lines>\n</Piece>\n</PolyData>\n</VTKFile>\n")
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)
        raise
    return path


def branch_label_volume(mask: np.ndarray, affine: np.ndarray, points: pd.DataFrame) -> np.ndarray:
    """Label every mask voxel with the branch id of the nearest centreline point (0 outside).

    Nearest in world mm through the full affine, so anisotropic voxels are handled. The dtype is the
    smallest unsigned integer that holds the largest branch id.
    """
    ids = points["branch_id"].to_numpy(np.int64)
    top = int(ids.max()) if len(ids) else 0
    dtype = np.uint8 if top < 2**8 else np.uint16 if top < 2**16 else np.uint32
    labels = np.zeros(mask.shape, dtype=dtype)
    if not len(ids) or not mask.any():
        return labels
    tree = cKDTree(points[["x_mm", "y_mm", "z_mm"]].to_numpy(float))
    ijk = np.argwhere(mask)
    for lo in range(0, len(ijk), 1 << 20):  # bounded memory for large masks
        chunk = ijk[lo : lo + (1 << 20)]
        world = chunk @ affine[:3, :3].T + affine[:3, 3]
        _, nearest = tree.query(world)
        labels[tuple(chunk.T)] = ids[nearest]
    return labels


def write_label_volume(
    labels: np.ndarray, affine_mm: np.ndarray, path: str | os.PathLike[str], *, source: str | None = None
) -> Path:
    """Write a label volume as NIfTI on the input's grid: the input's own header and affine when
    ``source`` is a NIfTI file (so it overlays the input exactly), else the given affine in mm."""
    path = Path(path)
    header, affine = None, affine_mm
    if source and os.path.isfile(source):
        try:
            src = nib.load(source)
            header, affine = src.header.copy(), src.affine
        except Exception:  # the input was readable moments ago; fall back to the mm affine
            header, affine = None, affine_mm
    img = nib.Nifti1Image(labels, affine, header=header)
    img.set_data_dtype(labels.dtype)
    if header is None:
        img.header.set_xyzt_units("mm")
    else:
        img.header["scl_slope"], img.header["scl_inter"] = 1.0, 0.0
        img.header["cal_min"], img.header["cal_max"] = 0, float(labels.max())
    nib.save(img, path)
    return path
