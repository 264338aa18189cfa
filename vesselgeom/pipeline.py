"""The single-mask pipeline: load, prepare, thin, build and prune the graph, trace, measure, tabulate.

Data flows one way (see ``ARCHITECTURE.md``); this module only orders the stages, carries the settings and
records provenance. It never reads a file format itself: that is :mod:`vesselgeom.io`.
"""

from __future__ import annotations

import json
import os
import platform
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from . import __version__
from .caution import CAUTION
from .centerline import BranchInput, trace_centerlines, trace_components
from .crosssection import CrossSection
from .errors import InputError, VesselgeomWarning
from .exports import branch_label_volume, write_label_volume, write_vtp
from .graph import SkeletonGraph, build_graph, build_graphs, prune_spurs
from .io import Volume, atomic_output_dir, load_nifti, volume_from_array
from .io.affine import voxel_sizes
from .measure import BranchContext
from .qc import profile_figures, qc_figure
from .radius import BoundaryDistance
from .settings import Settings
from .skeleton import Component, iter_components, thin
from .tables import (
    BRANCH_COLUMNS,
    JUNCTION_COLUMNS,
    POINT_COLUMNS,
    columns_document,
    write_csv,
)
from .tabulate import TableBuilder

__all__ = ["Result", "analyze", "analyze_volume", "CAUTION"]

# branches traced and measured together (bounds the memory of traced centrelines)
_BATCH_BRANCHES = 2048
# components whose crop holds at most this many voxels (64^3) and that have at most _BATCH_BRANCHES
# branches are traced together with others (centerline.trace_components), in groups of at most
# _BATCH_BRANCHES branches whose crops and k-d trees held meanwhile take at most _GROUP_BYTES (32 MiB)
_GROUP_MAX_VOXELS = 64**3
_GROUP_BYTES = 32 * 2**20
# before that, thinned small components (crop <= _GROUP_MAX_VOXELS) wait to have their graphs built
# together (graph.build_graphs), at most this many at once, their crops and skeletons within _GROUP_BYTES
# (so both groups together hold at most 2 x _GROUP_BYTES; both are emptied before a large component)
_GRAPH_BATCH = 512


class _Group:
    """Small components held back to be processed together, within one group's limits.

    For tracing, a component may join when its crop holds at most ``_GROUP_MAX_VOXELS`` voxels and it has
    at most ``_BATCH_BRANCHES`` branches (:meth:`admits`); a group holds at most ``max_count`` units
    (branches when tracing, components when building graphs) and ``max_bytes`` of what its components
    hold meanwhile (crops, k-d trees, skeletons).
    """

    def __init__(self, max_count: int, max_bytes: int) -> None:
        self._items: list = []
        self._count = self._bytes = 0
        self._max_count, self._max_bytes = max_count, max_bytes

    @staticmethod
    def admits(crop: np.ndarray, n_branches: int = 0) -> bool:
        return crop.size <= _GROUP_MAX_VOXELS and n_branches <= _BATCH_BRANCHES

    def full_with(self, count: int, held_bytes: int) -> bool:
        """Whether adding a component would exceed the group's limits."""
        return self._count + count > self._max_count or self._bytes + held_bytes > self._max_bytes

    def add(self, item: Any, count: int, held_bytes: int) -> None:
        self._items.append(item)
        self._count += count
        self._bytes += held_bytes

    def take(self) -> list:
        """The held items, in order; the group is empty afterwards."""
        items, self._items = self._items, []
        self._count = self._bytes = 0
        return items


class _Pending(NamedTuple):
    """A small component waiting to be traced together with others."""

    section: CrossSection
    boundary: BoundaryDistance
    inputs: list[BranchInput]
    contexts: list[BranchContext]
    junctions: list[tuple]  # arguments of TableBuilder.add_junction


