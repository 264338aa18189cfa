"""Exports for general viewers: centrelines as VTK XML PolyData, and a branch-label volume.

``centerlines.vtp`` follows the VTK XML file format (PolyData, ASCII): points in world mm, one polyline
per branch (closed loops repeat their first point), point data ``curvature_per_mm``, ``torsion_per_mm``
(NaN where undefined), ``radius_mm``, ``arc_mm`` and ``branch_id``, and cell data ``branch_id``.
``branch_labels.nii.gz`` labels every mask voxel with the id of the nearest branch centreline (0 outside
the mask), on the input's own grid, header and affine.
"""

from __future__ import annotations

import os
from pathlib import Path
from xml.sax.saxutils import quoteattr

import nibabel as nib
import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

__all__ = ["write_vtp", "branch_label_volume", "write_label_volume"]


def _fmt(values: np.ndarray, fmt: str) -> str:
    flat = np.asarray(values).ravel()
    return (
        " ".join(fmt % v if np.isfinite(v) else "nan" for v in flat)
        if flat.dtype.kind == "f"
        else " ".join(str(int(v)) for v in flat)
    )


def write_vtp(points: pd.DataFrame, branches: pd.DataFrame, path: str | os.PathLike[str]) -> Path:
    """Write ``points.csv``-shaped data as a VTK XML PolyData file of polylines, one per branch.

    Parameters
    ----------
    points : DataFrame
        Columns branch_id, arc_mm, x_mm, y_mm, z_mm, curvature_per_mm, torsion_per_mm, radius_mm.
    branches : DataFrame
        Columns branch_id and kind (loops are closed by repeating their first point).
    path : path
        Destination ``.vtp`` file.
    """
    path = Path(path)
    loops = set(branches.loc[branches["kind"] == "loop", "branch_id"].astype(int))
    ids = points["branch_id"].to_numpy(int)
    order = np.argsort(ids, kind="stable")
    ids = ids[order]
    starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]]) if len(ids) else np.zeros(0, int)
    ends = np.r_[starts[1:], len(ids)] if len(ids) else np.zeros(0, int)
    connectivity, offsets, cell_ids = [], [], []
    count = 0
    for s, e in zip(starts, ends, strict=True):
        idx = np.arange(s, e)
        if ids[s] in loops and len(idx) > 2:
            idx = np.r_[idx, s]
        connectivity.append(idx)
        count += len(idx)
        offsets.append(count)
        cell_ids.append(ids[s])
    conn = np.concatenate(connectivity) if connectivity else np.zeros(0, int)
    xyz = points[["x_mm", "y_mm", "z_mm"]].to_numpy(float)[order]

    def arr(name, values, vtype, fmt="%.9g", ncomp=1):
        return (
            f'<DataArray type="{vtype}" Name={quoteattr(name)} NumberOfComponents="{ncomp}" '
            f'format="ascii">{_fmt(values, fmt)}</DataArray>'
        )

    point_data = [
        arr("branch_id", ids, "Int32"),
        arr("arc_mm", points["arc_mm"].to_numpy(float)[order], "Float64"),
        arr("curvature_per_mm", points["curvature_per_mm"].to_numpy(float)[order], "Float64"),
        arr("torsion_per_mm", points["torsion_per_mm"].to_numpy(float)[order], "Float64"),
        arr("radius_mm", points["radius_mm"].to_numpy(float)[order], "Float64"),
    ]
    text = "\n".join(
        [
            '<?xml version="1.0"?>',
            '<VTKFile type="PolyData" version="1.0" byte_order="LittleEndian">',
            "<PolyData>",
            f'<Piece NumberOfPoints="{len(xyz)}" NumberOfVerts="0" NumberOfLines="{len(cell_ids)}" '
            'NumberOfStrips="0" NumberOfPolys="0">',
            '<PointData Scalars="curvature_per_mm">',
            *point_data,
            "</PointData>",
            "<CellData>",
            arr("branch_id", np.asarray(cell_ids, int), "Int32"),
            "</CellData>",
            "<Points>",
            arr("Points", xyz, "Float64", ncomp=3),
            "</Points>",
            "<Lines>",
            arr("connectivity", conn, "Int64"),
            arr("offsets", np.asarray(offsets, int), "Int64"),
            "</Lines>",
            "</Piece>",
            "</PolyData>",
            "</VTKFile>",
            "",
        ]
    )
    path.write_text(text)
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
