"""Mask preparation and thinning, in voxel index space.

The mask is split into 26-connected components; each is cropped to its bounding box (plus a one-voxel
border), cleaned and thinned on its own, so cost follows the foreground rather than the full volume.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from skimage.morphology import skeletonize

__all__ = ["Component", "iter_components", "thin"]

_FULL = np.ones((3, 3, 3), dtype=bool)
_SIX = ndimage.generate_binary_structure(3, 1)


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


def _label(mask: np.ndarray, structure: np.ndarray) -> tuple[np.ndarray, int]:
    """:func:`scipy.ndimage.label` into the smallest unsigned type that holds the labels (memory)."""
    for dtype in (np.uint8, np.uint16, np.int32):
        out = np.empty(mask.shape, dtype)
        try:
            n = ndimage.label(mask, structure=structure, output=out)
        except RuntimeError:  # more labels than the type holds
            continue
        return out, int(n)
    raise AssertionError("unreachable: int32 holds any label count of an array")


def _cavities(mask: np.ndarray) -> np.ndarray:
    """Index coordinates (k, 3) of the background voxels not 6-connected to the array's outside.

    Every hole of a single component (what :func:`scipy.ndimage.binary_fill_holes` fills in its crop)
    is either such a voxel or a voxel of another component, and a component enclosed in a hole leaves
    background around it that is such a voxel too; so a component whose box holds none of these has
    no hole. One labelling of the background replaces a fill per component.
    """
    bg, n = _label(np.pad(~mask, 1, constant_values=True), _SIX)
    if n <= 1:  # the outside only
        return np.zeros((0, 3), np.intp)
    return np.argwhere((bg != 0) & (bg != bg[0, 0, 0])) - 1


def _fill_holes(crop: np.ndarray) -> np.ndarray:
    """:func:`scipy.ndimage.binary_fill_holes` (6-connected background) by one labelling of the background."""
    bg, _ = _label(np.pad(~crop, 1, constant_values=True), _SIX)
    outside = bg[0, 0, 0]
    return ~(bg[1:-1, 1:-1, 1:-1] == outside)


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
    Memory: the labels are computed on the foreground's bounding box in the smallest integer type that
    holds them, then reduced to the foreground voxels' flat indices grouped by component (8 bytes per
    foreground voxel), so nothing of the volume's size is kept while the components are processed.
    """
    mask = np.asarray(mask, bool)
    shape = np.array(mask.shape)
    nz = [np.flatnonzero(mask.any(axis=tuple(j for j in range(3) if j != i))) for i in range(3)]
    if any(a.size == 0 for a in nz):
        return
    lo_box = np.array([a[0] for a in nz])
    hi_box = np.array([a[-1] + 1 for a in nz])
    box = tuple(slice(a, b) for a, b in zip(lo_box, hi_box, strict=True))
    sub = mask[box]
    cavities = _cavities(sub) + lo_box if fill_holes else np.zeros((0, 3), np.intp)
    labels, n = _label(sub, _FULL)
    flat = np.flatnonzero(labels)
    lab = labels.ravel()[flat]
    del labels
    order = np.argsort(lab, kind="stable")  # by label, raster order within each
    flat, lab = flat[order], lab[order]
    ijk = np.stack(np.unravel_index(flat, sub.shape), axis=1) + lo_box
    del flat
    starts = np.r_[0, np.flatnonzero(np.diff(lab)) + 1]
    sizes = np.diff(np.r_[starts, len(lab)])
    kept = 0
    for start, size in zip(starts.tolist(), sizes.tolist(), strict=True):
        if size < min_voxels:
            continue
        kept += 1
        vox = ijk[start : start + size]
        lo = vox.min(axis=0)
        hi = vox.max(axis=0) + 1
        touches = bool(np.any(lo == 0) or np.any(hi == shape))
        crop = np.zeros(tuple(hi - lo + 2), bool)
        local = vox - lo + 1
        crop[local[:, 0], local[:, 1], local[:, 2]] = True
        if cavities.size and np.any(np.all((cavities >= lo) & (cavities < hi), axis=1)):
            crop[1:-1, 1:-1, 1:-1] = _fill_holes(crop[1:-1, 1:-1, 1:-1])
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
    skel = skeletonize(mask).astype(bool)
    if mask.any() and not skel.any():
        edt = ndimage.distance_transform_cdt(mask, metric="chessboard")
        skel = np.zeros_like(mask)
        skel[np.unravel_index(np.argmax(edt), mask.shape)] = True
    return skel