@dataclass
class Result:
    """Tables and provenance of one analysed mask.

    Attributes
    ----------
    branches, points, junctions : DataFrame
        The three tables (columns and units in ``columns.json``, see :mod:`vesselgeom.tables`).
    run : dict
        Provenance: version, settings, input hash, voxel size, units, orientation, timings, warnings.
    """

    branches: pd.DataFrame
    points: pd.DataFrame
    junctions: pd.DataFrame
    run: dict[str, Any] = field(default_factory=dict)
    volume: Volume | None = field(default=None, repr=False)

    def write(self, out_dir: str | os.PathLike[str], *, exports: bool = True, plots: bool = False) -> Path:
        """Write the tables, ``columns.json`` and ``run.json`` into ``out_dir``, atomically.

        With ``exports`` (default) also ``centerlines.vtp``, ``branch_labels.nii.gz`` and ``qc.png``;
        with ``plots`` a ``profiles/`` folder with one figure per branch. The folder appears complete
        or not at all: files are written into a temporary sibling folder that replaces ``out_dir``.
        """
        out = Path(out_dir)
        with atomic_output_dir(out) as tmp:
            if exports:
                write_vtp(self.points, self.branches, tmp / "centerlines.vtp")
                if self.volume is not None:
                    labels = branch_label_volume(self.volume.mask, self.volume.affine, self.points)
                    write_label_volume(
                        labels, self.volume.affine, tmp / "branch_labels.nii.gz", source=self.volume.source
                    )
                    qc_figure(
                        self.volume.mask,
                        self.volume.affine,
                        self.points,
                        self.branches,
                        self.junctions,
                        tmp / "qc.png",
                        title=Path(self.volume.source).name,
                    )
            if plots:
                profile_figures(self.points, tmp / "profiles")
            write_csv(self.branches, tmp / "branches.csv", schema=BRANCH_COLUMNS)
            write_csv(self.points, tmp / "points.csv", schema=POINT_COLUMNS)
            write_csv(self.junctions, tmp / "junctions.csv", schema=JUNCTION_COLUMNS)
            doc = columns_document(
                {
                    "branches.csv": BRANCH_COLUMNS,
                    "points.csv": POINT_COLUMNS,
                    "junctions.csv": JUNCTION_COLUMNS,
                }
            )
            (tmp / "columns.json").write_text(json.dumps(doc, indent=2) + "\n")
            (tmp / "run.json").write_text(json.dumps(self.run, indent=2, default=_json) + "\n")
        return out


def _json(obj: Any) -> Any:
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(type(obj).__name__)


def analyze(
    source: str | os.PathLike[str] | np.ndarray,
    *,
    settings: Settings | None = None,
    affine: np.ndarray | None = None,
    spacing: float | tuple[float, float, float] | None = None,
    **overrides: Any,
) -> Result:
    """Measure the centreline geometry of every branch in a 3D vessel mask.

    Parameters
    ----------
    source : path or 3D array
        A NIfTI file (``.nii``/``.nii.gz``) or an array (bool, integer labels or float probabilities).
    settings : Settings, optional
        All tunables; defaults documented in :class:`vesselgeom.Settings`.
    affine : (4, 4) array, mm, optional
        For arrays: index -> world affine. Not with ``spacing``.
    spacing : float or 3 floats, mm, optional
        For arrays: voxel size along the index axes (axis-aligned grid).
    **overrides
        Settings fields to change, e.g. ``threshold=0.5`` or ``label=2``.

    Returns
    -------
    Result

    Examples
    --------
    >>> from vesselgeom.phantoms import helix, tube_phantom
    >>> ph = tube_phantom(helix(turns=1), 2.0)
    >>> res = analyze(ph.mask, affine=ph.affine)
    >>> len(res.branches), res.branches.loc[0, "kind"]
    (1, 'isolated')
    """
    settings = settings or Settings()
    if overrides:
        settings = settings.replace(**overrides)
    t0 = time.perf_counter()
    if isinstance(source, np.ndarray):
        volume = volume_from_array(
            source,
            affine=affine,
            spacing=spacing,
            label=settings.label,
            threshold=settings.threshold,
        )
    else:
        if affine is not None or spacing is not None:
            raise ValueError("affine/spacing are only for arrays; a file carries its own affine")
        volume = load_nifti(source, label=settings.label, threshold=settings.threshold)
    return analyze_volume(volume, settings=settings, load_seconds=time.perf_counter() - t0)


