"""Mask preparation and thinning, in voxel index space.

The mask is split into 26-connected components; each is cropped to its bounding box (plus a one-voxel
border), cleaned and thinned on its own, so cost follows the foreground rather than the full volume.
"""

from __future__ import annotations

from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from skimage.morphology import skeletonize

from . import crosssection, labelling
from .labelling import enclosed_background, label_foreground

__all__ = ["Component", "iter_components", "thin"]


@dataclass(frozen=True)
class Component:
    """One connected component of the mask, cropped.

    Attributes
    ----------
    component_id : int
        1-based label, in raster order of the component's first voxel.
    offset : (3,) int array
        Index of the crop's voxel [0, 0, 0] in the full volume.
    mask : 3D bool array
        The component alone (other components zeroed), holes filled if requested, with a border of at
        least one background voxel on every side.
    touches_border : bool
        Whether the component touches the edge of the full volume (the vessel may be truncated).
    """

    component_id: int
    offset: np.ndarray
    mask: np.ndarray
    touches_border: bool


def _hole_owners(cavity_ijk: np.ndarray, region: np.ndarray, flat: np.ndarray, labels: np.ndarray, shape):
    """Which component encloses each enclosed background region: (owner per region, multi-owner labels).

    Every 6-neighbour of a 6-connected background region that is not in the region is foreground, so a
    region all of whose neighbours belong to one component is a hole of that component alone (its
    boundary is that component's voxels). A region that touches several components (one inside a hole
    of another) is left to a fill of each touching component's crop. Owner -1 marks those regions.
    """
    if not len(cavity_ijk):
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    n_reg = int(region.max()) + 1
    owner = np.full(n_reg, -1, np.int64)
    idx = np.ravel_multi_index(tuple(cavity_ijk.T), shape)
    strides = (shape[1] * shape[2], shape[2], 1)
    reg, lab = [], []
    for axis, stride in enumerate(strides):
        for sign in (1, -1):
            nb = cavity_ijk[:, axis] + sign
            ok = (nb >= 0) & (nb < shape[axis])
            q = idx[ok] + sign * stride
            pos = np.minimum(np.searchsorted(flat, q), len(flat) - 1)
            hit = flat[pos] == q
            reg.append(region[ok][hit])
            lab.append(labels[pos[hit]].astype(np.int64))
    reg_all, lab_all = np.concatenate(reg), np.concatenate(lab)
    pairs = np.unique(np.stack([reg_all, lab_all], axis=1), axis=0)
    count = np.bincount(pairs[:, 0], minlength=n_reg)
    single = count[pairs[:, 0]] == 1
    owner[pairs[single, 0]] = pairs[single, 1]
    return owner, np.unique(pairs[~single, 1])


def iter_components(mask: np.ndarray, *, min_voxels: float, fill_holes: bool = True) -> Iterator[Component]:
    """Yield the 26-connected components of ``mask`` with at least ``min_voxels`` voxels.

    Parameters
    ----------
    mask : 3D bool array
    min_voxels : float
        Components with fewer voxels are skipped.
    fill_holes : bool
        Fill enclosed cavities of each component (as :func:`scipy.ndimage.binary_fill_holes` on its crop).

    Notes
    -----
    Memory: labels are computed in slabs (:mod:`vesselgeom.labelling`) and kept only for the foreground
    voxels (flat indices, 8 bytes each, held while components are yielded) and the enclosed background
    voxels, so nothing of the volume's size is allocated. Holes: the enclosed background regions of the
    whole mask are found once; a region enclosed by one component alone is that component's hole and
    is filled directly; only components that share a region with another (one nested in the other's
    hole) are filled crop by crop.

    Speed: the foreground and the enclosed background are labelled at the same time on two threads
    (:func:`scipy.ndimage.label` releases the GIL), unless only one thread may be used
    (:func:`vesselgeom.crosssection.single_threaded`); each slab loop holds its own slab's working memory.
    """
    mask = np.asarray(mask, bool)
    shape = np.array(mask.shape)
    if fill_holes and crosssection._threads() >= 2:
        with ThreadPoolExecutor(max_workers=1) as pool:
            background = pool.submit(enclosed_background, mask)
            flat, labels, _ = label_foreground(mask)
            cavity_ijk, region = background.result()
    else:
        flat, labels, _ = label_foreground(mask)
        if fill_holes and len(flat):
            cavity_ijk, region = enclosed_background(mask)
    if not len(flat):
        return
    if fill_holes:
        owner, nested = _hole_owners(cavity_ijk, region, flat, labels, mask.shape)
        cavity_owner = owner[region] if len(region) else np.zeros(0, np.int64)
    else:
        cavity_ijk, cavity_owner, nested = np.zeros((0, 3), np.int64), np.zeros(0, np.int64), np.zeros(0)
    order = np.argsort(labels, kind="stable")  # by label, raster order within each
    flat, labels = flat[order], labels[order]
    del order
    starts = np.r_[0, np.flatnonzero(np.diff(labels)) + 1]
    sizes = np.diff(np.r_[starts, len(labels)])
    comp_labels = labels[starts]
    del labels
    holes_of = {}
    if len(cavity_owner):
        by = np.argsort(cavity_owner, kind="stable")
        own = cavity_owner[by]
        cuts = np.r_[0, np.flatnonzero(np.diff(own)) + 1, len(own)]
        holes_of = {int(own[a]): cavity_ijk[by[a:b]] for a, b in zip(cuts[:-1], cuts[1:], strict=True)}
    nested_set = set(np.asarray(nested).tolist())
    kept = 0
    for start, size, lab in zip(starts.tolist(), sizes.tolist(), comp_labels.tolist(), strict=True):
        if size < min_voxels:
            continue
        kept += 1
        vox = np.stack(np.unravel_index(flat[start : start + size], mask.shape), axis=1)
        lo = vox.min(axis=0)
        hi = vox.max(axis=0) + 1
        touches = bool(np.any(lo == 0) or np.any(hi == shape))
        crop = np.zeros(tuple(hi - lo + 2), bool)
        local = vox - lo + 1
        crop[local[:, 0], local[:, 1], local[:, 2]] = True
        if lab in holes_of:
            h = holes_of[lab] - lo + 1
            crop[h[:, 0], h[:, 1], h[:, 2]] = True
        if lab in nested_set:
            crop[1:-1, 1:-1, 1:-1] = labelling.fill_holes(crop[1:-1, 1:-1, 1:-1])
        del vox, local  # not held while the consumer works on the component
        yield Component(kept, lo - 1, crop, touches)


def thin(mask: np.ndarray) -> np.ndarray:
    """3D thinning to a one-voxel-wide, 26-connected skeleton (Lee, Kashyap and Chu 1994).

    Guards against a non-empty mask thinning to nothing (even-thickness tubes in some library versions):
    then the voxel deepest inside the mask (largest distance to background) is returned as a one-voxel
    skeleton, which yields no branch, and the caller records a warning.

    References
    ----------
    T.-C. Lee, R. L. Kashyap, C.-N. Chu, "Building skeleton models via 3-D medial surface/axis thinning
    algorithms", CVGIP: Graphical Models and Image Processing 56(6):462-478, 1994.
    """
    skel = skeletonize(mask).astype(bool, copy=False)
    if mask.any() and not skel.any():
        edt = ndimage.distance_transform_cdt(mask, metric="chessboard")
        skel = np.zeros_like(mask)
        skel[np.unravel_index(np.argmax(edt), mask.shape)] = True
    return skel
