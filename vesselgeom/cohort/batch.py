"""Batch runs over a cohort: one ``analyze`` per subject in parallel processes, resumable, robust.

Each subject's outputs go to ``OUT/<subject>/`` exactly as ``vesselgeom analyze`` writes them (the folder
appears complete or not at all). ``OUT/status.csv`` records every subject's outcome. A subject whose
folder already holds a complete result for the same input hash, settings and package version is
skipped; failed subjects are retried on the next run. A failing subject never stops the others.
"""

from __future__ import annotations

import json
import os
import sys
import time
import traceback
import warnings
from collections.abc import Callable, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from tqdm import tqdm

from .. import __version__
from ..errors import VesselgeomError, VesselgeomWarning
from ..io import atomic_write_text, file_sha256
from ..pipeline import CAUTION, analyze
from ..settings import Settings
from .manifest import Subject
from .pool import write_pooled_tables

__all__ = ["SubjectOutcome", "run_batch", "STATUS_COLUMNS"]

STATUS_COLUMNS = ["subject", "group", "status", "seconds", "message"]
_OUTPUTS = ("branches.csv", "points.csv", "junctions.csv", "columns.json", "run.json")


@dataclass(frozen=True)
class SubjectOutcome:
    """What happened to one subject: status is "ok", "failed" or "skipped"."""

    subject: str
    group: str
    status: str
    seconds: float
    message: str = ""


def _is_complete(folder: Path, sha256: str, settings: Settings) -> bool:
    """True when ``folder`` holds every output of a run on the same input, settings and version."""
    if not all((folder / name).is_file() for name in _OUTPUTS):
        return False
    try:
        run = json.loads((folder / "run.json").read_text())
    except (OSError, ValueError):
        return False
    return (
        run.get("input", {}).get("sha256") == sha256
        and run.get("settings") == json.loads(json.dumps(settings.to_dict()))
        and run.get("version") == __version__
    )


def _analyze_one(subject: Subject, out: Path, settings: Settings) -> SubjectOutcome:
    """Worker: analyse one subject and write its folder; errors become a failed outcome."""
    t0 = time.perf_counter()
    try:
        with warnings.catch_warnings(record=True) as caught:  # also recorded in the subject's run.json
            warnings.simplefilter("always")
            analyze(subject.mask, settings=settings).write(out / subject.subject)
        notes = [str(w.message) for w in caught if issubclass(w.category, VesselgeomWarning)]
        message = f"{len(notes)} warning(s), first: {notes[0]}" if notes else ""
        return SubjectOutcome(subject.subject, subject.group, "ok", time.perf_counter() - t0, message)
    except (VesselgeomError, ValueError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        return SubjectOutcome(subject.subject, subject.group, "failed", time.perf_counter() - t0, msg)
    except Exception as exc:  # a bug must not kill the batch: record it with its location
        where = traceback.extract_tb(exc.__traceback__)[-1]
        msg = f"internal error {type(exc).__name__}: {exc} ({Path(where.filename).name}:{where.lineno})"
        return SubjectOutcome(subject.subject, subject.group, "failed", time.perf_counter() - t0, msg)


def run_batch(
    subjects: Sequence[Subject],
    out_dir: str | os.PathLike[str],
    *,
    settings: Settings | None = None,
    jobs: int | None = None,
    progress: bool | None = None,
    log: Callable[[str], None] | None = None,
) -> pd.DataFrame:
    """Analyse every subject, write ``status.csv`` and the pooled tables, return the status table.

    Parameters
    ----------
    subjects : sequence of Subject
        From :func:`~vesselgeom.cohort.manifest.read_manifest` or ``manifest_from_folder``.
    out_dir : path
        Batch folder; created if missing.
    settings : Settings, optional
        The same settings for every subject.
    jobs : int, optional
        Worker processes; default all cores. 1 runs in this process.
    progress : bool, optional
        Show a progress bar; default only when standard error is a terminal.
    log : callable, optional
        Receives one line per failed subject.

    Returns
    -------
    DataFrame
        ``status.csv``'s rows: subject, group, status (ok / failed / skipped), seconds, message.
    """
    settings = settings or Settings()
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    jobs = max(1, jobs or os.cpu_count() or 1)
    show = sys.stderr.isatty() if progress is None else progress
    t0 = time.perf_counter()

    outcomes: dict[str, SubjectOutcome] = {}
    todo: list[Subject] = []
    for s in subjects:
        try:
            sha = file_sha256(s.mask)
        except VesselgeomError as exc:
            outcomes[s.subject] = SubjectOutcome(s.subject, s.group, "failed", 0.0, str(exc))
            continue
        if _is_complete(out / s.subject, sha, settings):
            outcomes[s.subject] = SubjectOutcome(s.subject, s.group, "skipped", 0.0, "up to date")
        else:
            todo.append(s)

    bar = tqdm(total=len(todo), disable=not show, unit="subject", desc="vesselgeom batch")
    if jobs == 1 or len(todo) <= 1:
        for s in todo:
            outcomes[s.subject] = _analyze_one(s, out, settings)
            bar.update()
    else:
        with ProcessPoolExecutor(max_workers=min(jobs, len(todo))) as pool:
            futures = {pool.submit(_analyze_one, s, out, settings): s for s in todo}
            for fut in as_completed(futures):
                s = futures[fut]
                try:
                    outcomes[s.subject] = fut.result()
                except Exception as exc:  # the worker process itself died (e.g. out of memory)
                    outcomes[s.subject] = SubjectOutcome(
                        s.subject, s.group, "failed", 0.0, f"worker died: {type(exc).__name__}"
                    )
                bar.update()
    bar.close()

    ordered = [outcomes[s.subject] for s in subjects]
    status = pd.DataFrame(
        [[o.subject, o.group, o.status, round(o.seconds, 2), o.message] for o in ordered],
        columns=STATUS_COLUMNS,
    ).astype({"subject": "string", "group": "string", "status": "string", "message": "string"})
    atomic_write_text(out / "status.csv", status.to_csv(index=False, lineterminator="\n"))
    if log:
        for o in ordered:
            if o.status == "failed":
                log(f"{o.subject}: {o.message}")
    good = [s for s, o in zip(subjects, ordered, strict=True) if o.status in ("ok", "skipped")]
    write_pooled_tables(good, out)
    batch_run = {
        "software": "vesselgeom",
        "version": __version__,
        "caution": CAUTION,
        "settings": settings.to_dict(),
        "subjects": len(subjects),
        "counts": status["status"].value_counts().to_dict(),
        "jobs": jobs,
        "seconds": round(time.perf_counter() - t0, 2),
    }
    atomic_write_text(out / "batch.json", json.dumps(batch_run, indent=2) + "\n")
    return status
