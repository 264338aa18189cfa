"""Command line: ``vesselgeom analyze | batch | compare | demo``.

Thin by design: parse arguments, call the package, print short messages. Bad input prints
``vesselgeom: error: <file>: <problem>`` on one line and exits with status 2, without a traceback and
without writing any output.

Exit status: 0 success; 1 ``batch``/``demo`` finished but at least one subject failed (see status.csv),
or an unexpected internal error (a bug: please report it); 2 bad input or usage.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from . import __version__
from .errors import VesselgeomError, VesselgeomWarning
from .pipeline import CAUTION, analyze
from .settings import Settings

__all__ = ["main"]

_SETTING_FLAGS = {
    "prune_ratio": float,
    "smoothing_radii": float,
    "torsion_smoothing_radii": float,
    "step_mm": float,
    "min_component_mm3": float,
    "curvature_floor_per_voxel": float,
    "recentre_passes": int,
}


def _add_settings(p: argparse.ArgumentParser) -> None:
    sel = p.add_mutually_exclusive_group()
    sel.add_argument("--label", type=int, help="analyse only this label of an integer label map")
    sel.add_argument(
        "--threshold", type=float, help="foreground is value >= T (required for probability maps)"
    )
    p.add_argument("--keep-holes", action="store_true", help="do not fill enclosed cavities")
    defaults = Settings()
    for name, typ in _SETTING_FLAGS.items():
        p.add_argument(
            f"--{name.replace('_', '-')}",
            type=typ,
            default=None,
            help=f"see Settings.{name} (default {getattr(defaults, name)})",
        )


def _settings(args: argparse.Namespace) -> Settings:
    overrides = {k: getattr(args, k) for k in _SETTING_FLAGS if getattr(args, k) is not None}
    return Settings(label=args.label, threshold=args.threshold, fill_holes=not args.keep_holes, **overrides)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="vesselgeom", description="Centreline geometry of 3D vessel masks, in mm. " + CAUTION
    )
    p.add_argument("--version", action="version", version=f"vesselgeom {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="measure every branch of one mask (NIfTI)")
    a.add_argument("mask", help="mask file (.nii or .nii.gz)")
    a.add_argument("--out", required=True, help="output folder (replaced atomically)")
    _add_settings(a)
    a.add_argument(
        "--no-exports", action="store_true", help="skip centerlines.vtp, branch_labels.nii.gz and qc.png"
    )
    a.add_argument("--plots", action="store_true", help="also write profiles/: one figure per branch")
    big = a.add_argument_group("volumes larger than memory (needs vesselgeom[chunked]: dask, zarr)")
    big.add_argument("--chunked", action="store_true", help="process chunk by chunk on Dask")
    big.add_argument("--chunk-size", type=int, default=256, help="chunk edge in voxels (default 256)")
    big.add_argument(
        "--memory-budget",
        type=float,
        default=None,
        metavar="MB",
        help="memory for the workers; inputs larger than this are processed chunked automatically",
    )
    big.add_argument("--scheduler", default=None, help="address of an existing Dask scheduler")
    big.add_argument(
        "--spacing", nargs=3, type=float, metavar=("SX", "SY", "SZ"), help="voxel size (mm) of a plain Zarr"
    )
    big.add_argument(
        "--scratch",
        default=None,
        metavar="DIR",
        help="folder for the point rows while they are collected (default: the output folder's parent)",
    )
    a.add_argument("--quiet", action="store_true", help="print nothing but errors")

    b = sub.add_parser("batch", help="analyse every subject of a cohort (manifest CSV or folder)")
    b.add_argument("source", help="manifest.csv (columns subject, group, mask) or a folder of masks")
    b.add_argument("--out", required=True, help="batch folder (one sub-folder per subject)")
    b.add_argument("--jobs", type=int, default=None, help="worker processes (default: all cores)")
    b.add_argument("--glob", default="*.nii*", help="file pattern in folder mode (default *.nii*)")
    _add_settings(b)

    c = sub.add_parser("compare", help="compare groups of subjects in a batch folder")
    c.add_argument("batch", help="batch folder written by 'vesselgeom batch'")
    c.add_argument("--by", default="group", help="manifest column that defines the groups")
    c.add_argument("--out", required=True, help="comparison folder (comparison.csv, figures/)")
    c.add_argument("--metrics", nargs="+", help="columns of cohort_subjects.csv (default: main indices)")
    c.add_argument("--mixed", action="store_true", help="also fit mixed models (needs statsmodels)")

    r = sub.add_parser("report", help="write one self-contained HTML report for a subject or batch folder")
    r.add_argument("folder", help="output folder of analyze, or a batch folder")
    r.add_argument("--out", help="HTML file (default FOLDER/report.html)")
    r.add_argument("--comparison", help="comparison folder to include (batch reports)")

    acc = sub.add_parser("accuracy", help="expected errors at a voxel size and vessel radius (phantoms)")
    acc.add_argument("--spacing", nargs=3, type=float, required=True, metavar=("SX", "SY", "SZ"))
    acc.add_argument("--radius", type=float, required=True, help="vessel radius in mm")

    d = sub.add_parser("demo", help="run batch and compare on the built-in synthetic cohort")
    d.add_argument("--out", default="vesselgeom-demo", help="output folder (default vesselgeom-demo)")
    d.add_argument("--jobs", type=int, default=None, help="worker processes (default: all cores)")
    return p


def _wants_chunked(args: argparse.Namespace) -> bool:
    """Chunked mode: asked for, a Zarr input, or an input whose uncompressed size exceeds the budget."""
    if args.chunked or args.mask.rstrip("/").endswith(".zarr") or os.path.isdir(args.mask):
        return True
    if args.memory_budget is None or not os.path.isfile(args.mask):
        return False
    import nibabel as nib

    try:
        img = nib.load(args.mask)
    except Exception:  # unreadable: the in-memory loader reports it properly
        return False
    nbytes = float(np.prod(img.shape)) * img.get_data_dtype().itemsize
    return nbytes > args.memory_budget * 2**20


def _existing_parent(path: str) -> str | None:
    """The output folder's parent when it exists (a disk the user chose), else None (TMPDIR)."""
    parent = Path(path).resolve().parent
    return str(parent) if parent.is_dir() else None


