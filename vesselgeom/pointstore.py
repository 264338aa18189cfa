"""Point columns kept on disk while a run collects them, handed back as memory-mapped columns.

A points table grows with the output (89 bytes per point, about 10^8 points for a whole-organ mask),
so a chunked run does not hold it in memory. Each batch's columns are appended to one file per column
as the batch arrives; at the end the rows are put in branch-id order into a second file per column,
written front to back one block at a time, and that file is mapped back with :class:`numpy.memmap`
in copy-on-write mode (the table can be read and changed; changes never reach the file).

Files are unlinked as soon as they are mapped (POSIX keeps a mapped file's data until the mapping is
closed), so nothing is left behind however the run ends. Mapped pages are file-backed: reading the
table brings them into the page cache, which the kernel may drop and read again under memory pressure,
unlike the anonymous memory of an in-memory table.
"""

from __future__ import annotations

import contextlib
import os
from pathlib import Path

import numpy as np

from .errors import InputError
from .tables import POINT_COLUMNS

__all__ = ["SpilledPoints"]

#: Rows gathered per block when the rows are put in branch-id order (about 8 MB per int64 column).
_BLOCK_ROWS = 1 << 20
_NUMPY = {"int64": np.dtype(np.int64), "float64": np.dtype(np.float64), "bool": np.dtype(bool)}


class SpilledPoints:
    """Point columns (``POINT_COLUMNS``) appended to files in ``folder``, batch by batch.

    Parameters
    ----------
    folder : path
        An existing folder on a disk with room for twice the points table (89 bytes per point
        while the rows are reordered). Files named ``points.*`` are created in it and removed.

    Notes
    -----
    The store keeps in memory only each batch's run of branch ids and row counts (16 bytes per branch).
    A branch's rows must arrive in one batch, in their own order.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self._folder = Path(folder)
        self._dtypes = {c.name: _NUMPY[c.dtype] for c in POINT_COLUMNS}
        self._paths = {name: self._folder / f"points.{name}.arrival" for name in self._dtypes}
        self._files = {name: open(path, "wb") for name, path in self._paths.items()}  # noqa: SIM115
        self._ids: list[np.ndarray] = []
        self._counts: list[np.ndarray] = []
        self.rows = 0

    def add(self, columns: dict[str, np.ndarray]) -> None:
        """Append one batch's columns (one (n,) array per column of ``POINT_COLUMNS``)."""
        ids = np.asarray(columns["branch_id"], np.int64)
        if not len(ids):
            return
        starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]])
        self._ids.append(ids[starts])
        self._counts.append(np.diff(np.r_[starts, len(ids)]))
        for name, handle in self._files.items():
            values = np.ascontiguousarray(columns[name], dtype=self._dtypes[name])
            if len(values) != len(ids):
                raise InputError(
                    f"<array>: point column {name!r} has {len(values)} rows but branch_id has {len(ids)}; "
                    "pass columns of equal length"
                )
            values.tofile(handle)
        self.rows += len(ids)

    def columns(self, *, by_branch_id: bool) -> dict[str, np.ndarray] | None:
        """The collected columns as copy-on-write memory maps (None when no row was added).

        ``by_branch_id``: rows put in branch-id order (stable: a branch's rows keep their order);
        otherwise in the order they were added. The store is emptied (call once).
        """
        self._close()
        if not self.rows:
            self.discard()
            return None
        ids = np.concatenate(self._ids)
        counts = np.concatenate(self._counts)
        self._ids, self._counts = [], []
        order = None
        if by_branch_id and np.any(ids[1:] < ids[:-1]):
            order = np.argsort(ids, kind="stable")
        del ids
        out = {}
        for name, dtype in self._dtypes.items():
            path = self._paths[name]
            if order is not None:
                ordered = path.with_suffix("")  # points.<name>
                _gather(path, ordered, dtype, counts, order, self.rows)
                path.unlink()
                path = ordered
            # a plain ndarray view of the map, so the table's columns are ordinary numpy arrays
            out[name] = np.asarray(np.memmap(path, dtype=dtype, mode="c", shape=(self.rows,)))
            with contextlib.suppress(OSError):  # the mapping keeps the data; some systems refuse
                path.unlink()
        return out

    def discard(self) -> None:
        """Close and remove the files (after an error, or when nothing was added)."""
        self._close()
        for path in self._paths.values():
            with contextlib.suppress(OSError):
                path.unlink()
            with contextlib.suppress(OSError):
                path.with_suffix("").unlink()

    def _close(self) -> None:
        for handle in self._files.values():
            handle.close()


def _gather(
    source: Path, target: Path, dtype: np.dtype, counts: np.ndarray, order: np.ndarray, rows: int
) -> None:
    """Write ``source``'s runs of rows (``counts`` each, stored one after another) in ``order``."""
    src_start = np.r_[0, np.cumsum(counts)[:-1]][order]
    dst_counts = counts[order]
    dst_start = np.r_[0, np.cumsum(dst_counts)[:-1]]
    src = np.memmap(source, dtype=dtype, mode="r", shape=(rows,))
    try:
        with open(target, "wb") as handle:
            i, n = 0, len(order)
            while i < n:
                j = max(int(np.searchsorted(dst_start, dst_start[i] + _BLOCK_ROWS)), i + 1)
                a = int(dst_start[i])
                b = int(dst_start[j - 1] + dst_counts[j - 1])
                idx = np.repeat(src_start[i:j] - dst_start[i:j], dst_counts[i:j]) + np.arange(a, b)
                src[idx].tofile(handle)
                i = j
    finally:
        del src
