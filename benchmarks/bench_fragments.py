"""Benchmark: a mask of many small vessel fragments, small components traced together or each alone.

Run from the repository root: ``python benchmarks/bench_fragments.py [--cells 16] [--label NOTE]``.

The mask (fixed seed): a grid of cells^3 cubes of 20 voxels, each holding one straight vessel piece of
random direction, length 8-14 voxels and radius 1.2-2.5 voxels (as the many short pieces a segmentation
leaves besides its main tree). It is analysed twice in one process: as the pipeline does, small
components' graphs built together (``vesselgeom.graph.build_graphs``) and
their branches traced together (``vesselgeom.centerline.trace_components``); and with every component's
graph built and traced alone. Per-stage times, the ratio and whether the two runs' tables are identical
are reported and appended to ``benchmarks/results.md``.
"""

from __future__ import annotations

import argparse
import time
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


def fragments(cells: int, seed: int = 3) -> np.ndarray:
    """The fragment mask: one random straight piece per 20-voxel cell."""
    rng = np.random.default_rng(seed)
    size = 20
    mask = np.zeros((cells * size,) * 3, bool)
    g = np.stack(np.meshgrid(*[np.arange(size)] * 3, indexing="ij"), axis=-1).reshape(-1, 3).astype(float)
    for cell in np.ndindex(cells, cells, cells):
        d = rng.normal(size=3)
        d /= np.linalg.norm(d)
        half = rng.uniform(4, 7)
        radius = rng.uniform(1.2, 2.5)
        centre = (size - 1) / 2 + rng.uniform(-1, 1, 3)
        t = np.clip((g - centre) @ d, -half, half)
        inside = np.linalg.norm(g - centre - t[:, None] * d, axis=1) <= radius
        lo = np.array(cell) * size
        mask[lo[0] : lo[0] + size, lo[1] : lo[1] + size, lo[2] : lo[2] + size] = inside.reshape((size,) * 3)
    return mask


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cells", type=int, default=16, help="cells per axis (cells^3 fragments)")
    ap.add_argument("--out", default=str(HERE / "results.md"))
    ap.add_argument("--label", default="", help="a note for the results heading")
    args = ap.parse_args()

    from vesselgeom import VesselgeomWarning, analyze, pipeline

    mask = fragments(args.cells)
    runs = {}
    for name, limit in (("together", pipeline._GROUP_MAX_VOXELS), ("alone", 0)):
        pipeline._GROUP_MAX_VOXELS = limit
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", VesselgeomWarning)  # fragments that thin to a point
            t = time.perf_counter()
            res = analyze(mask, spacing=1.0)
            runs[name] = (time.perf_counter() - t, res)
    identical = all(
        getattr(runs["together"][1], t).equals(getattr(runs["alone"][1], t))
        for t in ("branches", "points", "junctions")
    )
    components = int(runs["together"][1].branches["component_id"].nunique())
    rows = []
    for name, (seconds, res) in runs.items():
        stages = ", ".join(f"{k} {v}" for k, v in res.run["timings_seconds"].items())
        rows.append(
            f"| {name} | {components} | {len(res.branches)} | {seconds:.2f} | "
            f"{1000 * seconds / components:.2f} | {stages} |"
        )
        print(rows[-1])
    ratio = runs["alone"][0] / runs["together"][0]
    summary = (
        f"alone / together: {ratio:.2f}x; the two runs' tables identical (DataFrame.equals): {identical}"
    )
    print(summary)
    lines = [
        f"\n## {time.strftime('%Y-%m-%d %H:%M')} fragments {args.label}".rstrip(),
        f"`benchmarks/bench_fragments.py --cells {args.cells}`: {mask.shape} mask, {int(mask.sum())} "
        "foreground voxels.",
        "",
        "| small components | components with branches | branches | analyze s | ms / component | stages s |",
        "|---|---|---|---|---|---|",
        *rows,
        "",
        summary + ".",
    ]
    with Path(args.out).open("a") as fh:
        fh.write("\n".join(lines) + "\n")
    print(f"appended to {args.out}")
    if not identical:
        raise SystemExit("the tables differ between tracing together and alone")


if __name__ == "__main__":
    main()
