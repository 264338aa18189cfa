"""Cohort work: batch runs over a manifest, pooled tables, and group comparisons.

>>> from vesselgeom import cohort                                      # doctest: +SKIP
>>> status = cohort.run_batch(cohort.read_manifest("manifest.csv"), "batch")  # doctest: +SKIP
>>> branches, subjects = cohort.load_batch("batch")                    # doctest: +SKIP
>>> table, warnings = cohort.compare("batch", by="group")              # doctest: +SKIP
"""

from __future__ import annotations

from .batch import run_batch
from .compare import DEFAULT_METRICS, compare
from .manifest import Subject, manifest_from_folder, read_manifest
from .pool import INDICES, load_batch

__all__ = [
    "Subject",
    "read_manifest",
    "manifest_from_folder",
    "run_batch",
    "load_batch",
    "compare",
    "DEFAULT_METRICS",
    "INDICES",
]
