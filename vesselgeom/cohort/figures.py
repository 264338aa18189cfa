"""One figure per metric: a box per group with every subject drawn on top (PNG, matplotlib Agg).

The figure is built on a standalone ``matplotlib.figure.Figure`` with an Agg canvas, so it never touches
pyplot's global state or the interactive backend. Points are jittered horizontally with a fixed seed, so
the same table always gives the same image.
"""

from __future__ import annotations

from os import PathLike
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from vesselgeom.caution import CAUTION
from vesselgeom.cohort.stats import _group_labels, _values
from vesselgeom.errors import InputError

__all__ = ["metric_figure"]

_ARRAY = "<array>"
_SIZE_IN = (4.0, 3.5)
_DPI = 120
_JITTER = 0.12  # half-width of the horizontal jitter, in box widths (boxes are 0.5 wide)


def metric_figure(
    subjects: pd.DataFrame,
    *,
    by: str,
    metric: str,
    path: str | PathLike,
    title: str | None = None,
    caption: str = CAUTION,
) -> Path:
    """Write a PNG with one box per group (no fliers) and each subject's value as a jittered point.

    Parameters
    ----------
    subjects : DataFrame, one row per subject
        Per-subject summaries; rows without a group label or with NaN ``metric`` are left out.
    by : str
        Group column; labels are shown as text in sorted order (the order of :func:`compare_groups`).
    metric : str
        Numeric column to plot; its name is the y-axis label.
    path : str or path-like
        Output PNG file; its folder must exist. The image is 480 x 420 pixels (4 x 3.5 in at 120 dpi).
    title : str, optional
        Figure title; defaults to no title.
    caption : str
        Small text at the bottom of the figure.

    Returns
    -------
    Path
        The file written.

    Examples
    --------
    >>> import tempfile, os
    >>> df = pd.DataFrame({"group": list("AAABBB"), "m": [3.0, 4, 5, 0, 1, 2]})
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     out = metric_figure(df, by="group", metric="m", path=os.path.join(tmp, "m.png"))
    ...     out.stat().st_size > 0
    True
    """
    path = Path(path)
    if not path.parent.is_dir():
        raise InputError(f"{path}: folder {str(path.parent)!r} does not exist; create it first")
    labels, groups = _group_labels(subjects, by, "subjects")
    if not groups:
        raise InputError(f"{_ARRAY}: column {by!r} has no group labels; pass subjects with a group")
    values = _values(subjects, metric, "subjects").loc[labels.index]
    samples = [values[labels == g].dropna().to_numpy() for g in groups]
    if any(np.isinf(s).any() for s in samples):
        raise InputError(f"{_ARRAY}: subjects column {metric!r} holds infinite values; fix them")

    fig = Figure(figsize=_SIZE_IN, dpi=_DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    positions = np.arange(1, len(groups) + 1)
    drawn = [i for i, s in enumerate(samples) if s.size]
    if drawn:
        ax.boxplot(
            [samples[i] for i in drawn],
            positions=positions[drawn],
            widths=0.5,
            showfliers=False,
            medianprops={"color": "black", "linewidth": 1.5},
            boxprops={"color": "0.35"},
            whiskerprops={"color": "0.35"},
            capprops={"color": "0.35"},
        )
    rng = np.random.default_rng(0)
    for pos, s in zip(positions, samples, strict=True):
        x = pos + rng.uniform(-_JITTER, _JITTER, size=s.size)
        ax.scatter(x, s, s=16, color="tab:blue", alpha=0.8, edgecolors="white", linewidths=0.5, zorder=3)
    ax.set_xticks(positions)
    ax.set_xticklabels([f"{g}\n(n={s.size})" for g, s in zip(groups, samples, strict=True)], fontsize=8)
    ax.set_xlim(0.4, len(groups) + 0.6)
    ax.set_ylabel(metric, fontsize=9)
    ax.tick_params(axis="y", labelsize=8)
    ax.spines[["top", "right"]].set_visible(False)
    if title:
        ax.set_title(title, fontsize=10)
    fig.subplots_adjust(left=0.2, right=0.96, bottom=0.2, top=0.9 if title else 0.95)
    if caption:
        fig.text(0.5, 0.015, caption, ha="center", va="bottom", fontsize=4.5, color="0.3", wrap=True)
    fig.savefig(path, dpi=_DPI, format="png")
    return path
