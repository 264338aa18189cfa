"""Accuracy of the pipeline on voxelised analytic phantoms, as a table of errors per case.

Used by the tests, by ``docs/make_validation.py`` (which writes ``docs/validation.md``) and by users who
want the expected error at their own voxel size and vessel radius. Every error is measured against the
phantom's analytic truth (:mod:`vesselgeom.phantoms`), whose own numbers are checked against closed forms
in ``tests/test_phantoms.py``.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from . import phantoms as P
from .pipeline import analyze
from .settings import Settings

__all__ = [
    "Case",
    "standard_cases",
    "run_case",
    "run_cases",
    "SINUSOID_WAVELENGTH_RADII",
    "curve_for",
]

SINUSOID_WAVELENGTH_RADII = 20.0


@dataclass(frozen=True)
class Case:
    """One phantom configuration: curve class, tube radius in voxels, voxel spacing, affine seed."""

    curve: str
    radius_voxels: float
    spacing: tuple[float, float, float]
    seed: int
    flip: bool = False
    permute: bool = False

    @property
    def anisotropy(self) -> float:
        return max(self.spacing) / min(self.spacing)

    @property
    def radius_mm(self) -> float:
        # "radius >= N voxels along every axis": measured in the coarsest voxel dimension
        return self.radius_voxels * max(self.spacing)


def curve_for(name: str, radius_mm: float) -> P.Curve:
    """The analytic curve of a phantom class, scaled to the tube radius.

    Shapes are fixed relative to the tube radius r, so that the radius in voxels alone sets the
    resolution: helix a = 5r, b = 1.5r (two turns; kappa r = 0.18, tau r = 0.055); sinusoid with
    wavelength 20r and k = 2 pi A / lambda = 1 (three periods; the METHODS.md check value
    L / lambda = 1.2160067; smallest radius of curvature 3.2r); ring R = 6r; straight 20r.
    """
    r = radius_mm
    lam = SINUSOID_WAVELENGTH_RADII * r
    return {
        "helix_right": lambda: P.helix(5 * r, 1.5 * r, turns=2),
        "helix_left": lambda: P.helix(5 * r, 1.5 * r, turns=2, right_handed=False),
        "sinusoid": lambda: P.sinusoid(lam / (2 * np.pi), lam, periods=3),
        "ring": lambda: P.ring(6 * r),
        "straight": lambda: P.straight(20 * r),
    }[name]()


def standard_cases(
    *,
    curves: Sequence[str] = ("helix_right", "helix_left", "sinusoid", "ring", "straight"),
    radii_voxels: Sequence[float] = (2.0, 3.0),
    spacings: Sequence[tuple[float, float, float]] = ((1.0, 1.0, 1.0), (0.5, 0.5, 1.0)),
    seeds: Iterable[int] = (0, 1),
) -> list[Case]:
    """The validation grid: every curve x radius x spacing x affine, alternating flips and permutations."""
    cases = []
    for c in curves:
        for r in radii_voxels:
            for sp in spacings:
                for s in seeds:
                    cases.append(Case(c, r, tuple(sp), s, flip=s % 2 == 1, permute=s % 3 == 2))
    return cases


def run_case(case: Case, *, settings: Settings | None = None) -> dict:
    """Analyse one phantom and return its errors against the truth (relative unless named _abs)."""
    curve = curve_for(case.curve, case.radius_mm)
    rot = P.random_rotation(case.seed, flip=case.flip, permute=case.permute)
    ph = P.tube_phantom(curve, case.radius_mm, spacing=case.spacing, rotation=rot)
    res = analyze(ph.mask, affine=ph.affine, settings=settings)
    truth = ph.branches[0]
    b = res.branches
    pts = res.points[res.points["in_summary"]]
    row = {
        "curve": case.curve,
        "radius_voxels": case.radius_voxels,
        "spacing": "x".join(f"{v:g}" for v in case.spacing),
        "anisotropy": case.anisotropy,
        "seed": case.seed,
        "flip": case.flip,
        "n_branches": len(b),
        "n_junctions": len(res.junctions),
    }
    if len(b) != 1:
        return row
    m = b.iloc[0]

    def rel(est: float, true: float) -> float:
        return float(est / true - 1.0) if true != 0 else float("nan")

    stretch = _truth_over_stretch(curve, pts[["x_mm", "y_mm", "z_mm"]].to_numpy())
    row.update(
        kind=m["kind"],
        # the summary covers the measured stretch, so it is compared with the truth over that stretch
        curvature_err=rel(m["mean_curvature_per_mm"], stretch),
        curvature_err_whole=rel(m["mean_curvature_per_mm"], truth.mean_curvature_per_mm),
        true_curvature_stretch_per_mm=stretch,
        curvature_abs_per_mm=float(m["mean_curvature_per_mm"]),
        torsion_err=rel(m["mean_torsion_per_mm"], truth.mean_torsion_per_mm),
        torsion_abs_per_mm=float(m["mean_torsion_per_mm"]),
        length_err_mm=float(m["length_mm"] - truth.length_mm),
        length_err_radii=float((m["length_mm"] - truth.length_mm) / case.radius_mm),
        length_err=rel(m["length_mm"], truth.length_mm),
        dm_err=rel(m["distance_metric"], truth.distance_metric),
        dm=float(m["distance_metric"]),
        inflections=int(m["inflection_count"]),
        inflections_true=int(truth.inflection_count),
        radius_err_voxels=float((m["mean_radius_mm"] - case.radius_mm) / max(case.spacing)),
        true_curvature_per_mm=truth.mean_curvature_per_mm,
        true_torsion_per_mm=truth.mean_torsion_per_mm,
    )
    return row


def _truth_over_stretch(curve: P.Curve, points: np.ndarray) -> float:
    """Analytic mean curvature over the part of the curve that ``points`` (in order) cover.

    Each end point is mapped to the nearest parameter of a dense sampling of the curve; for a closed
    curve the stretch is the whole curve.
    """
    if curve.closed or len(points) < 2:
        return P.curve_truth(curve, radius_mm=1.0).mean_curvature_per_mm
    t = np.linspace(curve.t0, curve.t1, 200001)
    tree = cKDTree(curve.r(t))
    ta, tb = sorted(t[tree.query(points[[0, -1]])[1]])
    sub = P.Curve(curve.name, curve.r, curve.d1, curve.d2, curve.d3, ta, tb)
    return P.curve_truth(sub, radius_mm=1.0).mean_curvature_per_mm


def _fmt_pct(x: pd.Series) -> str:
    x = x.dropna()
    if x.empty:
        return "-"
    return f"{100 * np.max(np.abs(x)):.1f} ({100 * np.median(np.abs(x)):.1f})"


def _range(x: pd.Series) -> str:
    return f"{x.min():+.2f} .. {x.max():+.2f}"


def summarise(df: pd.DataFrame) -> pd.DataFrame:
    """One row per phantom class, radius in voxels and anisotropy: formatted errors (docs table)."""
    rows = []
    for (curve, rv, an), g in df.groupby(["curve", "radius_voxels", "anisotropy"]):
        rows.append(
            {
                "phantom": curve,
                "radius (voxels)": f"{rv:g}",
                "anisotropy": f"{an:g}:1",
                "cases": len(g),
                "branches ok": f"{(g.n_branches == 1).sum()}/{len(g)}",
                "curvature % max (median)": _fmt_pct(g.curvature_err),
                "curvature vs whole curve %": _fmt_pct(g.curvature_err_whole),
                "torsion % max (median)": _fmt_pct(g.torsion_err),
                "length error / radius, range": _range(g.length_err_radii),
                "DM % max (median)": _fmt_pct(g.dm_err),
                "inflections exact": f"{(g.inflections == g.inflections_true).sum()}/{len(g)}",
                "radius bias (voxels), range": _range(g.radius_err_voxels),
            }
        )
    return pd.DataFrame(rows)


def statement(df: pd.DataFrame, *, source: str = "docs/validation.md") -> str:
    """One-paragraph accuracy statement over the cases in ``df`` (the worst case of each measure)."""
    ok = df[df.n_branches == 1]
    exact = int((ok.inflections == ok.inflections_true).sum())
    lo, hi = df.radius_voxels.min(), df.radius_voxels.max()
    radii = f"{lo:g}" if lo == hi else f"{lo:g}-{hi:g}"
    return (
        f"On {len(df)} voxelised analytic phantoms (helices of both hands, sinusoids, rings, straight "
        f"tubes; radius {radii} voxels; anisotropy up to "
        f"{df.anisotropy.max():g}:1; rotated, flipped and permuted affines) the branch graph was correct in "
        f"{len(ok)}/{len(df)} cases; the largest errors were: mean curvature "
        f"{100 * ok.curvature_err.abs().max():.1f} %, torsion {100 * ok.torsion_err.abs().max():.1f} %, "
        f"distance metric {100 * ok.dm_err.abs().max():.1f} %, length {ok.length_err_radii.min():+.2f} to "
        f"{ok.length_err_radii.max():+.2f} tube radii; inflection counts were exact in {exact}/{len(ok)} "
        f"cases ({source})."
    )


def write_summary_json(df: pd.DataFrame, table: pd.DataFrame, path=None):
    """Write ``vesselgeom/data/validation_summary.json`` (read by reports and ``accuracy``)."""
    import json
    from pathlib import Path

    from . import __version__

    path = Path(path or Path(__file__).resolve().parent / "data" / "validation_summary.json")
    path.parent.mkdir(parents=True, exist_ok=True)
    doc = {
        "version": __version__,
        "settings": Settings().to_dict(),
        "cases": int(len(df)),
        "statement": statement(df),
        "rows": table.to_dict(orient="records"),
    }
    path.write_text(json.dumps(doc, indent=1) + "\n")
    return path


def accuracy(spacing, radius_mm: float, *, seeds=(0, 1, 2), settings: Settings | None = None) -> pd.DataFrame:
    """Expected errors at the user's voxel size and vessel radius: the phantom family run there.

    The cases are the same as the validation grid's for that spacing and radius (same curves, seeds,
    flips and permutations), so the numbers match ``docs/validation.md`` where the grids overlap.
    """
    sp = tuple(float(v) for v in spacing)
    cases = standard_cases(radii_voxels=(radius_mm / max(sp),), spacings=(sp,), seeds=seeds)
    return run_cases(cases, settings=settings)


def run_cases(cases: Iterable[Case], *, settings: Settings | None = None) -> pd.DataFrame:
    """:func:`run_case` over many cases, one row each."""
    return pd.DataFrame([run_case(c, settings=settings) for c in cases])