def _run_analyze(args: argparse.Namespace) -> int:
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", VesselgeomWarning)
        if _wants_chunked(args):
            try:
                from .chunked import analyze_chunked
            except ImportError:
                raise VesselgeomError(
                    f"{args.mask}: chunked mode needs dask and zarr; pip install 'vesselgeom[chunked]'"
                ) from None
            result = analyze_chunked(
                args.mask,
                settings=_settings(args),
                chunk_size=args.chunk_size,
                memory_budget_mb=args.memory_budget,
                scheduler=args.scheduler,
                spacing=tuple(args.spacing) if args.spacing else None,
                scratch_dir=args.scratch or _existing_parent(args.out),
            )
        else:
            result = analyze(args.mask, settings=_settings(args))
        out = result.write(args.out, exports=not args.no_exports, plots=args.plots)
    if not args.quiet:
        for w in caught:
            if issubclass(w.category, VesselgeomWarning):
                print(f"vesselgeom: warning: {w.message}", file=sys.stderr)
        b = result.branches
        print(
            f"{args.mask}: {len(b)} branches, {len(result.junctions)} junctions, "
            f"total length {b['length_mm'].sum():.1f} mm -> {out}"
        )
        print(CAUTION)
    return 0


def _batch(source: str, out: str, settings: Settings, jobs: int | None, glob: str = "*.nii*") -> int:
    from .cohort.batch import run_batch
    from .cohort.manifest import manifest_from_folder, read_manifest

    subjects = manifest_from_folder(source, pattern=glob) if os.path.isdir(source) else read_manifest(source)
    status = run_batch(
        subjects,
        out,
        settings=settings,
        jobs=jobs,
        log=lambda m: print(f"vesselgeom: failed: {m}", file=sys.stderr),
    )
    counts = status["status"].value_counts()
    print(
        f"{len(status)} subjects: {counts.get('ok', 0)} analysed, {counts.get('skipped', 0)} up to date, "
        f"{counts.get('failed', 0)} failed -> {Path(out) / 'status.csv'}"
    )
    return 1 if counts.get("failed", 0) else 0


