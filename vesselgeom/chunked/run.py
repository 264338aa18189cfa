"""``analyze_chunked``: the single-mask pipeline for masks larger than memory, on Dask.

Stages (each a set of Dask tasks unless noted):

1. *survey*: per chunk, the foreground count and the largest depth (city-block distance to background),
   read with a small probe margin that doubles until no chunk saturates it;
2. *thin*: per chunk, thinning with a halo of :data:`~vesselgeom.chunked.thinning.HALO_DEPTHS` depths,
   keeping the core's skeleton voxels with their radius;
3. *stitch* (in the client): one graph from the union of core voxels, split into components;
   radius at every junction from a sub-volume around it (tasks); spur pruning per component;
4. *trace*: groups of nearby branches of one component, each group read as one box
   (:mod:`vesselgeom.chunked.tracing`), a few groups per task;
5. *measure* (in the client, while tracing runs): each task's centrelines go to
   :class:`~vesselgeom.tabulate.TableBuilder` as the task finishes and are dropped, their point rows
   to files in a scratch folder; junction rows once every branch is in; rows put in branch-id order
   at the end, the points table mapped from its files. The same tables as :func:`vesselgeom.analyze`.

The client holds the skeleton voxels (until tracing starts), the graph, the branch and junction rows
and the results of at most :data:`~vesselgeom.chunked.scheduling.IN_FLIGHT_PER_WORKER` tasks per worker
(in proportion to the skeleton and the number of branches, not the volume or the output points); each
task holds one box at a time.
"""

from __future__ import annotations

import os
import platform
import tempfile
import time
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from vesselgeom import __version__
from vesselgeom.chunked.allocator import prefer_mmap, return_freed_memory
from vesselgeom.chunked.scheduling import PROCESS_OVERHEAD_MB, delayed, executor, shared
from vesselgeom.chunked.sources import LazyVolume, open_lazy
from vesselgeom.chunked.stitch import SkeletonVoxels, branch_max_radius, junction_radii, split_components
from vesselgeom.chunked.thinning import (
    HALO_DEPTHS,
    chunk_boxes,
    default_halo,
    survey_chunk,
    task_bytes_per_voxel,
    thin_chunk,
)
from vesselgeom.chunked.tracing import BranchJob, branch_boxes, group_branches, trace_groups
from vesselgeom.errors import InputError, VesselgeomWarning
from vesselgeom.graph import prune_spurs
from vesselgeom.io.affine import orientation, voxel_sizes, voxel_volume
from vesselgeom.measure import BranchContext
from vesselgeom.pipeline import CAUTION, Result, branch_kinds_and_edges, derived_values
from vesselgeom.pointstore import check_folder, in_memory_folder
from vesselgeom.settings import Settings
from vesselgeom.tabulate import TableBuilder

__all__ = ["analyze_chunked", "PROCESS_OVERHEAD_MB", "BRANCHES_PER_TASK"]

#: Branches traced by one task, at least (whole groups of nearby branches, each group read as one box;
#: a group larger than this is a task of its own).
BRANCHES_PER_TASK = 32
_FIRST_PROBE = 16  # voxels, at most; chunk_size // 8 for small chunks


