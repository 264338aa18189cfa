"""Cohort manifests: which mask belongs to which subject and group, checked before any work starts."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..errors import InputError

__all__ = ["Subject", "read_manifest", "manifest_from_folder", "REQUIRED_COLUMNS"]

REQUIRED_COLUMNS = ("subject", "group", "mask")


@dataclass(frozen=True)
class Subject:
    """One row of a manifest: ids are strings ("01" stays "01"); ``covariates`` keep their text."""

    subject: str
    group: str
    mask: Path
    covariates: tuple[tuple[str, str], ...] = ()


def read_manifest(path: str | os.PathLike[str]) -> list[Subject]:
    """Read and check a manifest CSV with columns ``subject, group, mask`` (+ covariates).

    Mask paths are relative to the manifest's folder. Every problem (missing columns, empty or
    duplicate subject ids, unsafe ids, missing files) is collected and reported in one
    :class:`~vesselgeom.errors.InputError`, so a researcher fixes them all at once.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: no such manifest file")
    try:
        table = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: not a readable CSV manifest ({type(exc).__name__})") from None
    table.columns = [c.strip() for c in table.columns]
    missing = [c for c in REQUIRED_COLUMNS if c not in table.columns]
    if missing:
        raise InputError(
            f"{path}: manifest lacks column(s) {', '.join(missing)}; it needs subject, group, mask"
        )
    problems: list[str] = []
    ids = table["subject"].str.strip()
    if (ids == "").any():
        problems.append(f"empty subject id on line(s) {_lines(ids == '')}")
    dup = ids[ids.duplicated(keep=False) & (ids != "")]
    if len(dup):
        problems.append(f"duplicate subject id(s) {', '.join(sorted(set(dup)))}")
    unsafe = ids[ids.str.contains(r"[/\\]|^\.\.?$", regex=True)]
    if len(unsafe):
        problems.append(f"subject id(s) not usable as folder names: {', '.join(unsafe)}")
    base = path.parent
    subjects = []
    covariate_cols = [c for c in table.columns if c not in REQUIRED_COLUMNS]
    for i, row in table.iterrows():
        mask = (base / row["mask"].strip()).resolve() if row["mask"].strip() else None
        if mask is None:
            problems.append(f"subject {row['subject']!r}: empty mask path (line {i + 2})")
            continue
        if not mask.is_file():
            problems.append(f"subject {row['subject']!r}: mask {row['mask']} not found")
        subjects.append(
            Subject(
                ids[i],
                row["group"].strip(),
                mask,
                tuple((c, row[c]) for c in covariate_cols),
            )
        )
    if problems:
        raise InputError(f"{path}: {len(problems)} problem(s): " + "; ".join(problems))
    if not subjects:
        raise InputError(f"{path}: manifest has no subjects")
    return subjects


def manifest_from_folder(folder: str | os.PathLike[str], *, pattern: str = "*.nii*") -> list[Subject]:
    """Subjects from every file matching ``pattern`` in ``folder``: id = file name without extension.

    The group is left empty (a folder carries no grouping); compare needs a manifest.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: no such folder")
    files = sorted(p for p in folder.glob(pattern) if p.is_file())
    if not files:
        raise InputError(f"{folder}: no file matches {pattern!r}")
    subjects = [Subject(_stem(p), "", p.resolve()) for p in files]
    ids = [s.subject for s in subjects]
    dups = sorted({i for i in ids if ids.count(i) > 1})
    if dups:
        raise InputError(f"{folder}: files give duplicate subject ids {', '.join(dups)}")
    return subjects


def _stem(p: Path) -> str:
    name = p.name
    for ext in (".nii.gz", ".nii", ".gz"):
        if name.endswith(ext):
            return name[: -len(ext)]
    return p.stem


def _lines(mask: pd.Series) -> str:
    return ", ".join(str(i + 2) for i in mask[mask].index)
