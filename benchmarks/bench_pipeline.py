"""Benchmark: whole ``analyze`` against scikit-image thinning alone, and a branch-count ladder of geometry.

Run from the repository root: ``python benchmarks/bench_pipeline.py [--sizes 256 ...] [--ladder 1000 ...]``.

Each case runs in a fresh subprocess, so its peak resident memory is its own.

*Networks* (``--sizes``): a network of random trees (``vesselgeom.phantoms.network_phantom``, fixed seed,
radii 1-5 voxels); thinning alone (scikit-image) and the whole pipeline are timed on the same mask in the
same process, with the pipeline's per-stage times (``run.json`` timings) and the ratio.

*Ladder* (``--ladder``): the geometry stages alone (trace: ``vesselgeom.centerline.trace_centerlines``;
measure: ``vesselgeom.tabulate.TableBuilder.add_branches``, i.e. ``branch_columns`` and
``point_columns_many``) on N branches. The branches are those
of a fixed-seed 256^3 network, prepared as the pipeline prepares them (components, thinning, graph,
pruning), and cycled component by component until N branches have been traced, as if the network were
tiled N / 396 times; as in the pipeline, components with small crops are traced together in shared
batches (``vesselgeom.centerline.trace_components``; ``--no-grouping``: every component alone, as
before 2026-12-02).
Reports time per branch; linear cost means a constant time per branch.

Results are appended to ``benchmarks/results.md`` (or ``--out``) with the machine's description.
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

# name -> (shape, n_trees, depth); depth 7 reaches the 1-voxel radius floor (5 / 2^(6/3) = 1.25)
SIZES = {
    "256": ((256, 256, 256), 12, 6),
    "400x512x512": ((400, 512, 512), 85, 7),
}
LADDER = (1_000, 10_000, 100_000)
_LADDER_SOURCE = ((256, 256, 256), 12, 6)


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _network(name: str) -> dict:
    import numpy as np
    from skimage.morphology import skeletonize

    import vesselgeom as vg
    from vesselgeom.phantoms import network_phantom

    shape, n_trees, depth = SIZES[name]
    t = time.perf_counter()
    mask, affine = network_phantom(shape, n_trees=n_trees, depth=depth, seed=1)
    gen = time.perf_counter() - t
    base_rss = _peak_mb()
    t = time.perf_counter()
    skeletonize(mask)
    thin = time.perf_counter() - t
    t = time.perf_counter()
    res = vg.analyze(mask, affine=affine)
    whole = time.perf_counter() - t
    return {
        "case": name,
        "shape": list(shape),
        "foreground_voxels": int(mask.sum()),
        "foreground_fraction": round(float(mask.mean()), 4),
        "branches": len(res.branches),
        "junctions": len(res.junctions),
        "generate_s": round(gen, 2),
        "thinning_alone_s": round(thin, 2),
        "analyze_s": round(whole, 2),
        "ratio_analyze_to_thinning": round(whole / thin, 2),
        "stages_s": res.run["timings_seconds"],
        "peak_rss_mb": round(_peak_mb(), 1),
        "rss_before_analyze_mb": round(base_rss, 1),
        "mask_uint8_mb": round(mask.size / 2**20, 1),
        "total_length_mm": round(float(np.nansum(res.branches["length_mm"])), 1),
    }


def _prepared_components():
    """Per component of the ladder's source network: (section, boundary, inputs, contexts, crop, affine).

    Components are prepared by the tests' helper (``tests/_prepared.py``), as the pipeline prepares them.
    """
    import numpy as np

    sys.path.insert(0, str(HERE.parent / "tests"))
    from _prepared import prepared_components

    from vesselgeom.crosssection import CrossSection
    from vesselgeom.measure import BranchContext
    from vesselgeom.phantoms import network_phantom
    from vesselgeom.settings import Settings

    shape, n_trees, depth = _LADDER_SOURCE
    mask, affine = network_phantom(shape, n_trees=n_trees, depth=depth, seed=1)
    settings = Settings()
    out = []
    for comp, aff, boundary, _graph, inputs in prepared_components(mask, affine, settings):
        contexts = [
            BranchContext(i + 1, comp.component_id, "internal", None, None) for i in range(len(inputs))
        ]
        if inputs:
            out.append((CrossSection(comp.mask, aff), boundary, inputs, contexts, comp.mask, aff))
    return out, float(np.mean(np.abs(np.diag(affine)[:3]))), settings


def _ladder(n: int, grouping: bool = True) -> dict:
    from vesselgeom.centerline import trace_centerlines, trace_components
    from vesselgeom.pipeline import _BATCH_BRANCHES, _GROUP_BYTES, _Group
    from vesselgeom.tabulate import TableBuilder

    comps, voxel_mm, settings = _prepared_components()
    builder = TableBuilder(settings=settings, voxel_mm=voxel_mm, coarsest_voxel_mm=voxel_mm)
    source_branches = sum(len(c[2]) for c in comps)
    base_rss = _peak_mb()
    trace = measure = 0.0
    done = points = 0
    # small components waiting to be traced together, with the pipeline's limits
    group = _Group(_BATCH_BRANCHES, _GROUP_BYTES)

    def measured(lines, contexts) -> None:
        nonlocal measure, points
        t = time.perf_counter()
        builder.add_branches(lines, contexts)
        points += sum(len(cl.arc) for cl in lines if cl is not None)
        measure += time.perf_counter() - t

    def flush() -> None:
        nonlocal trace
        pending = group.take()
        if not pending:
            return
        t = time.perf_counter()
        traced = trace_components([(s, b, i) for s, b, i, _ in pending], voxel_mm=voxel_mm, settings=settings)
        trace += time.perf_counter() - t
        measured([cl for lines in traced for cl in lines], [c for p in pending for c in p[3]])

    while done < n:
        for section, boundary, inputs, contexts, crop, _aff in comps:
            take = min(len(inputs), n - done)
            if take <= 0:
                break
            done += take
            if grouping and _Group.admits(crop, take):
                held = crop.nbytes + boundary.nbytes
                if group.full_with(take, held):
                    flush()
                group.add((section, boundary, inputs[:take], contexts[:take]), take, held)
                continue
            flush()
            t = time.perf_counter()
            lines = trace_centerlines(
                inputs[:take], section=section, boundary=boundary, voxel_mm=voxel_mm, settings=settings
            )
            trace += time.perf_counter() - t
            measured(lines, contexts[:take])
    flush()
    total = trace + measure
    return {
        "branches": n,
        "source_branches": source_branches,
        "points": points,
        "grouping": grouping,
        "trace_s": round(trace, 2),
        "measure_s": round(measure, 2),
        "geometry_s": round(total, 2),
        "ms_per_branch": round(1000 * total / n, 3),
        "peak_rss_mb": round(_peak_mb(), 1),
        "rss_before_geometry_mb": round(base_rss, 1),
    }


def _run(*args: str) -> dict:
    proc = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True, check=True)
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _machine() -> str:
    cpu = platform.processor() or platform.machine()
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = ""
    try:
        kb = int(Path("/proc/meminfo").read_text().split()[1])
        mem = f", {kb / 2**20:.0f} GiB RAM"
    except (OSError, ValueError, IndexError):
        pass
    import numpy
    import scipy
    import skimage

    return (
        f"{cpu}, {os.cpu_count()} cores{mem}; Python {platform.python_version()}, numpy {numpy.__version__}, "
        f"scipy {scipy.__version__}, scikit-image {skimage.__version__}"
    )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", nargs="*", default=list(SIZES), choices=list(SIZES))
    ap.add_argument("--ladder", nargs="*", type=int, default=list(LADDER), help="branch counts")
    ap.add_argument("--one", help=argparse.SUPPRESS)
    ap.add_argument("--one-ladder", type=int, help=argparse.SUPPRESS)
    ap.add_argument(
        "--no-grouping", action="store_true", help="ladder: trace every component alone (no grouping)"
    )
    ap.add_argument("--out", default=str(HERE / "results.md"))
    ap.add_argument("--label", default="", help="a note for the results heading (e.g. 'before')")
    args = ap.parse_args()
    if args.one:
        print(json.dumps(_network(args.one)))
        return
    if args.one_ladder:
        print(json.dumps(_ladder(args.one_ladder, grouping=not args.no_grouping)))
        return
    lines = [f"\n## {time.strftime('%Y-%m-%d %H:%M')} {args.label}".rstrip(), f"Machine: {_machine()}.", ""]
    if args.sizes:
        lines += [
            "| network | fg voxels (fraction) | branches | thinning alone s | analyze s | ratio | stages s "
            "| peak RSS MB | mask MB | RSS limit MB |",
            "|---|---|---|---|---|---|---|---|---|---|",
        ]
    for name in args.sizes:
        r = _run("--one", name)
        print(json.dumps(r), flush=True)
        stages = ", ".join(f"{k} {v}" for k, v in r["stages_s"].items())
        lines.append(
            f"| {r['case']} | {r['foreground_voxels']} ({100 * r['foreground_fraction']:.2f} %) | "
            f"{r['branches']} | {r['thinning_alone_s']} | {r['analyze_s']} | "
            f"**{r['ratio_analyze_to_thinning']}** | {stages} | {r['peak_rss_mb']} | "
            f"{r['mask_uint8_mb']} | {4 * r['mask_uint8_mb'] + 300:.0f} |"
        )
    if args.ladder:
        lines += [
            "",
            "| geometry ladder: branches | small components | points | trace s | measure s | total s "
            "| ms / branch | x time for 10x branches | peak RSS MB |",
            "|---|---|---|---|---|---|---|---|---|",
        ]
    prev = None
    for n in args.ladder:
        r = _run("--one-ladder", str(n), *(["--no-grouping"] if args.no_grouping else []))
        print(json.dumps(r), flush=True)
        ratio = "-"
        if prev and prev["branches"] * 10 == n:
            ratio = f"{r['geometry_s'] / prev['geometry_s']:.1f}"
        lines.append(
            f"| {n} | {'together' if r['grouping'] else 'alone'} | {r['points']} | {r['trace_s']} | "
            f"{r['measure_s']} | {r['geometry_s']} | "
            f"{r['ms_per_branch']} | {ratio} | {r['peak_rss_mb']} |"
        )
        prev = r
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
