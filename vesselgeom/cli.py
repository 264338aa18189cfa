"""Command line: ``vesselgeom analyze MASK --out DIR`` and friends.

Thin by design: parse arguments, call the package, print one-line messages. Errors on bad input print
``vesselgeom: error: <file>: <problem>`` and exit with status 2, without a traceback and without writing
any output.

Exit status: 0 success; 2 bad input or usage; 1 an unexpected internal error (a bug: please report it).
"""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Sequence

from . import __version__
from .errors import VesselgeomError, VesselgeomWarning
from .pipeline import CAUTION, analyze
from .settings import Settings

__all__ = ["main"]

_SETTING_FLAGS = {
    "prune_ratio": float,
    "smoothing_radii": float,
    "step_mm": float,
    "min_component_mm3": float,
    "curvature_floor_per_voxel": float,
    "recentre_passes": int,
}


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="vesselgeom",
        description="Centreline geometry of 3D vessel masks, in mm. " + CAUTION,
    )
    p.add_argument("--version", action="version", version=f"vesselgeom {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="measure every branch of one mask (NIfTI)")
    a.add_argument("mask", help="mask file (.nii or .nii.gz)")
    a.add_argument("--out", required=True, help="output folder (replaced atomically)")
    sel = a.add_mutually_exclusive_group()
    sel.add_argument("--label", type=int, help="analyse only this label of an integer label map")
    sel.add_argument(
        "--threshold", type=float, help="foreground is value >= T (required for probability maps)"
    )
    a.add_argument("--keep-holes", action="store_true", help="do not fill enclosed cavities")
    for name, typ in _SETTING_FLAGS.items():
        default = getattr(Settings(), name)
        a.add_argument(
            f"--{name.replace('_', '-')}",
            type=typ,
            default=None,
            help=f"see Settings.{name} (default {default})",
        )
    a.add_argument("--quiet", action="store_true", help="print nothing but errors")
    return p


def _run_analyze(args: argparse.Namespace) -> int:
    overrides = {k: getattr(args, k) for k in _SETTING_FLAGS if getattr(args, k) is not None}
    settings = Settings(
        label=args.label, threshold=args.threshold, fill_holes=not args.keep_holes, **overrides
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", VesselgeomWarning)
        result = analyze(args.mask, settings=settings)
        out = result.write(args.out)
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


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``vesselgeom`` command; returns the exit status."""
    args = _parser().parse_args(argv)
    try:
        if args.command == "analyze":
            return _run_analyze(args)
    except (VesselgeomError, ValueError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        if isinstance(exc, VesselgeomError) or msg.startswith("settings:"):
            print(f"vesselgeom: error: {msg}", file=sys.stderr)
            return 2
        print(
            f"vesselgeom: internal error ({type(exc).__name__}: {msg}); please report it",
            file=sys.stderr,
        )
        return 1
    except KeyboardInterrupt:
        print("vesselgeom: interrupted; no output written", file=sys.stderr)
        return 130
    return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