def analyze_chunked(
    source: Any,
    *,
    settings: Settings | None = None,
    chunk_size: int = 256,
    halo: int | None = None,
    scheduler: Any = None,
    memory_budget_mb: float | None = None,
    spacing: float | tuple[float, float, float] | None = None,
    scratch_dir: str | os.PathLike[str] | None = None,
    **overrides: Any,
) -> Result:
    """Measure every branch of a vessel mask chunk by chunk, never holding the whole volume.

    Parameters
    ----------
    source : path, zarr.Array, ndarray or LazyVolume
        OME-Zarr (NGFF 0.4/0.5), a plain Zarr array (with ``spacing``), a NIfTI file (read lazily), or an
        array (tests).
    settings : Settings, optional
        As for :func:`vesselgeom.analyze`; ``overrides`` change single fields.
    chunk_size : int
        Chunk core edge, voxels. Default 256.
    halo : int, optional
        Voxels read beyond each core for thinning. Default: ``HALO_DEPTHS`` (3) times the largest depth
        (city-block distance to background, voxels) found by the survey, at least 2.
    scheduler : None, str or distributed.Client
        None: a local ``distributed`` cluster (one thread per worker process, memory limits from the
        budget). "synchronous", "threads" or "processes": a local Dask scheduler in this process. Any
        other string: the address of an existing Dask scheduler. A Client: used as is.
    memory_budget_mb : float, optional
        Memory for the workers together, MB. A local cluster gets ``n`` workers with
        ``budget / n`` each (``PROCESS_OVERHEAD_MB`` of it for the process itself); a chunk whose
        thinning task would need more than a worker's share is refused with the largest chunk size
        that fits.
    spacing : float or 3 floats, mm, optional
        Voxel size for plain Zarr arrays and in-memory arrays.
    scratch_dir : path, optional
        An existing, writable folder on a disk with room for twice the points table (89 bytes per
        output point): point rows are written there as tasks finish, in anonymous files that leave
        nothing behind (:class:`~vesselgeom.pointstore.SpilledPoints`); their space is in use while the
        returned points table is alive. Default: the system's temporary folder (``TMPDIR``); a warning
        is given when the folder is on a memory file system (tmpfs).

    Returns
    -------
    Result
        The same tables as :func:`vesselgeom.analyze`; ``run["mode"] == "chunked"`` and
        ``run["chunking"]`` records chunk size, halo, depth, chunk count, scheduler and budget.
        ``volume`` is None (no whole mask exists), so ``Result.write`` skips the label volume and qc.png.
        ``points`` is memory-mapped (copy-on-write) from an anonymous file, not held in memory.
    """
    settings = (settings or Settings()).replace(**overrides) if overrides else settings or Settings()
    if not isinstance(chunk_size, int | np.integer) or chunk_size < 8:
        raise InputError(f"<chunked>: chunk_size must be an integer >= 8 voxels, got {chunk_size!r}")
    if halo is not None and (not isinstance(halo, int | np.integer) or halo < 1):
        raise InputError(f"<chunked>: halo must be a positive integer (voxels), got {halo!r}")
    if memory_budget_mb is not None and not memory_budget_mb > 0:
        raise InputError(f"<chunked>: memory_budget_mb must be positive, got {memory_budget_mb!r}")
    scratch = os.fspath(scratch_dir) if scratch_dir is not None else tempfile.gettempdir()
    check_folder(scratch)  # before hours of work, not after
    prefer_mmap()  # freed boxes go back to the system (vesselgeom.chunked.allocator)
    scratch_note = None
    if in_memory_folder(scratch):
        scratch_note = (
            f"scratch folder {scratch} is on a memory file system (tmpfs): the point rows (89 bytes "
            "each) are kept in memory; pass scratch_dir / --scratch on a disk"
        )
        warnings.warn(f"<chunked>: {scratch_note}", VesselgeomWarning, stacklevel=2)
    t0 = time.perf_counter()
    vol = open_lazy(source, spacing=spacing, label=settings.label, threshold=settings.threshold)
    timings = {"open": time.perf_counter() - t0}
    chunk_size = int(chunk_size)
    boxes = chunk_boxes(vol.shape, chunk_size)
    spacing_mm = voxel_sizes(vol.affine)
    min_voxels = (
        settings.min_component_mm3 / voxel_volume(vol.affine)
        if settings.min_component_mm3 is not None
        else settings.min_component_voxels
    )
    with executor(scheduler, memory_budget_mb) as (compute, stream, info):
        t = time.perf_counter()
        foreground, depth, probe = _survey(vol, boxes, chunk_size, settings, compute)
        timings["survey"] = time.perf_counter() - t
        if foreground == 0:
            what = f"label {vol.label}" if vol.label is not None else "foreground"
            raise InputError(
                f"{vol.source}: mask is empty (no {what} voxels after label/threshold selection)"
            )
        halo_given = halo is not None
        halo = default_halo(depth) if halo is None else int(halo)
        _check_budget(info, chunk_size, halo, vol)

        t = time.perf_counter()
        vol_d = shared(vol)
        parts = compute(
            [
                delayed(thin_chunk)(
                    vol_d, lo, hi, halo=halo, min_voxels=min_voxels, fill_holes=settings.fill_holes
                )
                for lo, hi in boxes
            ]
        )
        voxels = SkeletonVoxels.union(parts, vol.shape)
        del parts
        return_freed_memory()
        timings["thin"] = time.perf_counter() - t

        t = time.perf_counter()
        comps = split_components(voxels)
        radii = _junction_radii(vol_d, comps, voxels, chunk_size, spacing_mm, settings, compute)
        linear = vol.affine[:3, :3]
        for comp in comps:
            prune_spurs(
                comp.graph,
                linear=linear,
                radius_at=lambda p: np.array([radii[tuple(row)] for row in np.asarray(p).tolist()]),
                ratio=settings.prune_ratio,
            )
        timings["graph"] = time.perf_counter() - t

        t = time.perf_counter()
        plan = _plan(comps, voxels, spacing_mm)
        n_skeleton = len(voxels.coords)
        del voxels  # the plan holds what tracing and the tables need
        return_freed_memory()
        tasks = _trace_tasks(plan, vol.affine, (chunk_size + 2 * halo) ** 3)
        tables, measure_s = _trace_and_measure(
            vol, comps, plan, tasks, radii, spacing_mm, settings, stream, scratch
        )
        timings["trace"] = time.perf_counter() - t - measure_s
        timings["measure"] = measure_s
        del plan, tasks
        return_freed_memory()

    branches, points, junctions = tables
    notes = list(vol.warnings) + ([scratch_note] if scratch_note else [])
    run = {
        "software": "vesselgeom",
        "version": __version__,
        "caution": CAUTION,
        "mode": "chunked",
        "input": {
            "source": vol.source,
            "format": vol.kind,
            "sha256": vol.sha256,
            "shape": list(vol.shape),
            "dtype": vol.dtype_in,
            "units_in_file": vol.input_units,
            "voxel_size_mm": [float(v) for v in spacing_mm],
            "orientation": orientation(vol.affine),
            "affine": vol.affine.tolist(),
            "foreground_voxels": int(foreground),
        },
        "settings": settings.to_dict(),
        "derived": derived_values(settings, spacing_mm, min_voxels),
        "chunking": {
            "chunk_size": chunk_size,
            "halo": halo,
            "halo_rule": "given" if halo_given else f"{HALO_DEPTHS} x largest depth (voxels), at least 2",
            "largest_depth_voxels": int(depth),
            "survey_probe_voxels": int(probe),
            "chunks": len(boxes),
            "skeleton_voxels": n_skeleton,
            "scheduler": info["name"],
            "workers": info["workers"],
            "memory_budget_mb": memory_budget_mb,
            "worker_memory_limit_mb": info["limit_mb"],
        },
        "counts": {"branches": len(branches), "junctions": len(junctions), "points": len(points)},
        "timings_seconds": {k: round(v, 3) for k, v in timings.items()},
        "warnings": notes,
        "environment": {"python": platform.python_version(), "numpy": np.__version__},
    }
    return Result(branches, points, junctions, run, None)