def _compare(batch: str, out: str, by: str, metrics, mixed: bool) -> None:
    from .cohort.compare import compare

    table, notes = compare(batch, by=by, metrics=metrics, out_dir=out, mixed=mixed)
    for n in notes:
        print(f"vesselgeom: warning: {n}", file=sys.stderr)
    cols = ["metric", "groups", "medians", "cliffs_delta", "p", "q"]
    with_shift = table.assign(cliffs_delta=table["cliffs_delta"].round(2))
    print(with_shift[cols].to_string(index=False, float_format=lambda v: f"{v:.3g}"))
    print(f"-> {Path(out) / 'comparison.csv'} and {Path(out) / 'figures'}/")


def _run_accuracy(args: argparse.Namespace) -> int:
    from .validation import accuracy, statement, summarise

    spacing = args.spacing
    if min(spacing) <= 0 or args.radius <= 0:
        raise VesselgeomError("accuracy: spacing and radius must be positive")
    rv = args.radius / max(spacing)
    print(
        f"running the phantom family at voxel size {spacing} mm, radius {args.radius} mm ({rv:.2g} voxels)..."
    )
    df = accuracy(spacing, args.radius)
    table = summarise(df).drop(columns=["radius (voxels)", "anisotropy"])
    print(table.to_string(index=False))
    print(statement(df, source="this run"))
    limit = Settings().min_validated_radius_voxels
    if rv < limit:
        print(f"note: {rv:.2g} voxels is below {limit:g} voxels, where validated accuracy starts;")
        print("      analyze flags such branches radius_below_validated")
    print(CAUTION)
    return 0


def _run_demo(args: argparse.Namespace) -> int:
    from .demo import find_or_make_cohort

    out = Path(args.out)
    manifest, made = find_or_make_cohort(out)
    where = "generated" if made else "found"
    print(f"demo cohort ({where}): {manifest} (invented study; synthetic masks)")
    code = _batch(str(manifest), str(out / "batch"), Settings(), args.jobs)
    _compare(str(out / "batch"), str(out / "comparison"), "group", None, False)
    from .report import write_report

    report = write_report(out / "batch", comparison=out / "comparison")
    print(f"report: {report}")
    print(f"per-subject tables: {out / 'batch'}/<subject>/branches.csv; pooled: {out / 'batch'}/cohort_*.csv")
    print(CAUTION)
    return code


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``vesselgeom`` command; returns the exit status."""
    args = _parser().parse_args(argv)
    try:
        if args.command == "analyze":
            return _run_analyze(args)
        if args.command == "batch":
            code = _batch(args.source, args.out, _settings(args), args.jobs, args.glob)
            print(CAUTION)
            return code
        if args.command == "compare":
            _compare(args.batch, args.out, args.by, args.metrics, args.mixed)
            print(CAUTION)
            return 0
        if args.command == "demo":
            return _run_demo(args)
        if args.command == "accuracy":
            return _run_accuracy(args)
        if args.command == "report":
            from .report import write_report

            path = write_report(args.folder, out=args.out, comparison=args.comparison)
            print(f"report -> {path}")
            print(CAUTION)
            return 0
    except (VesselgeomError, ValueError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if isinstance(exc, VesselgeomError) or msg.startswith("settings:"):
            print(f"vesselgeom: error: {msg}", file=sys.stderr)
            return 2
        print(f"vesselgeom: internal error ({type(exc).__name__}: {msg}); please report it", file=sys.stderr)
        return 1
    except BrokenPipeError:  # output piped into e.g. `head`: stop quietly
        sys.stderr.close()
        return 0
    except KeyboardInterrupt:
        print("vesselgeom: interrupted; finished subjects are kept, no half-written output", file=sys.stderr)
        return 130
    return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
