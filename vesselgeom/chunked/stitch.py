"""One branch graph from the union of every chunk's core skeleton voxels, split into components.

Each skeleton voxel belongs to exactly one chunk core, so the union of the cores' voxels is the skeleton
of the whole volume, in global indices; :func:`vesselgeom.graph.build_graph_from_coords` links voxels
across chunk seams like any other neighbours. Components are the connected parts of the branch graph
(nodes joined by branches; a ring is a component of its own), numbered 1, 2, ... in raster order of
their first skeleton voxel, and pruned one by one like the in-memory pipeline's components.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

from vesselgeom import labelling
from vesselgeom.chunked.allocator import prefer_mmap
from vesselgeom.chunked.sources import LazyVolume
from vesselgeom.graph import Branch, SkeletonGraph, build_graph_from_coords
from vesselgeom.radius import BoundaryDistance

__all__ = ["SkeletonVoxels", "ComponentGraph", "split_components", "junction_radii", "branch_max_radius"]


@dataclass(frozen=True)
class SkeletonVoxels:
    """All core skeleton voxels, sorted in raster order, with their radius (mm) and image-edge flag.

    ``keys`` are the voxels' flat indices in ``shape`` (sorted), for lookups.
    """

    coords: np.ndarray
    radius: np.ndarray
    at_edge: np.ndarray
    shape: tuple[int, int, int]
    keys: np.ndarray

    @staticmethod
    def union(parts: list, shape: tuple[int, int, int]) -> SkeletonVoxels:
        """Concatenate :class:`~vesselgeom.chunked.thinning.CoreSkeleton` parts, raster-sorted."""
        coords = np.concatenate([p.coords for p in parts]) if parts else np.zeros((0, 3), np.int32)
        radius = np.concatenate([p.radius for p in parts]) if parts else np.zeros(0, np.float32)
        edge = np.concatenate([p.at_edge for p in parts]) if parts else np.zeros(0, bool)
        keys = np.ravel_multi_index(coords.T.astype(np.int64), shape)
        order = np.argsort(keys, kind="stable")
        return SkeletonVoxels(coords[order], radius[order], edge[order], shape, keys[order])

    def flat(self, ijk: np.ndarray) -> np.ndarray:
        """Flat indices of (n, 3) integer voxels."""
        return np.ravel_multi_index(np.asarray(ijk, np.int64).reshape(-1, 3).T, self.shape)

    def lookup(self, ijk: np.ndarray) -> np.ndarray:
        """Positions in ``coords`` of (n, 3) integer voxels; -1 for voxels that are not skeleton."""
        q = self.flat(ijk)
        if not len(self.keys):
            return np.full(len(q), -1)
        pos = np.minimum(np.searchsorted(self.keys, q), len(self.keys) - 1)
        return np.where(self.keys[pos] == q, pos, -1)


@dataclass
class ComponentGraph:
    """One connected component of the stitched branch graph.

    ``graph`` holds the component's nodes (original ids) and branches (original relative order);
    ``first`` is the flat index of its first skeleton voxel (the numbering key); ``at_edge``: the
    component touches the image edge; ``node_ids`` maps graph node ids to the 1-based ids of the tables
    (filled when the tables are planned).
    """

    component_id: int
    graph: SkeletonGraph
    first: int
    at_edge: bool
    node_ids: dict[int, int] = field(default_factory=dict)


def _chain_rows(b: Branch, nodes: dict) -> np.ndarray:
    """The branch's own voxels: its path less the junction centres added at its ends."""
    lo = 1 if b.start is not None and nodes[b.start].kind == "junction" else 0
    hi = len(b.path) - (1 if b.end is not None and nodes[b.end].kind == "junction" else 0)
    return np.rint(b.path[lo:hi]).astype(np.int64)


def split_components(voxels: SkeletonVoxels) -> list[ComponentGraph]:
    """Build the graph of all skeleton voxels and split it into numbered components (not yet pruned)."""
    graph = build_graph_from_coords(voxels.coords, voxels.shape)
    node_ids = sorted(graph.nodes)
    index = {nid: i for i, nid in enumerate(node_ids)}
    n_nodes = len(node_ids)
    n = n_nodes + len(graph.branches)  # every branch is an item too, so rings get a component
    rows, cols = [], []
    for k, b in enumerate(graph.branches):
        for nid in (b.start, b.end):
            if nid is not None:
                rows.append(n_nodes + k)
                cols.append(index[nid])
    adj = sparse.coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n))
    _, lab = connected_components(adj, directed=False)
    first = np.full(lab.max() + 1 if n else 0, np.iinfo(np.int64).max)
    edge = np.zeros(len(first), bool)
    for nid in node_ids:
        flat = voxels.flat(graph.nodes[nid].voxels)
        c = lab[index[nid]]
        first[c] = min(first[c], int(flat.min()))
        pos = voxels.lookup(graph.nodes[nid].voxels)
        edge[c] |= bool(voxels.at_edge[pos[pos >= 0]].any())
    for k, b in enumerate(graph.branches):
        own = _chain_rows(b, graph.nodes)
        c = lab[n_nodes + k]
        if len(own):
            first[c] = min(first[c], int(voxels.flat(own).min()))
            pos = voxels.lookup(own)
            edge[c] |= bool(voxels.at_edge[pos[pos >= 0]].any())
    used = np.unique(lab[n_nodes:]) if graph.branches else np.zeros(0, int)
    order = sorted(used.tolist(), key=lambda c: first[c])
    number = {c: i + 1 for i, c in enumerate(order)}
    parts = {c: SkeletonGraph() for c in order}
    for nid in node_ids:
        c = lab[index[nid]]
        if c in parts:
            parts[c].nodes[nid] = graph.nodes[nid]
    for k, b in enumerate(graph.branches):
        parts[lab[n_nodes + k]].branches.append(b)
    return [ComponentGraph(number[c], parts[c], int(first[c]), bool(edge[c])) for c in order]


def branch_max_radius(b: Branch, nodes: dict, voxels: SkeletonVoxels) -> float:
    """Largest radius (mm) at the branch's voxels and at the voxels of its end nodes."""
    pieces = [_chain_rows(b, nodes)] + [nodes[n].voxels for n in (b.start, b.end) if n is not None]
    pos = voxels.lookup(np.concatenate(pieces).reshape(-1, 3))
    r = voxels.radius[pos[pos >= 0]]
    return float(r.max()) if r.size else 0.0


def junction_radii(
    vol: LazyVolume,
    positions: np.ndarray,
    margins: np.ndarray,
    *,
    fill_holes: bool,
) -> np.ndarray:
    """Radius (mm) at index positions from one sub-volume around them.

    The box covers every position plus its margin (voxels, at least the radius there plus a few voxels,
    so each point's nearest background voxel lies inside); :class:`vesselgeom.radius.BoundaryDistance` is
    built on it as on a component's crop in memory.
    """
    prefer_mmap()  # also in worker processes of a distributed cluster
    positions = np.asarray(positions, float).reshape(-1, 3)
    margins = np.asarray(margins, int).reshape(-1)
    lo = np.floor((positions - margins[:, None]).min(axis=0)).astype(int)
    hi = np.ceil((positions + margins[:, None]).max(axis=0)).astype(int) + 1
    m = vol.read_box(lo, hi)
    if fill_holes:
        m = labelling.fill_holes(m)
    aff = vol.affine.copy()
    aff[:3, 3] = vol.affine[:3, :3] @ lo + vol.affine[:3, 3]
    return BoundaryDistance(m, aff).at_index(positions - lo)
