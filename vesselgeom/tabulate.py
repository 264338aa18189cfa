"""Assembling the three tables batch by batch, so traced centrelines need not all be held at once.

Both pipelines (in memory and chunked) trace branches in batches; each batch is measured as soon as it
is traced (:func:`vesselgeom.measure.branch_columns`, :func:`~vesselgeom.measure.point_columns_many`)
and only what the junction rows need later is kept from it: each branch's directions away from its two
ends. Junctions are added once the branches meeting there have been added.
"""

from __future__ import annotations

import os
from collections.abc import Sequence

import numpy as np
import pandas as pd

from .centerline import Centerline
from .errors import InputError
from .measure import BranchContext, branch_columns, end_directions, junction_row, point_columns_many
from .pointstore import SpilledPoints
from .settings import Settings
from .tables import BRANCH_COLUMNS, JUNCTION_COLUMNS, POINT_COLUMNS, make_table

__all__ = ["TableBuilder"]

#: Branch rows kept as Python lists (about 1.7 kB each) before they are typed into a block (about 360 B).
_TYPED_ROWS = 4096


class TableBuilder:
    """Collects branch, point and junction rows; :meth:`tables` returns the three DataFrames.

    Parameters
    ----------
    settings : Settings
    voxel_mm : float
        Mean voxel size, mm (curvature floor).
    coarsest_voxel_mm : float
        Largest voxel size, mm (validated-radius limit).
    spill_dir : path, optional
        Keep the point rows in files in this existing folder instead of memory
        (:class:`~vesselgeom.pointstore.SpilledPoints`); the points table is then memory-mapped.

    Notes
    -----
    Held per branch: its typed branch row (about 360 bytes) and its two end directions (48 bytes, in an
    array indexed by branch id, so ids should be small positive integers as both pipelines number them).
    Held per point: 89 bytes, unless spilled.
    """

    def __init__(
        self,
        *,
        settings: Settings,
        voxel_mm: float,
        coarsest_voxel_mm: float,
        spill_dir: str | os.PathLike[str] | None = None,
    ) -> None:
        self._settings = settings
        self._voxel_mm = voxel_mm
        self._coarsest = coarsest_voxel_mm
        self._branches: list[pd.DataFrame] = []  # typed blocks of rows
        self._pending: list[dict[str, list]] = []  # columns of batches not yet typed
        self._pending_rows = 0
        self._points: list[dict[str, np.ndarray]] = []
        self._spilled = None if spill_dir is None else SpilledPoints(spill_dir)
        self._junctions: list[dict] = []
        self._dirs = np.full((0, 2, 3), np.nan)  # row = branch id: directions away from start, end
        self._traced = np.zeros(0, bool)
        self._known = np.zeros(0, bool)
        self._done = False

    def add_branches(self, lines: Sequence[Centerline | None], contexts: Sequence[BranchContext]) -> None:
        """Measure a batch of traced branches (None where tracing failed); the lines may then be dropped."""
        if self._done:
            raise InputError("<array>: branches added after the tables were made; use a new TableBuilder")
        if not len(lines):
            return
        ids = np.array([c.branch_id for c in contexts], np.int64)
        if ids.min() < 0:
            raise InputError(f"<array>: branch ids must be non-negative, got {int(ids.min())}")
        columns = branch_columns(
            lines,
            contexts,
            settings=self._settings,
            voxel_mm=self._voxel_mm,
            coarsest_voxel_mm=self._coarsest,
        )
        self._pending.append(columns)
        self._pending_rows += len(lines)
        if self._pending_rows >= _TYPED_ROWS:
            self._type_pending()
        points = point_columns_many(lines, ids.tolist())
        if self._spilled is None:
            self._points.append(points)
        else:
            self._spilled.add(points)
        del points
        if ids.max() >= len(self._dirs):
            grow = max(int(ids.max()) + 1, 2 * len(self._dirs))
            self._dirs = np.concatenate([self._dirs, np.full((grow - len(self._dirs), 2, 3), np.nan)])
            self._traced = np.concatenate([self._traced, np.zeros(grow - len(self._traced), bool)])
            self._known = np.concatenate([self._known, np.zeros(grow - len(self._known), bool)])
        self._known[ids] = True
        for cl, bid in zip(lines, ids.tolist(), strict=True):
            if cl is not None:
                self._dirs[bid] = end_directions(cl, settings=self._settings)
                self._traced[bid] = True

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
            if not 0 <= bid < len(self._known) or not self._known[bid]:
                raise InputError(f"<array>: junction {node_id} names branch {bid}, which was not added")
            traced = self._traced[bid]
            dirs.append((bid, self._dirs[bid, 0 if at_start else 1].copy() if traced else None))
        self._junctions.append(junction_row(node_id, component_id, position_mm, radius_mm, dirs))

    def tables(self, *, by_branch_id: bool = False) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
        """(branches, points, junctions), typed by their schemas (header-only when empty).

        ``by_branch_id``: order branch rows, and point rows, by branch id (each branch's points keep
        their order) when batches were added out of order (chunked tracing). Call once: the collected
        point columns are handed over to the table, one column at a time.
        """
        if self._done:
            raise InputError("<array>: tables() was already called on this TableBuilder; call it once")
        self._done = True
        branches = make_table(BRANCH_COLUMNS)
        self._type_pending()
        if self._branches:
            branches = pd.concat(self._branches, ignore_index=True)
            self._branches = []
            if by_branch_id:
                ids = branches["branch_id"].to_numpy()
                if np.any(ids[1:] < ids[:-1]):
                    branches = branches.iloc[np.argsort(ids, kind="stable")].reset_index(drop=True)
        if self._spilled is None:
            points = _merge_arrays(self._points, POINT_COLUMNS, by_branch_id=by_branch_id)
            self._points = []
        else:
            points = self._spilled.columns(by_branch_id=by_branch_id)
        rows = self._junctions
        junctions = {c.name: [r[c.name] for r in rows] for c in JUNCTION_COLUMNS} if rows else None
        point_table = make_table(POINT_COLUMNS, points, copy=False)  # the merged columns are handed over
        del points
        return branches, point_table, make_table(JUNCTION_COLUMNS, junctions)

    def _type_pending(self) -> None:
        """Pending branch rows into one typed block (compact, and cheaper than typing every batch)."""
        if self._pending:
            self._branches.append(make_table(BRANCH_COLUMNS, _merge_lists(self._pending, BRANCH_COLUMNS)))
        self._pending, self._pending_rows = [], 0

    def discard(self) -> None:
        """Close the spilled point files, freeing their disk space (when a run fails before its tables)."""
        self._done = True
        if self._spilled is not None:
            self._spilled.discard()


def _merge_lists(parts: list[dict[str, list]], schema) -> dict[str, list]:
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
