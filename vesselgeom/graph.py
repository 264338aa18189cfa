"""The branch graph of a skeleton: end nodes, merged junction clusters, branches as ordered voxel paths.

Everything is in voxel index space. Voxels are classed by their number of 26-neighbours in the skeleton:
1 end, 2 regular, 3 or more junction; each 26-connected cluster of junction voxels is merged into one node.
Branches are the chains of regular voxels between nodes; a chain with no node is a closed loop. Building
the graph uses array operations over all voxels at once (no Python loop per voxel); pruning works on the
much smaller list of branches.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components

__all__ = [
    "Node",
    "Branch",
    "SkeletonGraph",
    "build_graph",
    "build_graph_from_coords",
    "build_graphs",
    "prune_spurs",
]

# the 13 offsets with a positive first non-zero entry: each 26-neighbour pair is seen once
_HALF_OFFSETS = (
    np.array(
        [
            o
            for o in np.ndindex(3, 3, 3)
            if (np.array(o) - 1).tolist() > [0, 0, 0]  # lexicographic "positive" half
        ]
    )
    - 1
)


@dataclass
class Node:
    """A graph node: ``kind`` is "end" or "junction"; ``position`` is in index space (voxel centroid)."""

    node_id: int
    kind: str
    position: np.ndarray
    voxels: np.ndarray


@dataclass
class Branch:
    """An ordered chain of skeleton voxels between two nodes (or a closed loop with no node).

    ``path`` is (n, 3) float index coordinates, starting at ``start`` node's position and ending at ``end``
    node's position when those are junctions. ``closed`` is True for a ring without nodes; then the last
    point connects back to the first.
    """

    path: np.ndarray
    start: int | None
    end: int | None
    closed: bool = False


@dataclass
class SkeletonGraph:
    """Nodes keyed by id and a list of branches."""

    nodes: dict[int, Node] = field(default_factory=dict)
    branches: list[Branch] = field(default_factory=list)

    def branch_kind(self, branch: Branch) -> tuple[str, list[bool]]:
        """The branch's kind and which of its ends are free (end nodes, not junctions).

        Kinds: "loop" (closed, or both ends at one node), "isolated" (both ends free), "terminal" (one
        free end), "internal" (junctions at both ends).
        """
        free = [n is not None and self.nodes[n].kind == "end" for n in (branch.start, branch.end)]
        if branch.closed or (branch.start is not None and branch.start == branch.end):
            return "loop", free
        if all(free):
            return "isolated", free
        return ("terminal" if any(free) else "internal"), free

    def degree(self, node_id: int) -> int:
        """Number of branch ends at a node (a self-loop counts twice)."""
        return sum((b.start == node_id) + (b.end == node_id) for b in self.branches)


def _neighbour_pairs(coords: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """All 26-adjacent pairs (i, j), i < j by flat index, among ``coords`` (sorted raster order)."""
    padded = tuple(s + 2 for s in shape)
    flat = np.ravel_multi_index((coords + 1).T, padded)
    order = np.argsort(flat)
    flat_sorted = flat[order]
    steps = _HALF_OFFSETS @ np.array([padded[1] * padded[2], padded[2], 1])
    pairs = []
    for step in steps:
        q = flat_sorted + step
        pos = np.searchsorted(flat_sorted, q)
        pos = np.minimum(pos, len(flat_sorted) - 1)
        hit = flat_sorted[pos] == q
        pairs.append(np.stack([order[hit], order[pos[hit]]], axis=1))
    return np.concatenate(pairs) if pairs else np.zeros((0, 2), int)


def _walk_paths(nb: np.ndarray, starts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Walk every chain from its start voxel at once; returns (voxel, rank) of the visited voxels.

    ``nb`` is (n, 2) neighbour indices within the chains (-1 for none). All walks advance together, one
    voxel per array step, so the cost is one vector operation per voxel of the longest chain.
    """
    visited_v = [starts]
    visited_r = [np.zeros(len(starts), int)]
    cur = starts
    prev = np.full(len(starts), -1)
    rank = 0
    while cur.size:
        c0, c1 = nb[cur, 0], nb[cur, 1]
        nxt = np.where((c0 >= 0) & (c0 != prev), c0, np.where((c1 >= 0) & (c1 != prev), c1, -1))
        keep = nxt >= 0
        # a closed chain (cut open at its start) ends when it would come back to its start
        prev, cur = cur[keep], nxt[keep]
        rank += 1
        visited_v.append(cur)
        visited_r.append(np.full(len(cur), rank))
    return np.concatenate(visited_v), np.concatenate(visited_r)


