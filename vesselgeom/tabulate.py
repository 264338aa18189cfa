"""Assembling the three tables batch by batch, so traced centrelines need not all be held at once.

Both pipelines (in memory and chunked) trace branches in batches; each batch is measured as soon as it
is traced (:func:`vesselgeom.measure.branch_columns`, :func:`~vesselgeom.measure.point_columns_many`)
and only what the junction rows need later is kept from it: each branch's directions away from its two
ends. Junctions are added once the branches meeting there have been added.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pandas as pd

from .centerline import Centerline
from .measure import BranchContext, branch_columns, end_directions, junction_row, point_columns_many
from .settings import Settings
from .tables import BRANCH_COLUMNS, JUNCTION_COLUMNS, POINT_COLUMNS, make_table

__all__ = ["TableBuilder"]


class TableBuilder:
    """Collects branch, point and junction rows; :meth:`tables` returns the three DataFrames.

    Parameters
    ----------
    settings : Settings
    voxel_mm : float
        Mean voxel size, mm (curvature floor).
    coarsest_voxel_mm : float
        Largest voxel size, mm (validated-radius limit).
    """

    def __init__(self, *, settings: Settings, voxel_mm: float, coarsest_voxel_mm: float) -> None:
        self._settings = settings
        self._voxel_mm = voxel_mm
        self._coarsest = coarsest_voxel_mm
        self._branches: list[dict[str, list]] = []
        self._points: list[dict[str, np.ndarray]] = []
        self._junctions: list[dict] = []
        self._dirs: dict[int, tuple[np.ndarray, np.ndarray] | None] = {}

    def add_branches(self, lines: Sequence[Centerline | None], contexts: Sequence[BranchContext]) -> None:
        """Measure a batch of traced branches (None where tracing failed); the lines may then be dropped."""
        if not len(lines):
            return
        self._branches.append(
            branch_columns(
                lines,
                contexts,
                settings=self._settings,
                voxel_mm=self._voxel_mm,
                coarsest_voxel_mm=self._coarsest,
            )
        )
        self._points.append(point_columns_many(lines, [c.branch_id for c in contexts]))
        for cl, ctx in zip(lines, contexts, strict=True):
            self._dirs[ctx.branch_id] = None if cl is None else end_directions(cl, settings=self._settings)

    def add_junction(
        self,
        node_id: int,
        component_id: int,
        position_mm: np.ndarray,
        radius_mm: float,
        ends: Sequence[tuple[int, bool]],
    ) -> None:
        """Add a junction row; ``ends`` lists (branch_id, at_start) of every branch end at the node."""
        dirs = []
        for bid, at_start in ends:
            d = self._dirs[bid]
            dirs.append((bid, None if d is None else d[0 if at_start else 1]))
        self._junctions.append(junction_row(node_id, component_id, position_mm, radius_mm, dirs))

    def tables(self, *, by_branch_id: bool = False) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
        """(branches, points, junctions), typed by their schemas (header-only when empty).

        ``by_branch_id``: order branch rows, and point rows, by branch id (each branch's points keep
        their order) when batches were added out of order (chunked tracing). Call once: the collected
        point columns are handed over to the table, one column at a time.
        """
        branches = _merge_lists(self._branches, BRANCH_COLUMNS)
        if by_branch_id and branches is not None:
            perm = np.argsort(np.asarray(branches["branch_id"]), kind="stable").tolist()
            branches = {k: [v[i] for i in perm] for k, v in branches.items()}
        points = _merge_arrays(self._points, POINT_COLUMNS, by_branch_id=by_branch_id)
        self._points = []
        rows = self._junctions
        junctions = {c.name: [r[c.name] for r in rows] for c in JUNCTION_COLUMNS} if rows else None
        point_table = make_table(POINT_COLUMNS, points, copy=False)  # the merged columns are handed over
        del points
        return make_table(BRANCH_COLUMNS, branches), point_table, make_table(JUNCTION_COLUMNS, junctions)


def _merge_lists(parts: list[dict[str, list]], schema) -> dict[str, list] | None:
    if not parts:
        return None
    return {c.name: [v for p in parts for v in p[c.name]] for c in schema}


def _merge_arrays(
    parts: list[dict[str, np.ndarray]], schema, *, by_branch_id: bool = False
) -> dict[str, np.ndarray] | None:
    """Concatenate the parts column by column, emptying them as it goes (one column's copy at a time).

    ``by_branch_id``: rows reordered by the ``branch_id`` column (stable), column by column.
    """
    parts = [p for p in parts if len(p["arc_mm"])]
    if not parts:
        return None
    perm = None
    if by_branch_id:
        ids = np.concatenate([p["branch_id"] for p in parts])
        if np.any(ids[1:] < ids[:-1]):
            perm = np.argsort(ids, kind="stable")
        del ids
    out = {}
    for c in schema:
        col = np.concatenate([p.pop(c.name) for p in parts])
        out[c.name] = col if perm is None else col[perm]
        del col
    return out
