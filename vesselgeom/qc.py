"""Quality-control pictures: the centreline over maximum-intensity projections of the mask.

``qc.png`` shows three maximum-intensity projections of the mask (one along each voxel axis), drawn in mm
(voxel index x voxel size), with the centreline coloured by curvature, branch ends and junctions marked,
a millimetre scale bar and the research-use line. For oblique affines the panels are in the voxel
grid's own axes, scaled by the voxel sizes. ``--plots`` adds one profile figure per branch.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd

from .caution import CAUTION
from .io.affine import voxel_sizes

__all__ = ["qc_figure", "profile_figures"]

_CAPTION = CAUTION
_AXES = ("i", "j", "k")


def _figure(**kwargs):
    """A matplotlib Figure on the Agg canvas (matplotlib is imported here, only when drawing: ~30 MB)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(**kwargs)
    FigureCanvasAgg(fig)
    return fig


def _nice_length(span: float) -> float:
    """A round scale-bar length (1, 2 or 5 x 10^n mm) near a fifth of ``span``."""
    target = max(span / 5.0, 1e-9)
    exp = np.floor(np.log10(target))
    for m in (5.0, 2.0, 1.0):
        if m * 10**exp <= target:
            return float(m * 10**exp)
    return float(10**exp)


def qc_figure(
    mask: np.ndarray,
    affine: np.ndarray,
    points: pd.DataFrame,
    branches: pd.DataFrame,
    junctions: pd.DataFrame,
    path: str | os.PathLike[str],
    *,
    title: str = "",
) -> Path:
    """Write ``qc.png``: three projections with the centreline, ends, junctions and a scale bar."""
    path = Path(path)
    size = voxel_sizes(affine)
    inv = np.linalg.inv(affine)

    def to_index(xyz: np.ndarray) -> np.ndarray:
        return xyz @ inv[:3, :3].T + inv[:3, 3]

    cl = to_index(points[["x_mm", "y_mm", "z_mm"]].to_numpy(float)) if len(points) else np.zeros((0, 3))
    kappa = points["curvature_per_mm"].to_numpy(float) if len(points) else np.zeros(0)
    vmax = float(np.nanpercentile(kappa, 95)) if kappa.size else 1.0
    junction_ids = set(junctions["node_id"].astype(int)) if len(junctions) else set()
    end_xyz = []
    for which in ("start", "end"):
        node = branches[f"{which}_node"]
        free = node.isna() | ~node.fillna(-1).astype(int).isin(junction_ids)
        free &= branches["kind"] != "loop"
        end_xyz.append(branches.loc[free, [f"{which}_{a}_mm" for a in "xyz"]].to_numpy(float))
    ends = to_index(np.concatenate(end_xyz)) if end_xyz else np.zeros((0, 3))
    ends = ends[np.all(np.isfinite(ends), axis=1)]
    junc = (
        to_index(junctions[["x_mm", "y_mm", "z_mm"]].to_numpy(float)) if len(junctions) else np.zeros((0, 3))
    )

    fig = _figure(figsize=(13, 5.0), dpi=110, layout="constrained")
    axes = fig.subplots(1, 3)
    scatter = None
    for ax, along in zip(axes, range(3), strict=True):
        rows, cols = [a for a in range(3) if a != along]
        mip = mask.max(axis=along)
        h, w = mip.shape[0] * size[rows], mip.shape[1] * size[cols]
        ax.imshow(mip, cmap="gray_r", vmin=0, vmax=3, extent=(0, w, h, 0), interpolation="nearest")
        if len(cl):
            scatter = ax.scatter(
                cl[:, cols] * size[cols] + size[cols] / 2,
                cl[:, rows] * size[rows] + size[rows] / 2,
                c=kappa,
                s=2,
                cmap="plasma",
                vmin=0,
                vmax=vmax,
                linewidths=0,
            )
        for pts, style in (
            (ends, dict(marker="o", s=18, facecolors="none", edgecolors="tab:green")),
            (junc, dict(marker="s", s=16, facecolors="none", edgecolors="tab:blue")),
        ):
            if len(pts):
                ax.scatter(
                    pts[:, cols] * size[cols] + size[cols] / 2,
                    pts[:, rows] * size[rows] + size[rows] / 2,
                    linewidths=1.0,
                    **style,
                )
        bar = _nice_length(w)
        x0, y0 = 0.05 * w, 0.95 * h
        ax.plot([x0, x0 + bar], [y0, y0], color="black", linewidth=3)
        ax.text(x0 + bar / 2, y0 - 0.02 * h, f"{bar:g} mm", ha="center", va="bottom", fontsize=8)
        ax.set_title(f"projection along voxel axis {_AXES[along]}", fontsize=9)
        ax.set_xlabel(f"axis {_AXES[cols]} (mm)", fontsize=8)
        ax.set_ylabel(f"axis {_AXES[rows]} (mm)", fontsize=8)
        ax.tick_params(labelsize=7)
        ax.set_xlim(0, w)
        ax.set_ylim(h, 0)
    if scatter is not None:
        cbar = fig.colorbar(scatter, ax=list(axes), shrink=0.8, pad=0.01)
        cbar.set_label("curvature (1/mm)", fontsize=8)
        cbar.ax.tick_params(labelsize=7)
    n_b, n_j = len(branches), len(junctions)
    fig.suptitle(
        f"{title}  {n_b} branches, {n_j} junctions; circles: branch ends, squares: junctions".strip(),
        fontsize=10,
    )
    fig.text(0.01, 0.01, _CAPTION, fontsize=8, color="dimgray")
    fig.savefig(path)
    return path


def profile_figures(points: pd.DataFrame, out_dir: str | os.PathLike[str]) -> list[Path]:
    """One PNG per branch: curvature, torsion and radius against arc length (``--plots``)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    written = []
    for bid, g in points.groupby("branch_id", sort=True):
        fig = _figure(figsize=(6, 5.5), dpi=100)
        axes = fig.subplots(3, 1, sharex=True)
        s = g["arc_mm"].to_numpy(float)
        summary = g["in_summary"].to_numpy(bool)
        for ax, col, label in zip(
            axes,
            ("curvature_per_mm", "torsion_per_mm", "radius_mm"),
            ("curvature (1/mm)", "torsion (1/mm)", "radius (mm)"),
            strict=True,
        ):
            ax.plot(s, g[col].to_numpy(float), color="tab:blue", linewidth=1)
            if (~summary).any():
                ax.plot(s[~summary], g[col].to_numpy(float)[~summary], ".", color="lightgray", markersize=2)
            ax.set_ylabel(label, fontsize=8)
            ax.tick_params(labelsize=7)
        axes[-1].set_xlabel("arc length (mm); grey: outside the summaries", fontsize=8)
        fig.suptitle(f"branch {int(bid)}", fontsize=10)
        fig.text(0.01, 0.005, _CAPTION, fontsize=7, color="dimgray")
        p = out / f"branch_{int(bid):05d}.png"
        fig.savefig(p)
        written.append(p)
    return written
