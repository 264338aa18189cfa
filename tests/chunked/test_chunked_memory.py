"""Memory stays within the budget: a volume 4x the budget completes; a chunk too big for it is refused.

Peak memory is Python's own accounting of allocations (``tracemalloc``, standard library), which numpy,
scipy and zarr buffers go through; the run uses the synchronous scheduler so every task runs in this
process and is counted.
"""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest

import vesselgeom as vg
from vesselgeom import phantoms as P
from vesselgeom.errors import InputError

zarr = pytest.importorskip("zarr")
pytest.importorskip("dask")

from vesselgeom.chunked import analyze_chunked  # noqa: E402

BUDGET_MB = 2.0
#: Stated overhead beyond the budget: the client's own state (skeleton voxels, graph, tables, the Dask
#: task graph), which grows with the skeleton, not the volume.
OVERHEAD_MB = 1.0


@pytest.fixture(scope="module")
def probability_map(tmp_path_factory):
    """A 128^3 float32 probability map (8 MiB, 4x the budget) in a Zarr array, and its mask."""
    mask, _ = P.network_phantom((128, 128, 128), n_trees=3, depth=4, radius_voxels=(1.0, 2.5), seed=4)
    path = tmp_path_factory.mktemp("mem") / "prob.zarr"
    arr = zarr.create_array(str(path), shape=mask.shape, chunks=(16, 16, 16), dtype="float32")
    arr[:] = np.where(mask, 0.9, 0.1).astype(np.float32)
    assert arr.nbytes >= 4 * BUDGET_MB * 2**20
    return path, mask


def test_volume_four_times_the_budget_completes_within_it(probability_map):
    path, mask = probability_map
    opts = dict(spacing=1.0, threshold=0.5, chunk_size=28, scheduler="synchronous")
    # a small run first, so that importing dask and zarr modules is not counted
    analyze_chunked(np.where(mask[:56, :56, :56], 0.9, 0.1), **opts)
    tracemalloc.start()
    try:
        got = analyze_chunked(path, memory_budget_mb=BUDGET_MB, **opts)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    print(f"peak {peak / 2**20:.2f} MiB for a budget of {BUDGET_MB} MiB")
    assert peak / 2**20 <= BUDGET_MB + OVERHEAD_MB
    ref = vg.analyze(mask, spacing=1.0)
    assert len(got.branches) == len(ref.branches) and len(got.junctions) == len(ref.junctions)
    np.testing.assert_allclose(got.branches.length_mm.sum(), ref.branches.length_mm.sum(), rtol=0.01)


def test_chunk_too_big_for_the_budget_is_refused(probability_map):
    path, _ = probability_map
    with pytest.raises(InputError, match=r"use --chunk-size \d+ or less"):
        analyze_chunked(
            path,
            spacing=1.0,
            threshold=0.5,
            chunk_size=96,
            scheduler="synchronous",
            memory_budget_mb=BUDGET_MB,
        )


def test_local_cluster_processes(probability_map, tmp_path):
    """The default scheduler: a local distributed cluster of worker processes (the volume is pickled)."""
    pytest.importorskip("distributed")
    _, mask = probability_map
    arr = zarr.create_array(str(tmp_path / "m.zarr"), shape=(64, 64, 64), chunks=(32, 32, 32), dtype="uint8")
    arr[:] = mask[32:96, 32:96, 32:96]
    opts = dict(spacing=1.0, chunk_size=32)
    ref = analyze_chunked(tmp_path / "m.zarr", scheduler="synchronous", **opts)
    got = analyze_chunked(tmp_path / "m.zarr", memory_budget_mb=800, **opts)
    assert got.run["chunking"]["scheduler"] == "local-distributed"
    assert got.run["chunking"]["workers"] == 2  # 800 MB // (2 x 200 MB process overhead), capped at cores
    assert len(ref.branches) >= 3
    # the same tasks on another scheduler give the same tables (run.json differs in timings only)
    assert got.branches.equals(ref.branches) and got.junctions.equals(ref.junctions)
