"""Per-branch summaries and tortuosity indices from a sampled centreline (pure array maths, mm).

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
from scipy.signal import find_peaks

__all__ = [
    "distance_metric",
    "sum_of_angles",
    "count_inflections",
    "integrate",
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
