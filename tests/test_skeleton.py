"""Tests for vesselgeom.skeleton.iter_components against scipy's reference operations.

Reference: for each 26-connected component (:func:`scipy.ndimage.label` with a full 3x3x3 structure,
:func:`scipy.ndimage.find_objects`), the component alone in its bounding box, holes filled by
:func:`scipy.ndimage.binary_fill_holes`, padded by one background voxel.
"""

from __future__ import annotations

import threading

import numpy as np
import pytest
from scipy import ndimage

from vesselgeom import skeleton
from vesselgeom.skeleton import iter_components


def _reference(mask: np.ndarray, min_voxels: float, fill: bool) -> list[tuple[np.ndarray, np.ndarray, bool]]:
    labels, n = ndimage.label(mask, structure=np.ones((3, 3, 3)))
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    out = []
    for lab, box in enumerate(ndimage.find_objects(labels), start=1):
        if sizes[lab] < min_voxels:
            continue
        lo = np.array([s.start for s in box])
        hi = np.array([s.stop for s in box])
        crop = labels[box] == lab
        if fill:
            crop = ndimage.binary_fill_holes(crop)
        touches = bool(np.any(lo == 0) or np.any(hi == np.array(mask.shape)))
        out.append((lo - 1, np.pad(crop, 1), touches))
    return out


def _shells() -> np.ndarray:
    """A hollow ball holding a smaller ball in its cavity, a cube with a cavity at the array corner."""
    z, y, x = np.mgrid[:40, :40, :40]
    r = np.sqrt((z - 20) ** 2 + (y - 20) ** 2 + (x - 20) ** 2)
    m = ((r < 12) & (r > 8)) | (r < 3)
    m[0:5, 0:5, 0:5] = True
    m[1:4, 1:4, 1:4] = False
    return m


@pytest.mark.parametrize("threads", [1, 2])
@pytest.mark.parametrize("slab", [None, 64])
@pytest.mark.parametrize("fill", [True, False])
@pytest.mark.parametrize("case", ["shells", "sparse", "dense", "empty"])
def test_components_match_scipy_reference(case, fill, slab, threads, monkeypatch):
    # threads: foreground and enclosed background labelled one after the other, or at the same time
    monkeypatch.setattr("vesselgeom.crosssection._THREADS", threads)
    where = []  # the thread that labelled the enclosed background (standard library's threading)
    real = skeleton.enclosed_background

    def spy(*args, **kwargs):
        where.append(threading.get_ident())
        return real(*args, **kwargs)

    monkeypatch.setattr(skeleton, "enclosed_background", spy)
    if slab:  # labels computed in thin slabs: every few planes a seam to join across
        monkeypatch.setattr("vesselgeom.labelling._SLAB_VOXELS", slab * mask_plane(case))
    rng = np.random.default_rng(3)
    mask = {
        "shells": _shells(),
        "sparse": rng.random((30, 31, 32)) > 0.75,
        "dense": rng.random((30, 31, 32)) > 0.45,
        "empty": np.zeros((5, 6, 7), bool),
    }[case]
    got = list(iter_components(mask, min_voxels=4, fill_holes=fill))
    ref = _reference(mask, 4, fill)
    if fill and case != "empty":
        assert len(where) == 1 and (where[0] != threading.get_ident()) == (threads == 2)
    assert len(got) == len(ref)
    for i, (comp, (offset, crop, touches)) in enumerate(zip(got, ref, strict=True), start=1):
        assert comp.component_id == i
        np.testing.assert_array_equal(comp.offset, offset)
        np.testing.assert_array_equal(comp.mask, crop)
        assert comp.touches_border == touches
    if case == "shells" and fill:
        # the hollow ball's cavity, and the ball inside it, are filled in the hollow ball's crop
        ball = got[1]  # components in raster order: the corner cube, the hollow ball, the inner ball
        for point in ([20, 20, 20], [20, 20, 26]):  # centre (inner ball) and cavity (r = 6)
            assert not mask[tuple(point)] or point == [20, 20, 20]
            assert ball.mask[tuple(np.array(point) - ball.offset)]


def mask_plane(case: str) -> int:
    return 40 * 40 if case == "shells" else (31 * 32 if case in ("sparse", "dense") else 6 * 7)


def test_component_nested_in_a_cavity_and_a_plain_hole():
    # a solid ball inside a hollow ball's cavity shares that cavity (filled by the crop fill of the hollow
    # ball); a cube with a plain cavity owns it alone (filled directly); both as binary_fill_holes
    m = _shells()
    comps = list(iter_components(m, min_voxels=1))
    cube = comps[0]
    assert cube.mask[1:6, 1:6, 1:6].all()  # cavity [1:4]^3 of the corner cube filled; offset is -1
    np.testing.assert_array_equal(cube.mask[1:-1, 1:-1, 1:-1], ndimage.binary_fill_holes(m[0:5, 0:5, 0:5]))


def test_many_components_use_wider_labels():
    # more than 255 components: labels no longer fit one byte (scipy raises; a wider type is used)
    mask = np.zeros((4, 40, 40), bool)
    mask[1, ::2, ::2] = True
    assert len(list(iter_components(mask, min_voxels=1))) == 400
