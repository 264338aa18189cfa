"""Per-branch summaries and tortuosity indices from a sampled centreline (pure array maths, mm).

Each measure has a one-curve form and a ``*_many`` form for many curves at once. The ``*_many`` forms
take the samples of all curves concatenated, with ``offsets`` (g + 1,) marking curve i as rows
``offsets[i]:offsets[i + 1]``, and repeat the one-curve arithmetic element by element, so they give the
same numbers (sums are taken with numpy's own pairwise summation, see :func:`_group_sum`).

References
----------
E. Bullitt, G. Gerig, S. M. Pizer, W. Lin, S. R. Aylward, "Measuring tortuosity of the intracerebral
vasculature from MRA images", IEEE TMI 22(9):1163-1171, 2003 (distance metric, inflection count metric,
sum of angles metric).
W. E. Hart, M. Goldbaum, B. Cote, P. Kube, M. R. Nelson, "Measurement and classification of retinal
vascular tortuosity", Int J Med Inform 53:239-252, 1999 (curvature integrals).
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = [
    "distance_metric",
    "sum_of_angles",
    "count_inflections",
    "integrate",
    "integrate_many",
    "sum_of_angles_many",
    "count_inflections_many",
]


def integrate(values: np.ndarray, arc: np.ndarray) -> float:
    """Trapezoid integral of ``values`` over ``arc`` (mm); 0 for fewer than two samples."""
    if len(arc) < 2:
        return 0.0
    return float(np.trapezoid(values, arc))


def distance_metric(length_mm: float, chord_mm: float) -> float:
    """Arc length over chord (Bullitt et al. 2003); NaN when the chord is zero or undefined (a loop)."""
    if not np.isfinite(chord_mm) or chord_mm <= 0:
        return float("nan")
    return float(length_mm / chord_mm)


def sum_of_angles(points: np.ndarray, *, closed: bool = False, straight: np.ndarray | None = None) -> float:
    """Sum of angles metric (Bullitt et al. 2003): total in-plane and torsional turning per unit length.

    On consecutive points P_{k-1}, P_k, P_{k+1}, P_{k+2} with T1 = P_k - P_{k-1}, T2 = P_{k+1} - P_k,
    T3 = P_{k+2} - P_{k+1}: IP_k = arccos(T1.T2), TP_k = arccos(unit(T1 x T2) . unit(T2 x T3)),
    CP_k = sqrt(IP_k^2 + TP_k^2), SOAM = sum CP_k / length. TP is set to 0 where either cross product
    vanishes or the caller marks the curve as locally straight (curvature below the noise floor):
    a straight stretch has no osculating plane, and on a smoothed curve its direction is noise.

    Parameters
    ----------
    points : (n, 3) float array, mm
        A smooth curve sampled at a fine, fixed arc-length step.
    closed : bool
        Whether the last point connects to the first.
    straight : (n,) bool array, optional
        Points where the curve counts as straight; TP_k is 0 when P_k or P_{k+1} is straight.

    Returns
    -------
    float
        Radians per mm; NaN for fewer than four points.
    """
    p = np.asarray(points, float)
    if closed:
        p = np.concatenate([p, p[:3]])
    if len(p) < 4:
        return float("nan")
    seg = np.diff(p, axis=0)
    seg_len = _row_norm(seg)
    length = float(seg_len.sum()) if not closed else float(seg_len[: len(points)].sum())
    t1, t2, t3 = seg[:-2], seg[1:-1], seg[2:]
    u1 = t1 / seg_len[:-2, None]
    u2 = t2 / seg_len[1:-1, None]
    ip = np.arccos(np.clip(np.einsum("ij,ij->i", u1, u2), -1.0, 1.0))
    c1, c2 = _row_cross(t1, t2), _row_cross(t2, t3)
    n1, n2 = _row_norm(c1), _row_norm(c2)
    tiny = 1e-12 * seg_len[1:-1] ** 2
    ok = (n1 > tiny) & (n2 > tiny)
    if straight is not None:
        st = np.asarray(straight, bool)
        if closed:
            st = np.concatenate([st, st[:3]])
        ok &= ~(st[1:-2] | st[2:-1])
    cos_tp = np.einsum("ij,ij->i", c1, c2) / np.where(ok, n1 * n2, 1.0)
    tp = np.where(ok, np.arccos(np.clip(cos_tp, -1.0, 1.0)), 0.0)
    cp = np.sqrt(ip**2 + tp**2)
    if closed:
        cp = cp[: len(points)]
    return float(cp.sum() / length) if length > 0 else float("nan")


def _row_norm(v: np.ndarray) -> np.ndarray:
    """Row lengths of (n, 3) v: the same sums, in the same order, as ``np.linalg.norm(v, axis=1)``."""
    x, y, z = v[:, 0], v[:, 1], v[:, 2]
    return np.sqrt(x * x + y * y + z * z)


def _row_cross(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row cross products of (n, 3) arrays with the same products as :func:`numpy.cross`."""
    out = np.empty((len(a), 3))
    out[:, 0] = a[:, 1] * b[:, 2] - a[:, 2] * b[:, 1]
    out[:, 1] = a[:, 2] * b[:, 0] - a[:, 0] * b[:, 2]
    out[:, 2] = a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]
    return out