def build_graph(skeleton: np.ndarray) -> SkeletonGraph:
    """Build the branch graph of a thinned 3D skeleton.

    Parameters
    ----------
    skeleton : 3D bool array
        One-voxel-wide skeleton (e.g. from :func:`vesselgeom.skeleton.thin`).

    Returns
    -------
    SkeletonGraph
        Node ids are 0-based and assigned in raster order of each node's first voxel: end nodes and junction
        clusters share one numbering. Branches are ordered by the lowest voxel of their chain in raster
        order (not always an end of the chain).
    """
    return build_graph_from_coords(np.argwhere(skeleton), skeleton.shape)


def build_graph_from_coords(coords: np.ndarray, shape: tuple[int, ...]) -> SkeletonGraph:
    """:func:`build_graph` from skeleton voxel indices, (n, 3) int in raster order, within ``shape``.

    For skeletons too large to hold as a dense array (chunked processing): only the coordinates are used.
    """
    coords = np.asarray(coords, dtype=np.int64).reshape(-1, 3)
    order = np.lexsort(coords.T[::-1])  # raster order, as np.argwhere gives
    coords = coords[order]
    return _build(coords, tuple(shape))[0]


def build_graphs(skeletons: Sequence[np.ndarray]) -> list[SkeletonGraph]:
    """:func:`build_graph` of several (small) skeletons at once; each graph is the same as built alone.

    The skeletons are stacked along the first axis, one empty plane apart (so no voxel of one is a
    26-neighbour of another), and linked in one pass of array operations instead of one pass each: for
    masks of many small components the fixed cost of a pass, not the voxels, is what counts. Raster order
    within each skeleton is unchanged by the stacking, so node ids and branch order are those of
    :func:`build_graph`; positions and paths are computed from each skeleton's own indices, so they are
    the same floating-point numbers too.
    """
    skeletons = list(skeletons)
    if not skeletons:
        return []
    local = [np.argwhere(s) for s in skeletons]
    height = np.array([s.shape[0] for s in skeletons], np.int64)
    start = np.cumsum(height + 1) - (height + 1)  # first plane of each skeleton in the stack
    counts = np.array([len(c) for c in local], np.intp)
    part = np.repeat(np.arange(len(skeletons)), counts)
    own = np.concatenate(local).astype(np.int64) if counts.sum() else np.zeros((0, 3), np.int64)
    stacked = own.copy()
    stacked[:, 0] += start[part]
    shape = (int(start[-1] + height[-1]),) + tuple(int(max(s.shape[d] for s in skeletons)) for d in (1, 2))
    return _build(stacked, shape, own=own, part=part, n_parts=len(skeletons))


