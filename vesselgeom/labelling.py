"""Connected components of a 3D mask in slabs, with memory that follows the slab, not the volume.

:func:`scipy.ndimage.label` needs working memory of several bytes per voxel of the whole array (about
6x a bool mask: 600 MB for a 400 x 512 x 512 volume), far more than the mask itself. Here the volume is
labelled slab by slab along the first axis; labels that meet across a seam are joined afterwards (a
union of the provisional labels, :func:`scipy.sparse.csgraph.connected_components`). Only the foreground
voxels' flat indices and labels are kept, or, for the background, the few voxels of regions that do not
reach the volume's faces.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

__all__ = ["label_foreground", "enclosed_background", "fill_holes"]

_FULL = np.ones((3, 3, 3), dtype=bool)
_SIX = ndimage.generate_binary_structure(3, 1)
_SLAB_VOXELS = 8 * 2**20  # voxels per slab (sets the working memory: ~6 bytes per voxel)


def _slabs(shape: tuple[int, ...], slab_voxels: int | None) -> list[tuple[int, int]]:
    slab_voxels = slab_voxels or _SLAB_VOXELS
    depth = max(1, slab_voxels // max(1, shape[1] * shape[2]))
    return [(z, min(z + depth, shape[0])) for z in range(0, shape[0], depth)]


def _seam_pairs(prev: np.ndarray, cur: np.ndarray, full: bool) -> np.ndarray:
    """(k, 2) pairs of labels of voxels adjacent across a seam: ``prev`` plane above ``cur`` plane.

    ``full``: 26-connectivity (each voxel meets the 3 x 3 block below it); else 6 (the voxel below).
    """
    ny, nx = cur.shape
    parts = []
    shifts = [(dy, dx) for dy in (-1, 0, 1) for dx in (-1, 0, 1)] if full else [(0, 0)]
    for dy, dx in shifts:
        a = prev[max(0, -dy) : ny - max(0, dy), max(0, -dx) : nx - max(0, dx)]
        b = cur[max(0, dy) : ny - max(0, -dy), max(0, dx) : nx - max(0, -dx)]
        both = (a != 0) & (b != 0)
        if both.any():
            parts.append(np.stack([a[both], b[both]], axis=1))
    if not parts:
        return np.zeros((0, 2), np.int64)
    p = np.concatenate(parts).astype(np.int64)
    # distinct pairs (most voxels of a seam repeat a few); each column spans one slab's labels (< 2^32)
    lo = p.min(axis=0)
    key = np.unique(((p[:, 0] - lo[0]) << 32) | (p[:, 1] - lo[1]))
    return np.stack([(key >> 32) + lo[0], (key & 0xFFFFFFFF) + lo[1]], axis=1)


def _shift(plane: np.ndarray, offset: int) -> np.ndarray:
    """A plane of slab labels as global provisional labels (0 stays background), int64."""
    out = plane.astype(np.int64)
    out[out != 0] += offset
    return out


def _join(n: int, pairs: list[np.ndarray]) -> np.ndarray:
    """Group of each of the provisional labels 1..n (index 0 unused) after joining ``pairs``."""
    p = np.concatenate(pairs) if pairs else np.zeros((0, 2), np.int64)
    graph = coo_matrix((np.ones(len(p), np.int8), (p[:, 0], p[:, 1])), shape=(n + 1, n + 1))
    _, group = connected_components(graph, directed=False)
    return group


class _LabelledSlabs:
    """Labels slab by slab, joined across seams: iterate for (z0, z1, labels, n, offset) per slab.

    A slab's label ``k`` (1..n) is the provisional label ``k + offset``; after the iteration,
    :meth:`groups` gives every provisional label's group (labels that meet across a seam share one).
    ``background``: label the background 6-connected (as hole filling sees it), else the foreground
    26-connected (components).
    """

    def __init__(self, mask: np.ndarray, *, background: bool, slab_voxels: int | None) -> None:
        self._mask = mask
        self._background = background
        self._slab_voxels = slab_voxels
        self.count = 0
        self._pairs: list[np.ndarray] = []

    def __iter__(self):
        prev = None
        for z0, z1 in _slabs(self._mask.shape, self._slab_voxels):
            part = self._mask[z0:z1]
            lab, n = ndimage.label(
                ~part if self._background else part, structure=_SIX if self._background else _FULL
            )
            yield z0, z1, lab, n, self.count
            first = _shift(lab[0], self.count)
            if prev is not None:
                self._pairs.append(_seam_pairs(prev, first, full=not self._background))
            prev = _shift(lab[-1], self.count)
            self.count += n

    def groups(self) -> np.ndarray:
        """Group of each provisional label 1..count (index 0 unused)."""
        return _join(self.count, self._pairs)


def label_foreground(
    mask: np.ndarray, *, slab_voxels: int | None = None
) -> tuple[np.ndarray, np.ndarray, int]:
    """26-connected components of a 3D bool mask, as flat indices and labels of its foreground.

    Parameters
    ----------
    mask : 3D bool array
    slab_voxels : int, optional
        Voxels per slab (working memory); default ``_SLAB_VOXELS`` (8 Mi voxels, about 50 MB).

    Returns
    -------
    flat : (k,) int64 array
        Flat (C-order) indices of the foreground voxels, ascending.
    labels : (k,) int32 array
        1-based component of each, numbered in raster order of the component's first voxel, as
        :func:`scipy.ndimage.label` numbers them.
    n : int
        Number of components.
    """
    mask = np.asarray(mask, bool)
    plane = mask.shape[1] * mask.shape[2]
    flats, provs = [], []
    slabs = _LabelledSlabs(mask, background=False, slab_voxels=slab_voxels)
    for z0, _, lab, _, offset in slabs:
        f = np.flatnonzero(lab)
        flats.append(f + z0 * plane)
        provs.append(lab.ravel()[f] + np.int64(offset))
    flat = np.concatenate(flats) if flats else np.zeros(0, np.int64)
    prov = np.concatenate(provs) if provs else np.zeros(0, np.int64)
    del flats, provs
    group = slabs.groups()[prov]
    # renumber the groups 1.. in order of their first voxel (flat is ascending)
    uniq, first = np.unique(group, return_index=True)
    rank = np.empty(len(uniq), np.int32)
    rank[np.argsort(first, kind="stable")] = np.arange(1, len(uniq) + 1, dtype=np.int32)
    labels = rank[np.searchsorted(uniq, group)]
    return flat, labels, len(uniq)


def enclosed_background(mask: np.ndarray, *, slab_voxels: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Background voxels not 6-connected to the volume's faces, and the region each belongs to.

    These are the voxels :func:`scipy.ndimage.binary_fill_holes` (default 6-connected structure) fills.

    Parameters
    ----------
    mask : 3D bool array
    slab_voxels : int, optional
        Voxels per slab (working memory); default ``_SLAB_VOXELS`` (8 Mi voxels, about 50 MB).

    Returns
    -------
    ijk : (k, 3) int64 array
        Index coordinates, ascending in raster order.
    region : (k,) int64 array
        0-based id of the enclosed 6-connected background region of each voxel.
    """
    mask = np.asarray(mask, bool)
    nz = mask.shape[0]
    kept_ijk, kept_prov, outside = [], [], []
    slabs = _LabelledSlabs(mask, background=True, slab_voxels=slab_voxels)
    for z0, z1, lab, n, offset in slabs:
        faces = [lab[:, 0, :], lab[:, -1, :], lab[:, :, 0], lab[:, :, -1]]
        if z0 == 0:
            faces.append(lab[0])
        if z1 == nz:
            faces.append(lab[-1])
        out = np.unique(np.concatenate([f.ravel() for f in faces]))
        out = out[out != 0]
        outside.append(out.astype(np.int64) + offset)
        inner = np.ones(n + 1, bool)  # this slab's labels that do not reach an outer face
        inner[0] = False
        inner[out] = False
        if inner.any():
            sel = inner[lab]
            ijk = np.argwhere(sel)
            ijk[:, 0] += z0
            kept_ijk.append(ijk)
            kept_prov.append(lab[sel].astype(np.int64) + offset)
    if not kept_ijk:
        return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
    group = slabs.groups()
    open_group = np.zeros(group.max() + 1, bool)
    open_group[group[np.concatenate(outside)]] = True
    ijk = np.concatenate(kept_ijk)
    g = group[np.concatenate(kept_prov)]
    keep = ~open_group[g]
    ijk, g = ijk[keep], g[keep]
    _, region = np.unique(g, return_inverse=True)
    return ijk.astype(np.int64), region.astype(np.int64)


def fill_holes(mask: np.ndarray, *, slab_voxels: int | None = None) -> np.ndarray:
    """:func:`scipy.ndimage.binary_fill_holes` (6-connected background), in slabs: a new bool array.

    The enclosed background voxels (:func:`enclosed_background`) set to foreground; one labelling of
    the background instead of scipy's dilation from the faces, with the working memory of a slab.
    """
    out = np.array(mask, dtype=bool)
    ijk, _ = enclosed_background(out, slab_voxels=slab_voxels)
    out[ijk[:, 0], ijk[:, 1], ijk[:, 2]] = True
    return out