def count_inflections(
    arc: np.ndarray,
    curvature: np.ndarray,
    binormal: np.ndarray,
    *,
    floor: float,
    dip: float = 0.5,
    end_exclusion_mm: float = 0.0,
    closed: bool = False,
    measured: np.ndarray | None = None,
) -> int:
    """Number of inflections: places where the principal normal reverses between two curved stretches.

    A naive test ("N flips between consecutive samples") misses inflections in 3D noise, where N rotates
    through the inflection rather than flipping. Instead, between each pair of consecutive curvature
    peaks above ``floor``, the curvature minimum counts as an inflection when it is below ``dip`` times
    both peaks and the normals at the two peaks point in opposite directions (negative dot product).
    Minima within ``end_exclusion_mm`` of an open curve's ends are ignored. This rule was measured on
    planar sinusoids (METHODS.md, "Measured for this project"); the underlying definition (a reversal of
    N) is from Bullitt et al. 2003.

    Parameters
    ----------
    arc : (n,) float array, mm
    curvature : (n,) float array, 1/mm
    binormal : (n, 3) float array
        Binormals B = T x N (NaN allowed where curvature is below the floor).
    floor : float, 1/mm
        Curvature noise floor: peaks must exceed it.
    dip : float
        Fraction of both neighbouring peaks the minimum must fall below.
    end_exclusion_mm : float
    closed : bool
        For closed curves the last peak pairs with the first.
    measured : (n,) bool array, optional
        The stretch that counts (e.g. without extrapolated ends); ``end_exclusion_mm`` applies from its
        ends. Default: the whole curve.

    Returns
    -------
    int
    """
    from scipy.signal import find_peaks  # the reference; imported here only (~20 MB)

    k = np.nan_to_num(np.asarray(curvature, float))
    if len(k) < 3:
        return 0
    if closed:
        # peaks of a periodic signal: search on three copies, keep those in the middle copy
        n = len(k)
        peaks3, _ = find_peaks(np.tile(k, 3), height=floor, prominence=floor)
        peaks = np.sort(peaks3[(peaks3 >= n) & (peaks3 < 2 * n)] - n)
    else:
        peaks, _ = find_peaks(k, height=floor, prominence=floor)
    if len(peaks) < 2:
        return 0
    pairs = list(zip(peaks[:-1], peaks[1:], strict=True))
    if closed:
        pairs.append((peaks[-1], peaks[0] + len(k)))
    kk = np.tile(k, 2) if closed else k
    nn = np.concatenate([binormal, binormal]) if closed else binormal
    if measured is not None and measured.any():
        first, last = arc[measured][0], arc[measured][-1]
    else:
        first, last = arc[0], arc[-1]
    count = 0
    for a, b in pairs:
        m = a + int(np.argmin(kk[a : b + 1]))
        if not closed:
            s = arc[m]
            if s < first + end_exclusion_mm or s > last - end_exclusion_mm:
                continue
        if kk[m] >= dip * kk[a] or kk[m] >= dip * kk[b]:
            continue
        if float(np.dot(nn[a], nn[b])) < 0:
            count += 1
    return count


# --------------------------------------------------------------------------- many curves at once


def _as_offsets(offsets: np.ndarray, n_rows: int) -> np.ndarray:
    off = np.asarray(offsets, np.intp)
    if off.ndim != 1 or len(off) < 1 or off[0] != 0 or off[-1] != n_rows or np.any(np.diff(off) < 0):
        raise InputError(
            f"<array>: offsets must rise from 0 to the number of samples ({n_rows}); "
            "pass [0, *np.cumsum(samples_per_curve)]"
        )
    return off


def _offsets_of(counts: np.ndarray) -> np.ndarray:
    """Offsets (g + 1,) of consecutive groups of the given sizes (g,)."""
    off = np.zeros(len(counts) + 1, np.intp)
    np.cumsum(counts, out=off[1:])
    return off