def _build(
    coords: np.ndarray,
    shape: tuple[int, ...],
    *,
    own: np.ndarray | None = None,
    part: np.ndarray | None = None,
    n_parts: int = 1,
) -> list[SkeletonGraph]:
    """The graphs of raster-sorted ``coords``: one, or one per ``part`` (0..n_parts-1) of stacked skeletons.

    Links are found on ``coords``; node positions, voxels and paths are taken from ``own`` (each voxel's
    index in its own skeleton; ``coords`` when None). Parts must not touch, and raster order within a part
    must be its own raster order (as for skeletons stacked along the first axis).
    """
    n = len(coords)
    own = coords if own is None else own
    graphs = [SkeletonGraph() for _ in range(n_parts)]
    if n == 0:
        return graphs
    pairs = _neighbour_pairs(coords, shape)
    deg = np.bincount(pairs.ravel(), minlength=n)
    is_junc = deg >= 3
    is_chain = (deg == 1) | (deg == 2)

    # junction clusters: connected components among junction voxels
    jj = pairs[is_junc[pairs[:, 0]] & is_junc[pairs[:, 1]]]
    adj_j = sparse.coo_matrix((np.ones(len(jj)), (jj[:, 0], jj[:, 1])), shape=(n, n))
    _, jlab = connected_components(adj_j, directed=False)
    jlab = np.where(is_junc, jlab, -1)

    # chains: connected components among regular/end voxels; each voxel has <= 2 chain neighbours
    cc = pairs[is_chain[pairs[:, 0]] & is_chain[pairs[:, 1]]]
    adj_c = sparse.coo_matrix((np.ones(len(cc)), (cc[:, 0], cc[:, 1])), shape=(n, n))
    _, clab = connected_components(adj_c, directed=False)
    clab = np.where(is_chain, clab, -1)
    nb = np.full((n, 2), -1)
    src = np.concatenate([cc[:, 0], cc[:, 1]])
    dst = np.concatenate([cc[:, 1], cc[:, 0]])
    o = np.argsort(src, kind="stable")
    src, dst = src[o], dst[o]
    first = np.r_[True, src[1:] != src[:-1]]
    slot = np.where(first, 0, 1)
    nb[src, slot] = dst
    chain_deg = (nb >= 0).sum(axis=1)
    del jj, adj_j, cc, adj_c, src, dst, o, first, slot  # freed before the walk (chunked skeletons are large)

    # pick one start voxel per chain: an end of the chain (chain degree <= 1), or for closed chains the
    # lowest voxel, whose link to one neighbour is cut so the walk runs once around
    chain_ids = np.unique(clab[is_chain])
    start_of = np.full(chain_ids.max() + 1 if chain_ids.size else 0, -1)
    endish = np.flatnonzero(is_chain & (chain_deg <= 1))
    # first end voxel of each chain in raster order
    order = np.lexsort((endish, clab[endish]))
    e_sorted = endish[order]
    firsts = np.r_[True, clab[e_sorted][1:] != clab[e_sorted][:-1]] if e_sorted.size else []
    start_of[clab[e_sorted][firsts]] = e_sorted[firsts]
    closed_chains = chain_ids[start_of[chain_ids] < 0]
    closed_set = np.zeros_like(start_of, dtype=bool)
    if closed_chains.size:
        members = np.flatnonzero(is_chain & np.isin(clab, closed_chains))
        order = np.lexsort((members, clab[members]))
        m_sorted = members[order]
        firsts_c = np.r_[True, clab[m_sorted][1:] != clab[m_sorted][:-1]]
        starts_c = m_sorted[firsts_c]
        start_of[clab[starts_c]] = starts_c
        closed_set[clab[starts_c]] = True
        cut = nb[starts_c, 1]
        nb[starts_c, 1] = -1
        nb[cut, np.where(nb[cut, 0] == starts_c, 0, 1)] = -1
    starts = start_of[chain_ids]
    voxel, rank = _walk_paths(nb, starts)
    # branches in raster order of their chain's lowest voxel (stated here, not left to the labels' order)
    lowest = np.full(len(start_of), n, np.int64)
    np.minimum.at(lowest, clab[is_chain], np.flatnonzero(is_chain))
    order = np.lexsort((rank, lowest[clab[voxel]]))
    voxel = voxel[order]
    bounds = np.flatnonzero(np.r_[True, clab[voxel][1:] != clab[voxel][:-1], True])
    if not voxel.size:  # only junction voxels (a blob): no chain, no branch
        bounds = bounds[:1]

    # junction neighbours of each voxel (at most two for chain voxels)
    jn = pairs[is_chain[pairs[:, 0]] & is_junc[pairs[:, 1]]]
    jn = np.concatenate([jn, pairs[is_junc[pairs[:, 0]] & is_chain[pairs[:, 1]]][:, ::-1]])
    del pairs, nb, chain_deg
    jn_of: dict[int, list[int]] = {}
    for v, j in zip(jn[:, 0].tolist(), jlab[jn[:, 1]].tolist(), strict=True):
        lst = jn_of.setdefault(v, [])
        if j not in lst:
            lst.append(j)

    # nodes: junction clusters and chain ends with skeleton degree 1, numbered by their first voxel
    node_first: list[tuple[int, str, np.ndarray]] = []
    jv = np.flatnonzero(is_junc)  # junction voxels grouped by cluster, ascending within each
    jv = jv[np.argsort(jlab[jv], kind="stable")]
    cuts = np.flatnonzero(np.r_[True, jlab[jv][1:] != jlab[jv][:-1], True]) if jv.size else np.zeros(1, int)
    for lo, hi in zip(cuts[:-1].tolist(), cuts[1:].tolist(), strict=True):
        members = jv[lo:hi]
        node_first.append((int(members[0]), "junction", members))
    for v in np.flatnonzero(deg == 1):
        node_first.append((int(v), "end", np.array([v])))
    node_first.sort(key=lambda x: x[0])
    node_of_junc: dict[int, int] = {}
    node_of_end: dict[int, int] = {}
    part_of = (lambda v: 0) if part is None else (lambda v: int(part[v]))
    next_id = [0] * n_parts  # node ids count from 0 in each part, in raster order of first voxel
    for _, kind, members in node_first:
        k = part_of(members[0])
        graph, nid = graphs[k], next_id[k]
        next_id[k] += 1
        pos = own[members].mean(axis=0)
        graph.nodes[nid] = Node(nid, kind, pos, own[members])
        if kind == "junction":
            node_of_junc[int(jlab[members[0]])] = nid
        else:
            node_of_end[int(members[0])] = nid

    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        seq = voxel[lo:hi]
        cid = int(clab[seq[0]])
        graph = graphs[part_of(seq[0])]
        path = own[seq].astype(float)
        if closed_set[cid] and not jn_of.get(int(seq[0])) and not jn_of.get(int(seq[-1])):
            graph.branches.append(Branch(path, None, None, closed=True))
            continue
        ends: list[int | None] = []
        single = len(seq) == 1
        for v in (int(seq[0]), int(seq[-1])):
            if v in node_of_end and not (single and ends):
                ends.append(node_of_end[v])
                continue
            js = [node_of_junc[j] for j in jn_of.get(v, [])]
            if single and ends:  # a one-voxel chain: its other side is a different node
                js = [j for j in js if j != ends[0]] or js
            ends.append(js[0] if js else None)
        start, end = ends
        pieces = [path]
        if start is not None and graph.nodes[start].kind == "junction":
            pieces.insert(0, graph.nodes[start].position[None])
        if end is not None and graph.nodes[end].kind == "junction":
            pieces.append(graph.nodes[end].position[None])
        graph.branches.append(Branch(np.concatenate(pieces), start, end))
    return graphs


