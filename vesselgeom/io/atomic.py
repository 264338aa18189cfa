"""Write outputs so that readers see either the old result or the complete new one, never a half.

Both helpers build the new content beside its final place (same folder, so the same file system)
and move it into place with a rename, which POSIX and Windows perform atomically for files.
Replacing a non-empty folder cannot be one rename; :func:`atomic_output_dir` uses two (old folder
to a trash name, new folder into place) and puts the old folder back if the second one fails.
"""

from __future__ import annotations

import contextlib
import os
import secrets
import shutil
import warnings
from collections.abc import Iterator
from pathlib import Path

from vesselgeom.errors import InputError, VesselgeomWarning

__all__ = ["atomic_output_dir", "atomic_write_text"]

_MAX_NAME_TRIES = 100


def _sibling_name(target: Path, tag: str) -> Path:
    """A hidden name beside `target`: ``.{name}.{tag}-{pid}-{random}``."""
    return target.with_name(f".{target.name}.{tag}-{os.getpid()}-{secrets.token_hex(4)}")


def _fsync_dir(folder: Path) -> None:
    """Best effort: make a rename in `folder` durable (not possible on every platform)."""
    with contextlib.suppress(OSError, AttributeError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


def _remove_tree(path: Path) -> None:
    if path.is_symlink() or path.is_file():
        path.unlink(missing_ok=True)
    elif path.exists():
        shutil.rmtree(path)


@contextlib.contextmanager
def atomic_output_dir(out_dir: str | os.PathLike[str]) -> Iterator[Path]:
    """Build an output folder in a temporary sibling and move it into place on success.

    Parameters
    ----------
    out_dir : str or path-like
        The final folder. Missing parent folders are created. If `out_dir` is a symbolic link,
        the folder it points to is replaced and the link is kept.

    Yields
    ------
    pathlib.Path
        An empty temporary folder beside `out_dir`, named ``.{name}.tmp-{pid}-{random}``.
        Write every output file into it.

    Raises
    ------
    InputError
        If `out_dir` exists and is not a folder (raised before the body runs).

    Notes
    -----
    On normal exit an existing `out_dir` is renamed to ``.{name}.old-{pid}-{random}``, the
    temporary folder is renamed to `out_dir`, and the old one is deleted (a VesselgeomWarning
    is emitted if that deletion fails; the new output is in place regardless). If the body raises
    (including KeyboardInterrupt), the temporary folder is deleted and `out_dir` is untouched.

    Examples
    --------
    >>> with atomic_output_dir("results/case01") as tmp:  # doctest: +SKIP
    ...     (tmp / "branches.csv").write_text(table)
    """
    target = Path(os.path.realpath(os.fspath(out_dir)))
    shown = os.fspath(out_dir)
    if target.exists() and not target.is_dir():
        raise InputError(f"{shown}: exists and is not a folder; choose another output folder")
    target.parent.mkdir(parents=True, exist_ok=True)

    tmp = _make_sibling_dir(target)
    try:
        yield tmp
        _move_into_place(tmp, target, shown=shown)
    except BaseException:
        with contextlib.suppress(OSError):  # never hide the original error behind a cleanup one
            _remove_tree(tmp)
        raise


def _make_sibling_dir(target: Path) -> Path:
    for _ in range(_MAX_NAME_TRIES):
        candidate = _sibling_name(target, "tmp")
        try:
            candidate.mkdir()  # default mode, so the final folder gets the usual permissions
        except FileExistsError:
            continue
        return candidate
    raise FileExistsError(f"{target}: could not create a unique temporary folder beside it")


def _move_into_place(tmp: Path, target: Path, *, shown: str) -> None:
    if not target.exists():
        os.rename(tmp, target)
        _fsync_dir(target.parent)
        return
    if not target.is_dir():
        raise InputError(f"{shown}: exists and is not a folder; choose another output folder")
    trash = _sibling_name(target, "old")
    os.rename(target, trash)
    try:
        os.rename(tmp, target)
    except BaseException:
        os.rename(trash, target)  # put the previous result back
        raise
    _fsync_dir(target.parent)
    try:
        _remove_tree(trash)
    except OSError as exc:
        warnings.warn(
            f"{shown}: new output is in place but the previous one could not be deleted "
            f"({exc.strerror or exc}); remove {trash} by hand",
            VesselgeomWarning,
            stacklevel=4,
        )


def atomic_write_text(path: str | os.PathLike[str], text: str, *, encoding: str = "utf-8") -> Path:
    """Write a text file atomically: a temporary file in the same folder, then ``os.replace``.

    Parameters
    ----------
    path : str or path-like
        Destination file. Missing parent folders are created; an existing file is replaced.
    text : str
        Written exactly as given (no newline translation), so output bytes do not depend on
        the platform.
    encoding : str
        Text encoding, UTF-8 by default.

    Returns
    -------
    pathlib.Path
        The destination path.

    Raises
    ------
    InputError
        If `path` is an existing folder.
    """
    target = Path(path)
    if target.is_dir():
        raise InputError(f"{os.fspath(path)}: is a folder; pass a file path")
    target.parent.mkdir(parents=True, exist_ok=True)
    data = text.encode(encoding)

    for _ in range(_MAX_NAME_TRIES):
        tmp = _sibling_name(target, "tmp")
        try:
            # 0o666 filtered by the umask: the same permissions a plain open() would give
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
        except FileExistsError:
            continue
        break
    else:
        raise FileExistsError(f"{target}: could not create a unique temporary file beside it")

    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(target.parent)
    return target