# --------------------------------------------------------------------------- budget


def _check_budget(info: dict, chunk_size: int, halo: int, vol: LazyVolume) -> None:
    """Refuse a chunk whose thinning task needs more than a worker's share of the budget."""
    limit = info.get("limit_mb")
    if limit is None:
        return
    allowance = limit - info["overhead_mb"]
    per_voxel = task_bytes_per_voxel(np.dtype(vol.dtype_in).itemsize)
    need = (chunk_size + 2 * halo) ** 3 * per_voxel / 2**20
    if need <= allowance:
        return
    side = int((max(allowance, 0) * 2**20 / per_voxel) ** (1 / 3)) - 2 * halo
    hint = f"use --chunk-size {side} or less" if side >= 8 else "raise the memory budget"
    raise InputError(
        f"{vol.source}: a chunk of {chunk_size} voxels with a halo of {halo} needs about {need:.1f} MB per "
        f"task but each worker has {allowance:.1f} MB of the budget; {hint}"
    )


# --------------------------------------------------------------------------- stages


def _survey(
    vol: LazyVolume, boxes: list, chunk_size: int, settings: Settings, compute: Callable
) -> tuple[int, int, int]:
    """Total foreground and largest depth; the probe doubles for chunks whose depth reached it."""
    probe = min(_FIRST_PROBE, max(4, chunk_size // 8))
    vol_d = shared(vol)
    todo = list(range(len(boxes)))
    found: dict[int, Any] = {}
    while True:
        results = compute(
            [
                delayed(survey_chunk)(vol_d, *boxes[i], probe=probe, fill_holes=settings.fill_holes)
                for i in todo
            ]
        )
        found.update(zip(todo, results, strict=True))
        todo = [i for i in todo if found[i].saturated]
        if not todo:
            break
        if probe >= 4 * chunk_size:
            raise InputError(
                f"{vol.source}: vessels are more than {probe} voxels deep, too wide for a chunk of "
                f"{chunk_size}; raise the chunk size"
            )
        probe *= 2
    foreground = sum(s.foreground for s in found.values())
    depth = max((s.depth for s in found.values()), default=0)
    return foreground, depth, probe


def _junction_radii(
    vol_d: Any,
    comps: list,
    voxels: SkeletonVoxels,
    chunk_size: int,
    spacing_mm: np.ndarray,
    settings: Settings,
    compute: Callable,
) -> dict[tuple, float]:
    """Radius (mm) at every junction node position, one task per chunk holding junctions."""
    keys, positions, margins = [], [], []
    for comp in comps:
        for node in comp.graph.nodes.values():
            if node.kind != "junction":
                continue
            pos = voxels.lookup(node.voxels)
            r = float(voxels.radius[pos[pos >= 0]].max()) if np.any(pos >= 0) else 0.0
            keys.append(tuple(node.position.tolist()))
            positions.append(node.position)
            margins.append(int(np.ceil(r / spacing_mm.min())) + 3)
    if not keys:
        return {}
    positions_a = np.array(positions)
    margins_a = np.array(margins)
    cell = np.floor(positions_a / chunk_size).astype(int)
    groups: dict[tuple, list[int]] = {}
    for i, c in enumerate(map(tuple, cell.tolist())):
        groups.setdefault(c, []).append(i)
    order = sorted(groups)
    results = compute(
        [
            delayed(junction_radii)(
                vol_d, positions_a[groups[c]], margins_a[groups[c]], fill_holes=settings.fill_holes
            )
            for c in order
        ]
    )
    out: dict[tuple, float] = {}
    for c, r in zip(order, results, strict=True):
        for i, v in zip(groups[c], r, strict=True):
            out[keys[i]] = float(v)
    return out


def _plan(
    comps: list, voxels: SkeletonVoxels, spacing_mm: np.ndarray
) -> list[tuple[Any, BranchContext, BranchJob]]:
    """Branch ids, node ids, flags and tracing jobs, numbered as the in-memory pipeline numbers them.

    ``touches_image_edge`` uses the pipeline's own test (a free end within its radius plus a voxel of
    an image face), with the radius at the end voxel from the thinning task.
    """
    plan = []
    next_branch, next_node = 1, 1

    def radius_at(ijk: np.ndarray) -> np.ndarray:
        pos = voxels.lookup(np.rint(ijk).astype(np.int64))
        return np.where(pos >= 0, voxels.radius[np.maximum(pos, 0)], 0.0)

    for comp in comps:
        graph = comp.graph
        node_ids = {nid: next_node + i for i, nid in enumerate(sorted(graph.nodes))}
        next_node += len(node_ids)
        comp.node_ids = node_ids
        kinds, at_edge = branch_kinds_and_edges(
            graph,
            near_edge=comp.at_edge,
            offset=np.zeros(3),
            radius_at=radius_at,
            voxel_mm=float(spacing_mm.min()),
            shape=voxels.shape,
        )
        for b, (kind, free), edge in zip(graph.branches, kinds, at_edge.tolist(), strict=True):
            flags: tuple[str, ...] = ("touches_image_edge",) if edge else ()
            ctx = BranchContext(
                next_branch, comp.component_id, kind, node_ids.get(b.start), node_ids.get(b.end), flags
            )
            job = BranchJob(b.path, b.closed, free[0], free[1], branch_max_radius(b, graph.nodes, voxels))
            plan.append((b, ctx, job))
            next_branch += 1
    return plan


def _trace_tasks(plan: list, affine: np.ndarray, max_box_voxels: float) -> list[list[np.ndarray]]:
    """Tracing tasks: spatial groups of one component's branches
    (:func:`~vesselgeom.chunked.tracing.group_branches`), consecutive groups packed until a task holds
    :data:`BRANCHES_PER_TASK` branches.

    A group's box is at most ``max_box_voxels`` (a thinning task's box, which the budget already admits),
    unless a single branch needs more. Returns each task's groups as arrays of plan indices.
    """
    lo, hi = branch_boxes([job for _, _, job in plan], affine)
    keys = np.array([ctx.component_id for _, ctx, _ in plan], np.int64)
    tasks: list[list[np.ndarray]] = []
    count = BRANCHES_PER_TASK
    for group in group_branches(lo, hi, max_box_voxels=max_box_voxels, keys=keys):
        if count >= BRANCHES_PER_TASK:
            tasks.append([])
            count = 0
        tasks[-1].append(group)
        count += len(group)
    return tasks


def _trace_and_measure(
    vol: LazyVolume,
    comps: list,
    plan: list,
    tasks: list[list[np.ndarray]],
    radii: dict[tuple, float],
    spacing_mm: np.ndarray,
    settings: Settings,
    stream: Callable,
    spill_dir: str,
) -> tuple[tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame], float]:
    """Trace the branches in tasks and measure each task's branches as its result arrives.

    Rows are built as :func:`vesselgeom.pipeline.analyze_volume` builds them (``TableBuilder``): each
    task's centrelines are measured and dropped as soon as the task is collected (in whatever order the
    tasks finish), junctions are added once every branch is in, and the branch and point rows are put
    in branch-id order at the end; point rows go to anonymous files in ``spill_dir``, and the points
    table is mapped from them. Returns the three tables and the seconds spent measuring.
    """
    builder = TableBuilder(
        settings=settings,
        voxel_mm=float(np.mean(spacing_mm)),
        coarsest_voxel_mm=float(spacing_mm.max()),
        spill_dir=spill_dir,
    )
    measure_s = 0.0
    voxel_mm = float(np.mean(spacing_mm))
    calls = (([[plan[i][2] for i in group] for group in task],) for task in tasks)
    try:
        for k, traced in stream(trace_groups, vol, calls, voxel_mm=voxel_mm, settings=settings):
            t = time.perf_counter()
            order = np.concatenate(tasks[k])
            lines = [cl for group in traced for cl in group]
            del traced
            builder.add_branches(lines, [plan[i][1] for i in order.tolist()])
            del lines
            measure_s += time.perf_counter() - t
        t = time.perf_counter()
        _add_junctions(builder, comps, plan, radii, vol.affine)
        tables = builder.tables(by_branch_id=True)  # tasks finish in spatial order, not branch order
    except BaseException:
        builder.discard()  # the point files' disk space is freed now, not when the traceback goes
        raise
    del builder
    return tables, measure_s + time.perf_counter() - t


def _add_junctions(
    builder: TableBuilder, comps: list, plan: list, radii: dict[tuple, float], affine: np.ndarray
) -> None:
    """Junction rows, component by component and node by node, as the in-memory pipeline adds them."""
    context = {id(b): ctx for b, ctx, _ in plan}
    for comp in comps:
        graph = comp.graph
        ends_at: dict[int, list[tuple[int, bool]]] = {}  # branch ends per node, in branch order
        for b in graph.branches:
            bid = context[id(b)].branch_id
            if b.start is not None:
                ends_at.setdefault(b.start, []).append((bid, True))
            if b.end is not None:
                ends_at.setdefault(b.end, []).append((bid, False))
        for nid in sorted(graph.nodes):
            node = graph.nodes[nid]
            if node.kind != "junction":
                continue
            pos = node.position @ affine[:3, :3].T + affine[:3, 3]
            radius = radii[tuple(node.position.tolist())]
            builder.add_junction(comp.node_ids[nid], comp.component_id, pos, radius, ends_at.get(nid, []))