def _path_length(path: np.ndarray, linear: np.ndarray) -> float:
    return float(np.linalg.norm(np.diff(path, axis=0) @ linear.T, axis=1).sum())


def prune_spurs(
    graph: SkeletonGraph,
    *,
    linear: np.ndarray,
    radius_at: Callable[[np.ndarray], np.ndarray],
    ratio: float,
) -> SkeletonGraph:
    """Remove terminal spurs and merge degree-2 nodes, repeating to a fixed point.

    A terminal branch (one end node of degree 1, the other a junction) is a spur when its length, from the
    junction centre to its tip, is below ``ratio`` times the radius at the junction (Palagyi, Tschirren,
    Hoffman and Sonka 2006; common practice uses 1-2 radii). Spurs are removed all at once, then every
    junction left with two branch ends joins them into one branch, and one left with a single end becomes
    an end node. Branches that are their component's only branch are never removed.

    Parameters
    ----------
    graph : SkeletonGraph
        Modified in place and returned.
    linear : (3, 3) float array
        The affine's linear part (index -> mm), for lengths in mm.
    radius_at : callable
        Maps (n, 3) index positions to radii in mm.
    ratio : float
        Spur length threshold in junction radii.
    """
    while True:
        degree = _degrees(graph)
        junctions = [nid for nid, nd in graph.nodes.items() if nd.kind == "junction"]
        positions = np.array([graph.nodes[j].position for j in junctions]).reshape(-1, 3)
        rj = dict(zip(junctions, radius_at(positions), strict=True)) if junctions else {}
        spurs = []
        for i, b in enumerate(graph.branches):
            if b.closed or b.start is None or b.end is None:
                continue
            if b.start == b.end and graph.nodes[b.start].kind == "junction":
                # a tiny self-loop is a thinning artefact (a pinhole in the wall), not an anastomosis
                if _path_length(b.path, linear) < 2 * np.pi * ratio * rj[b.start]:
                    spurs.append(i)
                continue
            kinds = (graph.nodes[b.start].kind, graph.nodes[b.end].kind)
            if sorted(kinds) != ["end", "junction"]:
                continue
            j = b.start if kinds[0] == "junction" else b.end
            if _path_length(b.path, linear) < ratio * rj[j]:
                spurs.append(i)
        # never strip a junction of all its branches: keep the longest spur where all would go
        by_junction: dict[int, list[int]] = {}
        for i in spurs:
            b = graph.branches[i]
            j = b.start if graph.nodes[b.start].kind == "junction" else b.end
            by_junction.setdefault(j, []).append(i)
        ends_of = {
            j: degree[j] - sum(2 if graph.branches[i].start == graph.branches[i].end else 1 for i in idx)
            for j, idx in by_junction.items()
        }
        drop = set()
        for j, idx in by_junction.items():
            if ends_of[j] <= 0:
                idx = sorted(idx, key=lambda i: _path_length(graph.branches[i].path, linear))[:-1]
            drop.update(idx)
        changed = bool(drop)
        for i in sorted(drop, reverse=True):
            b = graph.branches.pop(i)
            if b.start != b.end:
                tip = b.end if graph.nodes[b.end].kind == "end" else b.start
                del graph.nodes[tip]
        changed |= _merge_degree_two(graph)
        if not changed:
            return graph