def analyze_volume(volume: Volume, *, settings: Settings | None = None, load_seconds: float = 0.0) -> Result:
    """Run the pipeline on a loaded :class:`~vesselgeom.io.Volume`."""
    settings = settings or Settings()
    if not volume.mask.any():
        raise InputError(
            f"{volume.source}: mask is empty (no foreground voxels after label/threshold selection)"
        )
    timings = {
        "load": load_seconds,
        "components": 0.0,
        "thin": 0.0,
        "graph": 0.0,
        "trace": 0.0,
        "measure": 0.0,
    }
    notes: list[str] = list(volume.warnings)
    spacing = voxel_sizes(volume.affine)
    voxel_mm = float(np.mean(spacing))
    min_voxels = (
        settings.min_component_mm3 / volume.voxel_volume_mm3
        if settings.min_component_mm3 is not None
        else settings.min_component_voxels
    )
    builder = TableBuilder(settings=settings, voxel_mm=voxel_mm, coarsest_voxel_mm=float(spacing.max()))
    next_branch, next_node = 1, 1

    single_voxel: list[int] = []  # components that thinned to one voxel (reported in one note)
    # small components wait here to be traced together (one shared batch instead of one per component)
    group = _Group(_BATCH_BRANCHES, _GROUP_BYTES)

    def flush() -> None:
        pending: list[_Pending] = group.take()
        if not pending:
            return
        t0 = time.perf_counter()
        traced = trace_components(
            [(p.section, p.boundary, p.inputs) for p in pending], voxel_mm=voxel_mm, settings=settings
        )
        timings["trace"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        # one batch of rows for all of them, then their junctions (which need their branches' rows)
        builder.add_branches(
            [cl for lines in traced for cl in lines], [c for p in pending for c in p.contexts]
        )
        for p in pending:
            for args in p.junctions:
                builder.add_junction(*args)
        timings["measure"] += time.perf_counter() - t0

    def add_component(comp: Component, aff: np.ndarray, graph: SkeletonGraph) -> None:
        """Prune the component's graph, then trace and measure its branches (or hold them back)."""
        nonlocal next_branch, next_node
        t = time.perf_counter()
        boundary = BoundaryDistance(comp.mask, aff)
        graph = prune_spurs(
            graph, linear=aff[:3, :3], radius_at=boundary.at_index, ratio=settings.prune_ratio
        )
        timings["graph"] += time.perf_counter() - t

        t = time.perf_counter()
        inputs, contexts = [], []
        node_ids = {nid: next_node + i for i, nid in enumerate(sorted(graph.nodes))}
        next_node += len(node_ids)
        kinds, at_edge = branch_kinds_and_edges(
            graph,
            near_edge=comp.touches_border,
            offset=comp.offset,
            radius_at=boundary.at_index,
            voxel_mm=float(spacing.min()),
            shape=volume.shape,
        )
        for b, (kind, free), edge in zip(graph.branches, kinds, at_edge.tolist(), strict=True):
            world = b.path @ aff[:3, :3].T + aff[:3, 3]
            flags = ("touches_image_edge",) if edge else ()
            inputs.append(BranchInput(world, b.closed, free[0], free[1]))
            contexts.append(
                BranchContext(
                    next_branch,
                    comp.component_id,
                    kind,
                    node_ids.get(b.start),
                    node_ids.get(b.end),
                    flags,
                )
            )
            next_branch += 1
        timings["trace"] += time.perf_counter() - t
        t = time.perf_counter()
        junction_rows = _junction_args(graph, contexts, node_ids, comp.component_id, aff, boundary)
        timings["measure"] += time.perf_counter() - t

        if _Group.admits(comp.mask, len(inputs)):  # traced later, together with other small components
            held = comp.mask.nbytes + boundary.nbytes
            if group.full_with(len(inputs), held):
                flush()
            t = time.perf_counter()
            group.add(
                _Pending(CrossSection(comp.mask, aff), boundary, inputs, contexts, junction_rows),
                len(inputs),
                held,
            )
            timings["trace"] += time.perf_counter() - t
            return
        flush()  # tables keep the components' order
        t = time.perf_counter()
        section = CrossSection(comp.mask, aff)
        timings["trace"] += time.perf_counter() - t
        # traced and measured in batches: only each branch's end directions outlive its batch
        for lo in range(0, len(inputs), _BATCH_BRANCHES):
            t = time.perf_counter()
            lines = trace_centerlines(
                inputs[lo : lo + _BATCH_BRANCHES],
                section=section,
                boundary=boundary,
                voxel_mm=voxel_mm,
                settings=settings,
            )
            timings["trace"] += time.perf_counter() - t
            t = time.perf_counter()
            builder.add_branches(lines, contexts[lo : lo + _BATCH_BRANCHES])
            del lines
            timings["measure"] += time.perf_counter() - t

        t = time.perf_counter()
        for args in junction_rows:
            builder.add_junction(*args)
        timings["measure"] += time.perf_counter() - t
        # nothing of this component (its crop, sampler, k-d tree, graph) outlives this call

    # thinned small components waiting for their graphs: (component, affine, skeleton)
    thinned = _Group(_GRAPH_BATCH, _GROUP_BYTES)

    def build_waiting() -> None:
        waiting = thinned.take()
        if not waiting:
            return
        t = time.perf_counter()
        graphs = build_graphs([skel for _, _, skel in waiting])
        timings["graph"] += time.perf_counter() - t
        for i in range(len(waiting)):
            (comp, aff, _), graph = waiting[i], graphs[i]
            waiting[i] = graphs[i] = None  # each component's crop and skeleton go once it is handled
            add_component(comp, aff, graph)

    t = time.perf_counter()
    components = iter_components(volume.mask, min_voxels=min_voxels, fill_holes=settings.fill_holes)
    for comp in components:
        timings["components"] += time.perf_counter() - t
        aff = volume.affine.copy()
        aff[:3, 3] = volume.affine[:3, :3] @ comp.offset + volume.affine[:3, 3]
        small = _Group.admits(comp.mask)
        if not small:
            # the small components before it are finished first: tables keep the components' order,
            # and nothing of theirs is held while a large component is thinned and traced
            build_waiting()
            flush()

        t = time.perf_counter()
        skel = thin(comp.mask)
        timings["thin"] += time.perf_counter() - t
        if skel.sum() < 2:
            single_voxel.append(comp.component_id)
        elif small:  # its graph is built later, together with others'
            held = comp.mask.nbytes + skel.nbytes
            if thinned.full_with(1, held):
                build_waiting()
            thinned.add((comp, aff, skel), 1, held)
        else:
            t = time.perf_counter()
            graph = build_graph(skel)
            timings["graph"] += time.perf_counter() - t
            del skel
            add_component(comp, aff, graph)
            del graph
        skel = comp = None  # (a held skeleton lives on in the group)
        t = time.perf_counter()
    build_waiting()
    flush()
    if single_voxel:
        notes.append(_single_voxel_note(single_voxel))

    for msg in notes[len(volume.warnings) :]:
        warnings.warn(f"{volume.source}: {msg}", VesselgeomWarning, stacklevel=2)
    t = time.perf_counter()
    branches, points, junctions = builder.tables()
    timings["measure"] += time.perf_counter() - t
    run = {
        "software": "vesselgeom",
        "version": __version__,
        "caution": CAUTION,
        "input": {
            "source": volume.source,
            "sha256": volume.sha256,
            "shape": list(volume.shape),
            "dtype": volume.dtype_in,
            "units_in_file": volume.input_units,
            "voxel_size_mm": [float(v) for v in spacing],
            "orientation": volume.orientation,
            "affine": volume.affine.tolist(),
            "foreground_voxels": int(volume.mask.sum()),
        },
        "settings": settings.to_dict(),
        "derived": derived_values(settings, spacing, min_voxels),
        "counts": {"branches": len(branches), "junctions": len(junctions), "points": len(points)},
        "timings_seconds": {k: round(v, 3) for k, v in timings.items()},
        "warnings": notes,
        "environment": {"python": platform.python_version(), "numpy": np.__version__},
    }
    return Result(branches, points, junctions, run, volume)


def _single_voxel_note(ids: list[int], shown: int = 10) -> str:
    """One note for all components that thinned to a single voxel: their count and the first ids.

    One line instead of one per component (a mask of thousands of specks would otherwise print thousands
    of warnings).
    """
    listed = ", ".join(str(i) for i in ids[:shown])
    if len(ids) > shown:
        listed += f", ... ({len(ids) - shown} more)"
    what = "component" if len(ids) == 1 else f"{len(ids)} components"
    return f"{what} {listed} thinned to a single voxel; no branch measured"


def _junction_args(
    graph: SkeletonGraph,
    contexts: Sequence[BranchContext],
    node_ids: dict[int, int],
    component_id: int,
    aff: np.ndarray,
    boundary: BoundaryDistance,
) -> list[tuple]:
    """Arguments of :meth:`TableBuilder.add_junction` for every junction of a component, in node order."""
    ends_at: dict[int, list[tuple[int, bool]]] = {}  # branch ends per node, in branch order
    for ctx, b in zip(contexts, graph.branches, strict=True):
        if b.start is not None:
            ends_at.setdefault(b.start, []).append((ctx.branch_id, True))
        if b.end is not None:
            ends_at.setdefault(b.end, []).append((ctx.branch_id, False))
    junctions = [nid for nid in sorted(graph.nodes) if graph.nodes[nid].kind == "junction"]
    if not junctions:
        return []
    pos = np.array([graph.nodes[nid].position for nid in junctions]) @ aff[:3, :3].T + aff[:3, 3]
    radii = boundary(pos)
    return [
        (node_ids[nid], component_id, p, float(r), ends_at.get(nid, []))
        for nid, p, r in zip(junctions, pos, radii, strict=True)
    ]


def derived_values(settings: Settings, spacing: np.ndarray, min_voxels: float) -> dict[str, float]:
    """The settings turned into mm for this image (the ``derived`` block of run.json)."""
    voxel_mm = float(np.mean(spacing))
    return {
        "step_mm": settings.step_mm or settings.step_voxels * voxel_mm,
        "curvature_floor_per_mm": settings.curvature_floor_per_voxel / voxel_mm,
        "min_component_voxels": float(min_voxels),
        # accuracy shown in docs/validation.md holds from this radius up; smaller ones are flagged
        "min_validated_radius_mm": settings.min_validated_radius_voxels * float(np.max(spacing)),
    }


def branch_kinds_and_edges(
    graph: SkeletonGraph,
    *,
    near_edge: bool,
    offset: np.ndarray,
    radius_at: Callable[[np.ndarray], np.ndarray],
    voxel_mm: float,
    shape: Sequence[int],
) -> tuple[list[tuple[str, list[bool]]], np.ndarray]:
    """Each branch's (kind, free ends) and whether it is cut by the image edge (both pipelines).

    ``near_edge``: whether the component touches the image edge at all (else no branch is); the other
    parameters as for :func:`free_ends_at_edge`.
    """
    kinds = [graph.branch_kind(b) for b in graph.branches]
    if not near_edge:
        return kinds, np.zeros(len(kinds), bool)
    at_edge = free_ends_at_edge(
        [b.path for b in graph.branches],
        [free for _, free in kinds],
        offset=offset,
        radius_at=radius_at,
        voxel_mm=voxel_mm,
        shape=shape,
    )
    return kinds, at_edge


def free_ends_at_edge(
    paths: Sequence[np.ndarray],
    frees: Sequence[Sequence[bool]],
    *,
    offset: np.ndarray,
    radius_at: Callable[[np.ndarray], np.ndarray],
    voxel_mm: float,
    shape: Sequence[int],
) -> np.ndarray:
    """Per branch: whether a free end lies within its own radius (+1 voxel) of the image's faces.

    Such an end is where the field of view cut the vessel, so the branch is truncated: its length and
    end-point indices do not describe the whole vessel.

    Parameters
    ----------
    paths : sequence of (n_i, 3) arrays
        Branch paths in the index space of ``radius_at`` (a crop at ``offset`` in the image).
    frees : sequence of (bool, bool)
        Whether each branch's start and end are free (terminal) ends.
    offset : (3,) array
        The crop's voxel [0, 0, 0] in the image's index space.
    radius_at : callable
        (m, 3) crop indices -> (m,) radii in mm; called once, for all free ends.
    voxel_mm : float
        The smallest voxel size (mm): radii in voxels are radius / voxel_mm.
    shape : 3 ints
        The image's shape.

    Returns
    -------
    (len(paths),) bool array
    """
    ends, owner = [], []
    for i, (path, free) in enumerate(zip(paths, frees, strict=True)):
        for is_free, point in zip(free, (path[0], path[-1]), strict=True):
            if is_free:
                ends.append(point)
                owner.append(i)
    out = np.zeros(len(paths), bool)
    if not ends:
        return out
    pts = np.asarray(ends, float)
    g = pts + offset
    to_face = np.minimum(g.min(axis=1), (np.asarray(shape) - 1 - g).min(axis=1))
    near = to_face <= np.asarray(radius_at(pts), float) / voxel_mm + 1.0
    out[np.asarray(owner)[near]] = True
    return out