def _group_sum(values: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """``values[offsets[i]:offsets[i + 1]].sum()`` for every group i (0.0 for an empty group).

    In numpy 2, ``np.add.reduceat`` starts each segment from its first element and adds the rest
    pairwise, whereas ``ndarray.sum`` adds the whole segment pairwise; a 0.0 put in front of each segment
    makes the two the same sequence of additions, so the sums match ``ndarray.sum`` of each group (and
    otherwise differ only by summation order, well within 1e-12 relative for the positive sums here).
    """
    counts = offsets[1:] - offsets[:-1]
    g = len(counts)
    if g == 0:
        return np.zeros(0)
    buf = np.zeros(len(values) + g)
    buf[np.arange(len(values)) + np.repeat(np.arange(1, g + 1), counts)] = values
    return np.add.reduceat(buf, offsets[:-1] + np.arange(g))


def _pair_keep(offsets: np.ndarray) -> np.ndarray:
    """(n - 1,) bool: whether rows j and j + 1 belong to the same group."""
    n = int(offsets[-1])
    keep = np.ones(max(n - 1, 0), bool)
    cut = offsets[1:-1] - 1
    keep[cut[(cut >= 0) & (cut < n - 1)]] = False
    return keep


def integrate_many(values: np.ndarray, arc: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """:func:`integrate` of every group: trapezoid integrals of ``values`` over ``arc`` (mm).

    Parameters
    ----------
    values, arc : (n,) float arrays
        Samples of all groups, concatenated; ``arc`` in mm.
    offsets : (g + 1,) int array
        Group i is rows ``offsets[i]:offsets[i + 1]``.

    Returns
    -------
    (g,) float array
        0 for a group of fewer than two samples.
    """
    values = np.asarray(values, float)
    arc = np.asarray(arc, float)
    off = _as_offsets(offsets, len(arc))
    # the same terms as np.trapezoid: d * (y[1:] + y[:-1]) / 2.0
    terms = (np.diff(arc) * (values[1:] + values[:-1]) / 2.0)[_pair_keep(off)]
    per = np.maximum(off[1:] - off[:-1] - 1, 0)
    return _group_sum(terms, _offsets_of(per))


def sum_of_angles_many(
    points: np.ndarray,
    offsets: np.ndarray,
    *,
    closed: bool | np.ndarray = False,
    straight: np.ndarray | None = None,
) -> np.ndarray:
    """:func:`sum_of_angles` of every group (Bullitt et al. 2003), in rad/mm.

    Parameters
    ----------
    points : (n, 3) float array, mm
        Samples of all curves, concatenated.
    offsets : (g + 1,) int array
        Curve i is rows ``offsets[i]:offsets[i + 1]``.
    closed : bool or (g,) bool array
        Whether each curve's last point connects to its first.
    straight : (n,) bool array, optional
        Points where the curve counts as straight (see :func:`sum_of_angles`).

    Returns
    -------
    (g,) float array
        NaN for a curve of fewer than four points (closed: counting the three repeated ones).
    """
    p = np.asarray(points, float)
    off = _as_offsets(offsets, len(p))
    n = off[1:] - off[:-1]
    g = len(n)
    closed = np.broadcast_to(np.asarray(closed, bool), (g,))
    # each curve as sum_of_angles sees it: closed ones followed by their first (up to) three points
    e = n + np.where(closed, np.minimum(n, 3), 0)
    eoff = _offsets_of(e)
    eg = np.repeat(np.arange(g), e)
    local = np.arange(eoff[-1]) - eoff[eg]
    src = off[eg] + np.where(local < n[eg], local, local - n[eg])
    p = p[src]
    seg = np.diff(p, axis=0)
    seg_len = _row_norm(seg)
    t1, t2, t3 = seg[:-2], seg[1:-1], seg[2:]
    u1 = t1 / seg_len[:-2, None]
    u2 = t2 / seg_len[1:-1, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        ip = np.arccos(np.clip(np.einsum("ij,ij->i", u1, u2), -1.0, 1.0))
        c1, c2 = _row_cross(t1, t2), _row_cross(t2, t3)
        n1, n2 = _row_norm(c1), _row_norm(c2)
        tiny = 1e-12 * seg_len[1:-1] ** 2
        ok = (n1 > tiny) & (n2 > tiny)
        if straight is not None:
            st = np.asarray(straight, bool)[src]
            ok &= ~(st[1:-2] | st[2:-1])
        cos_tp = np.einsum("ij,ij->i", c1, c2) / np.where(ok, n1 * n2, 1.0)
        tp = np.where(ok, np.arccos(np.clip(cos_tp, -1.0, 1.0)), 0.0)
        cp = np.sqrt(ip**2 + tp**2)
    # segments j (and angles j) of curve i start at eoff[i]; a closed curve keeps its first n of each
    n_seg = np.where(closed, np.minimum(n, e - 1), e - 1).clip(min=0)
    n_ang = np.where(closed, np.minimum(n, e - 3), e - 3).clip(min=0)
    length = _group_sum(seg_len[_ranges(eoff[:-1], n_seg)], _offsets_of(n_seg))
    total = _group_sum(cp[_ranges(eoff[:-1], n_ang)], _offsets_of(n_ang))
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(length > 0, total / np.where(length > 0, length, 1.0), np.nan)
    return np.where(e >= 4, out, np.nan)


def _ranges(starts: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Concatenated ``np.arange(s, s + l)`` for every (s, l)."""
    lengths = np.asarray(lengths, np.intp)
    total = int(lengths.sum())
    first = np.cumsum(lengths) - lengths
    return np.repeat(np.asarray(starts, np.intp) - first, lengths) + np.arange(total)


def _find_peaks_many(x: np.ndarray, offsets: np.ndarray, floor: float) -> np.ndarray:
    """Positions of ``scipy.signal.find_peaks(x[a:b], height=floor, prominence=floor)`` in every group.

    Local maxima follow scipy's rule: a maximal run of equal samples with a lower sample on each side
    (so never at a group's ends), placed at the run's middle (rounded down). The prominence of a peak is
    its height less the higher of the lowest samples on either side before a strictly higher sample (or
    the group's end). Peaks lower than ``floor`` can never stop that search for a peak that reaches
    ``floor``, so only the peaks that reach ``floor`` are searched, and the lowest sample on a side is
    the lowest of the valleys (minima between consecutive such peaks) passed on the way.

    Returns
    -------
    (p,) int array
        Sorted positions in ``x``.
    """
    n_all = len(x)
    counts = offsets[1:] - offsets[:-1]
    gid = np.repeat(np.arange(len(counts)), counts)
    if n_all < 3:
        return np.zeros(0, np.intp)
    new_run = np.ones(n_all, bool)
    new_run[1:] = x[1:] != x[:-1]
    starts = offsets[:-1][counts > 0]
    new_run[starts] = True
    rs = np.flatnonzero(new_run)
    re = np.append(rs[1:], n_all) - 1
    v, rg = x[rs], gid[rs]
    peak = np.zeros(len(rs), bool)
    if len(rs) >= 3:
        same = (rg[:-2] == rg[1:-1]) & (rg[2:] == rg[1:-1])
        peak[1:-1] = same & (v[:-2] < v[1:-1]) & (v[2:] < v[1:-1])
    peak &= v >= floor
    pos = (rs[peak] + re[peak]) // 2
    if not len(pos):
        return pos
    pg = gid[pos]
    h = x[pos]
    # valleys: per group with peaks, the minima of [start, q0), [q0, q1), ..., [q_last, end)
    groups, first_peak, m = np.unique(pg, return_index=True, return_counts=True)
    t = np.arange(len(pos)) - np.repeat(first_peak, m)
    bo = _offsets_of(m + 2)
    bounds = np.empty(bo[-1], np.intp)
    bounds[bo[:-1]] = offsets[groups]
    bounds[bo[1:] - 1] = offsets[groups + 1]
    rank = np.repeat(np.arange(len(groups)), m)
    vb = bo[:-1][rank]
    bounds[vb + 1 + t] = pos
    valley = np.minimum.reduceat(np.append(x, np.inf), bounds)
    left, right = valley[vb + t], valley[vb + t + 1]
    mp = m[rank]
    for side in (-1, 1):
        acc = left if side < 0 else right
        act = np.arange(len(pos))
        d = 1
        while act.size:
            tt = t[act] + side * d
            act = act[(tt >= 0) & (tt < mp[act])]
            act = act[h[act + side * d] <= h[act]]
            # passing a peak no higher: its far valley is on the way
            far = vb[act] + t[act] + side * d + (side > 0)
            acc[act] = np.minimum(acc[act], valley[far])
            d += 1
    prominence = h - np.maximum(left, right)
    return pos[prominence >= floor]


def count_inflections_many(
    arc: np.ndarray,
    curvature: np.ndarray,
    binormal: np.ndarray,
    offsets: np.ndarray,
    *,
    floor: float,
    dip: float = 0.5,
    end_exclusion_mm: float | np.ndarray = 0.0,
    closed: bool | np.ndarray = False,
    measured: np.ndarray | None = None,
) -> np.ndarray:
    """:func:`count_inflections` of every group, by the same rule and with the same counts.

    Parameters
    ----------
    arc : (n,) float array, mm
    curvature : (n,) float array, 1/mm
    binormal : (n, 3) float array
    offsets : (g + 1,) int array
        Curve i is rows ``offsets[i]:offsets[i + 1]``.
    floor : float, 1/mm
    dip : float
    end_exclusion_mm : float or (g,) float array, mm
    closed : bool or (g,) bool array
    measured : (n,) bool array, optional

    Returns
    -------
    (g,) int array
    """
    arc = np.asarray(arc, float)
    off = _as_offsets(offsets, len(arc))
    n = off[1:] - off[:-1]
    g = len(n)
    closed = np.broadcast_to(np.asarray(closed, bool), (g,))
    excl = np.broadcast_to(np.asarray(end_exclusion_mm, float), (g,))
    k = np.nan_to_num(np.asarray(curvature, float))
    binormal = np.asarray(binormal, float)
    # the signal searched for peaks: k itself, or three copies of it for a closed curve
    span = np.where(n < 3, 0, np.where(closed, 3 * n, n))
    soff = _offsets_of(span)
    sg = np.repeat(np.arange(g), span)
    local = np.arange(soff[-1]) - soff[sg]
    src = off[sg] + local % np.maximum(n[sg], 1)
    x = k[src]
    pos = _find_peaks_many(x, soff, floor)
    pg = sg[pos]
    loc = pos - soff[pg]
    keep = ~closed[pg] | ((loc >= n[pg]) & (loc < 2 * n[pg]))
    pos, pg = pos[keep], pg[keep]
    counts = np.bincount(pg, minlength=g)
    # consecutive peaks, and for closed curves the last with the first one period on
    same = pg[1:] == pg[:-1]
    a, b, grp = pos[:-1][same], pos[1:][same], pg[:-1][same]
    groups, first = np.unique(pg, return_index=True)
    last = np.append(first[1:], len(pos)) - 1
    wrap = closed[groups] & (counts[groups] >= 2)
    a = np.concatenate([a, pos[last[wrap]]])
    b = np.concatenate([b, pos[first[wrap]] + n[groups[wrap]]])
    grp = np.concatenate([grp, groups[wrap]])
    if not len(a):
        return np.zeros(g, np.intp)
    # first minimum of x[a..b] (b inclusive)
    lens = b - a + 1
    idx = _ranges(a, lens)
    vals = x[idx]
    seg = np.cumsum(lens) - lens
    low = np.minimum.reduceat(vals, seg)
    at = np.minimum.reduceat(np.where(vals == np.repeat(low, lens), idx, len(x)), seg)
    ok = ~((x[at] >= dip * x[a]) | (x[at] >= dip * x[b]))
    # minima near the ends of an open curve's measured stretch do not count
    if measured is not None:
        mi = np.flatnonzero(np.asarray(measured, bool))
        lo_i = np.searchsorted(mi, off[:-1])
        hi_i = np.searchsorted(mi, off[1:]) - 1
        has = (lo_i < len(mi)) & (lo_i <= hi_i)
        mi_safe = np.append(mi, 0)
        first_i = np.where(has, mi_safe[np.minimum(lo_i, len(mi))], off[:-1])
        last_i = np.where(has, mi_safe[np.clip(hi_i, 0, len(mi))], off[1:] - 1)
    else:
        first_i, last_i = off[:-1], off[1:] - 1
    s = arc[src[at]]
    lo_s = arc[np.clip(first_i[grp], 0, len(arc) - 1)] + excl[grp]
    hi_s = arc[np.clip(last_i[grp], 0, len(arc) - 1)] - excl[grp]
    ok &= closed[grp] | ~((s < lo_s) | (s > hi_s))
    ba, bb = binormal[src[a]], binormal[src[b]]
    dot = np.einsum("ij,ij->i", ba, bb)
    # only the sign matters; where rounding could change it, take the dot product exactly as
    # count_inflections does
    for i in np.flatnonzero(ok & (np.abs(dot) <= 1e-12)):
        dot[i] = float(np.dot(ba[i], bb[i]))
    ok &= dot < 0
    return np.bincount(grp[ok], minlength=g)
