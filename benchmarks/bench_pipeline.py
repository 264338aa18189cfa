"""Benchmark: whole ``analyze`` against scikit-image thinning alone on synthetic vascular networks.

Run from the repository root: ``python benchmarks/bench_pipeline.py [--sizes 256 ...] [--out FILE]``.
Each size runs in a fresh subprocess (so peak memory is that run's own), generates a network with a
fixed seed (``vesselgeom.phantoms.network_phantom``), times thinning alone and the whole pipeline on the
same mask in the same process, and prints per-stage times, peak resident memory and the ratio.
Results are appended to ``benchmarks/results.md`` with the machine's description.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent

SIZES = {
    "256": ((256, 256, 256), 12, 6),
    "400x512x512": ((400, 512, 512), 40, 7),
}


def _one(name: str) -> dict:
    import numpy as np
    from skimage.morphology import skeletonize

    import vesselgeom as vg
    from vesselgeom.phantoms import network_phantom

    shape, n_trees, depth = SIZES[name]
    t = time.perf_counter()
    mask, affine = network_phantom(shape, n_trees=n_trees, depth=depth, seed=1)
    gen = time.perf_counter() - t
    base_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    t = time.perf_counter()
    skeletonize(mask)
    thin = time.perf_counter() - t
    t = time.perf_counter()
    res = vg.analyze(mask, affine=affine)
    whole = time.perf_counter() - t
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    return {
        "case": name,
        "shape": list(shape),
        "foreground_voxels": int(mask.sum()),
        "foreground_fraction": float(mask.mean()),
        "branches": len(res.branches),
        "junctions": len(res.junctions),
        "generate_s": round(gen, 2),
        "thinning_alone_s": round(thin, 2),
        "analyze_s": round(whole, 2),
        "ratio_analyze_to_thinning": round(whole / thin, 2),
        "stages_s": res.run["timings_seconds"],
        "peak_rss_mb": round(peak, 1),
        "rss_before_analyze_mb": round(base_rss, 1),
        "mask_uint8_mb": round(mask.size / 2**20, 1),
        "total_length_mm": round(float(np.nansum(res.branches["length_mm"])), 1),
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", nargs="+", default=list(SIZES), choices=list(SIZES))
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--out", default=str(HERE / "results.md"))
    ap.add_argument("--label", default="", help="a note for the results table (e.g. 'before')")
    args = ap.parse_args()
    if args.one:
        print(json.dumps(_one(args.one)))
        return
    rows = []
    for name in args.sizes:
        proc = subprocess.run(
            [sys.executable, __file__, "--one", name], capture_output=True, text=True, check=True
        )
        row = json.loads(proc.stdout.strip().splitlines()[-1])
        rows.append(row)
        print(json.dumps(row))
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    lines = [
        f"\n## {time.strftime('%Y-%m-%d %H:%M')} {args.label}".rstrip(),
        f"Machine: {machine}.",
        "",
        "| case | fg voxels | branches | thinning s | analyze s | ratio | stages s | peak RSS MB | mask MB |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    for r in rows:
        stages = ", ".join(f"{k} {v}" for k, v in r["stages_s"].items())
        lines.append(
            f"| {r['case']} | {r['foreground_voxels']} | {r['branches']} | {r['thinning_alone_s']} | "
            f"{r['analyze_s']} | {r['ratio_analyze_to_thinning']} | {stages} | {r['peak_rss_mb']} | "
            f"{r['mask_uint8_mb']} |"
        )
    out = Path(args.out)
    if not out.exists():
        out.write_text(
            "# Benchmark results\n\nWritten by `benchmarks/bench_pipeline.py`; ratios are measured in one "
            "run on the same mask. Shared machines are noisy: compare ratios, not absolute seconds.\n"
        )
    with out.open("a") as fh:
        fh.write("\n".join(lines) + "\n")
    print(f"appended to {out}")


if __name__ == "__main__":
    main()