def _degrees(graph: SkeletonGraph) -> dict[int, int]:
    """:meth:`SkeletonGraph.degree` of every node, in one pass over the branches."""
    degree = dict.fromkeys(graph.nodes, 0)
    for b in graph.branches:
        for n_ in (b.start, b.end):
            if n_ in degree:
                degree[n_] += 1
    return degree


def _merge_degree_two(graph: SkeletonGraph) -> bool:
    """Join the two branches at each junction with exactly two branch ends; True if anything changed.

    Nodes are visited in id order; a merged branch goes to the end of the branch list. Branches are kept
    in an insertion-ordered dict (sequence id -> branch) with an index of the branches at each node, so
    each node costs time in proportion to its degree rather than to the number of branches.
    """
    changed = False
    seq = dict(enumerate(graph.branches))
    next_id = len(seq)
    at: dict[int, set[int]] = {}
    for sid, b in seq.items():
        for n_ in (b.start, b.end):
            if n_ is not None:
                at.setdefault(n_, set()).add(sid)
    for nid in sorted(graph.nodes):
        node = graph.nodes[nid]
        if node.kind != "junction":
            continue
        ends = []
        for sid in sorted(at.get(nid, ())):
            b = seq[sid]
            if b.start == nid:
                ends.append((sid, "start"))
            if b.end == nid:
                ends.append((sid, "end"))
        if len(ends) == 1:
            node.kind = "end"
            changed = True
        elif len(ends) == 0:
            del graph.nodes[nid]
            changed = True
        elif len(ends) == 2:
            (i, si), (k, sk) = ends
            if i == k:  # a self-loop through a now plain node: a closed ring
                b = seq[i]
                seq[i] = Branch(b.path[:-1], None, None, closed=True)
                at[nid].discard(i)
            else:
                a, c = seq[i], seq[k]
                pa = a.path if si == "end" else a.path[::-1]  # ends at the node
                pc = c.path if sk == "start" else c.path[::-1]  # starts at the node
                first = a.start if si == "end" else a.end
                last = c.end if sk == "start" else c.start
                merged = Branch(np.concatenate([pa, pc[1:]]), first, last)
                for sid, old in ((i, a), (k, c)):
                    del seq[sid]
                    for n_ in (old.start, old.end):
                        if n_ is not None:
                            at[n_].discard(sid)
                seq[next_id] = merged
                for n_ in (first, last):
                    if n_ is not None:
                        at.setdefault(n_, set()).add(next_id)
                next_id += 1
            del graph.nodes[nid]
            changed = True
    graph.branches = list(seq.values())
    return changed
