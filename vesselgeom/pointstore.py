"""Point columns kept on disk while a run collects them, handed back as memory-mapped columns.

A points table grows with the output (89 bytes per point, about 10^8 points for a whole-organ mask),
so a chunked run does not hold it in memory. Each batch's columns are appended to one temporary file per
column as the batch arrives; at the end the rows are put in branch-id order into a second temporary file
per column, written front to back one block at a time, and that file is mapped back with
:class:`numpy.memmap` in copy-on-write mode (the table can be read and changed; changes never reach
the file).

The files are anonymous (:func:`tempfile.TemporaryFile`: on POSIX systems they have no name from the
moment they are created), so nothing is left in the folder however the run ends, a killed process
included. Their disk space is in use until the table (every view of it) is released. Mapped pages are
file-backed: reading the table brings them into the page cache, which the kernel may drop and read
again under memory pressure, unlike the anonymous memory of an in-memory table. A folder on a
memory file system (tmpfs) keeps them in memory after all: :func:`in_memory_folder` tells.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO

import numpy as np

from .errors import InputError
from .tables import POINT_COLUMNS

__all__ = ["SpilledPoints", "check_folder", "in_memory_folder"]

#: Rows gathered per block when the rows are put in branch-id order (about 8 MB per int64 column).
_BLOCK_ROWS = 1 << 20
_NUMPY = {"int64": np.dtype(np.int64), "float64": np.dtype(np.float64), "bool": np.dtype(bool)}
_MEMORY_FILE_SYSTEMS = {"tmpfs", "ramfs"}


class SpilledPoints:
    """Point columns (``POINT_COLUMNS``) appended to anonymous files in ``folder``, batch by batch.

    Parameters
    ----------
    folder : path
        An existing, writable folder on a disk with room for twice the points table (89 bytes per
        point while the rows are reordered).

    Raises
    ------
    InputError
        When a file cannot be created or written in ``folder`` (missing, read-only, full).

    Notes
    -----
    The store keeps in memory only each batch's run of branch ids and row counts (16 bytes per branch).
    A branch's rows must arrive in one batch, in their own order.
    """

    def __init__(self, folder: str | os.PathLike[str]) -> None:
        self._folder = Path(folder)
        self._dtypes = {c.name: _NUMPY[c.dtype] for c in POINT_COLUMNS}
        self._files: dict[str, IO[bytes]] | None = {}
        try:
            with _writing(self._folder):
                for name in self._dtypes:
                    self._files[name] = tempfile.TemporaryFile(dir=self._folder)  # noqa: SIM115
        except BaseException:
            self.discard()
            raise
        self._ids: list[np.ndarray] = []
        self._counts: list[np.ndarray] = []
        self.rows = 0

    def add(self, columns: dict[str, np.ndarray]) -> None:
        """Append one batch's columns (one (n,) array per column of ``POINT_COLUMNS``).

        Every column is checked before any is written, so a refused batch leaves the store as it was.
        """
        if self._files is None:
            raise InputError("<array>: point rows added after the table was made; use a new store")
        ids = np.asarray(columns["branch_id"], np.int64)
        values = {name: np.ascontiguousarray(columns[name], dtype=dt) for name, dt in self._dtypes.items()}
        for name, v in values.items():
            if v.shape != ids.shape:
                raise InputError(
                    f"<array>: point column {name!r} has shape {v.shape} but branch_id {ids.shape}; "
                    "pass 1-D columns of equal length"
                )
        if not len(ids):
            return
        with _writing(self._folder):
            for name, handle in self._files.items():
                values[name].tofile(handle)
        starts = np.flatnonzero(np.r_[True, ids[1:] != ids[:-1]])
        self._ids.append(ids[starts])
        self._counts.append(np.diff(np.r_[starts, len(ids)]))
        self.rows += len(ids)

    def columns(self, *, by_branch_id: bool) -> dict[str, np.ndarray] | None:
        """The collected columns as copy-on-write memory maps (None when no row was added).

        ``by_branch_id``: rows put in branch-id order (stable: a branch's rows keep their order);
        otherwise in the order they were added. Call once: the store is closed afterwards.
        """
        if self._files is None:
            raise InputError("<array>: the point table was already made from this store; call columns() once")
        files, self._files = self._files, None
        try:
            if not self.rows:
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
                handle = files[name]
                handle.flush()
                if order is not None:
                    with _writing(self._folder):
                        ordered = tempfile.TemporaryFile(dir=self._folder)  # noqa: SIM115
                        try:
                            _gather(handle, ordered, dtype, counts, order, self.rows)
                        except BaseException:
                            ordered.close()
                            raise
                    handle.close()  # its disk space is freed here
                    files[name] = handle = ordered
                # a plain ndarray view of the map, so the table's columns are ordinary numpy arrays; the
                # map holds its own handle on the file, whose space is freed when the map is released
                out[name] = np.asarray(np.memmap(handle, dtype=dtype, mode="c", shape=(self.rows,)))
            return out
        finally:
            for handle in files.values():
                handle.close()

    def discard(self) -> None:
        """Close the files (their disk space is freed); the store takes no more rows."""
        files, self._files = self._files or {}, None
        for handle in files.values():
            handle.close()


@contextlib.contextmanager
def _writing(folder: Path) -> Iterator[None]:
    """Turn an OSError while writing point files into a one-line InputError naming the folder."""
    try:
        yield
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise InputError(
            f"{folder}: cannot write point rows there ({reason}); free disk space or choose another "
            "scratch folder (scratch_dir= / --scratch DIR)"
        ) from exc


def check_folder(folder: str | os.PathLike[str]) -> None:
    """Raise InputError unless a temporary file can be created in ``folder`` (before a long run)."""
    if not os.path.isdir(folder):
        raise InputError(f"{folder}: scratch folder does not exist; create it or pass another")
    with _writing(Path(folder)):
        tempfile.TemporaryFile(dir=folder).close()


def in_memory_folder(folder: str | os.PathLike[str]) -> bool:
    """Whether ``folder`` lies on a memory file system (tmpfs, ramfs), from ``/proc/mounts`` (Linux).

    False where that cannot be told (no ``/proc/mounts``).
    """
    try:
        mounts = Path("/proc/mounts").read_text().splitlines()
    except OSError:
        return False
    path = os.path.realpath(folder)
    best, kind = "", ""
    for line in mounts:
        parts = line.split()
        if len(parts) < 3:
            continue
        point = parts[1].replace("\\040", " ")
        inside = path == point or path.startswith(point.rstrip("/") + "/")
        if inside and len(point) > len(best):
            best, kind = point, parts[2]
    return kind in _MEMORY_FILE_SYSTEMS


def _gather(
    source: IO[bytes], target: IO[bytes], dtype: np.dtype, counts: np.ndarray, order: np.ndarray, rows: int
) -> None:
    """Write ``source``'s runs of rows (``counts`` each, stored one after another) in ``order``."""
    src_start = np.r_[0, np.cumsum(counts)[:-1]][order]
    dst_counts = counts[order]
    dst_start = np.r_[0, np.cumsum(dst_counts)[:-1]]
    src = np.memmap(source, dtype=dtype, mode="r", shape=(rows,))
    try:
        i, n = 0, len(order)
        while i < n:
            j = max(int(np.searchsorted(dst_start, dst_start[i] + _BLOCK_ROWS)), i + 1)
            a = int(dst_start[i])
            b = int(dst_start[j - 1] + dst_counts[j - 1])
            idx = np.repeat(src_start[i:j] - dst_start[i:j], dst_counts[i:j]) + np.arange(a, b)
            src[idx].tofile(target)
            i = j
        target.flush()
    finally:
        del src
