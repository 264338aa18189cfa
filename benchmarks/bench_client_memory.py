"""What the chunked run's client allocates, stage by stage (tracemalloc), on a synthetic Zarr network.

Run from the repository root: ``python benchmarks/bench_client_memory.py [--size 384] [--chunk 128]``.

The network is that of ``benchmarks/bench_chunked.py`` (written into a uint8 Zarr array chunk by chunk).
``vesselgeom.chunked.analyze_chunked`` runs on the synchronous scheduler, so tasks run in this process
too; the stage functions of ``vesselgeom.chunked.run`` are wrapped to record Python's traced memory
(``tracemalloc``: numpy, scipy and zarr buffers go through it) before and after each, and the peak in
between. Prints one line per mark and the run's counts, for the client table of ``docs/chunked.md``.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import tracemalloc
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
_STAGES = (
    "split_components",
    "_junction_radii",
    "_plan",
    "_trace_tasks",
    "_trace_and_measure",
    "_add_junctions",
)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=384)
    ap.add_argument("--chunk", type=int, default=128)
    ap.add_argument("--zarr", type=Path, default=None, help="default /tmp/vesselgeom_client_<size>.zarr")
    args = ap.parse_args(argv)
    sys.path.insert(0, str(HERE))
    import bench_chunked

    from vesselgeom.chunked import analyze_chunked
    from vesselgeom.chunked import run as stages
    from vesselgeom.tabulate import TableBuilder

    path = args.zarr or Path(f"/tmp/vesselgeom_client_{args.size}.zarr")
    if not path.exists():
        n_trees = max(1, int(12 * (args.size / 256) ** 3))
        shape = (args.size,) * 3
        bench_chunked.write_network_zarr(path, shape, chunk=64, n_trees=n_trees, depth=6, seed=7)

    log: list[tuple[str, float, float]] = []

    def mark(name: str) -> None:
        current, peak = tracemalloc.get_traced_memory()
        log.append((name, current / 2**20, peak / 2**20))
        tracemalloc.reset_peak()

    def wrapped(name, func):
        def call(*a, **k):
            mark("before " + name)
            out = func(*a, **k)
            mark("after " + name)
            return out

        return call

    for name in _STAGES:
        setattr(stages, name, wrapped(name, getattr(stages, name)))
    TableBuilder.tables = wrapped("tables", TableBuilder.tables)

    warm = np.zeros((16, 16, 16), bool)
    warm[8] = True  # imports and first-use caches before the traced run
    analyze_chunked(warm, spacing=1.0, chunk_size=8, scheduler="synchronous")
    log.clear()
    tracemalloc.start()
    t = time.perf_counter()
    res = analyze_chunked(str(path), spacing=1.0, chunk_size=args.chunk, scheduler="synchronous")
    mark("end")
    tracemalloc.stop()
    counts = {
        "seconds": round(time.perf_counter() - t, 1),
        "skeleton_voxels": res.run["chunking"]["skeleton_voxels"],
        "branches": len(res.branches),
        "junctions": len(res.junctions),
        "points": len(res.points),
    }
    print(json.dumps(counts))
    for name, current, peak in log:
        print(f"{name:28s} current {current:8.2f} MiB   peak since the previous mark {peak:8.2f} MiB")


if __name__ == "__main__":
    main()
