"""Tests for vesselgeom.graph: branch graphs of hand-made skeletons, spur pruning, torus topology.

Independent references used below:
- Node classes by 26-neighbour count (1 end, 2 regular, >= 3 junction; each 26-connected junction
  cluster is one node) and branch length as the sum of step lengths (METHODS.md "Skeleton and graph").
  Expected graphs are worked out by hand; neighbour counts are cross-checked with
  :func:`scipy.ndimage.convolve` and clusters with :func:`scipy.ndimage.label`.
- Spur pruning: drop terminal branches shorter than ratio x junction radius, merge degree-2 nodes
  (Palagyi, Tschirren, Hoffman, Sonka 2006, Comput Biol Med 36(9):974-996).
- Topology: a solid torus thins to one loop with no ends and no junctions, and its Euler number
  (:func:`skimage.measure.euler_number`, 26-connectivity) equals its skeleton's, 0 for a torus
  (METHODS.md; Lee, Kashyap, Chu 1994 thinning preserves topology).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage.measure import euler_number

from vesselgeom.graph import build_graph, build_graphs, prune_spurs
from vesselgeom.skeleton import thin

SQRT2 = np.sqrt(2.0)


def _radius_2mm(ijk: np.ndarray) -> np.ndarray:
    return np.full(len(ijk), 2.0)


def _skeleton(shape, voxels) -> np.ndarray:
    sk = np.zeros(shape, bool)
    for v in voxels:
        sk[tuple(v)] = True
    return sk


def _neighbour_count(sk: np.ndarray) -> np.ndarray:
    """26-neighbour count of each voxel (scipy.ndimage.convolve with a 3x3x3 ring of ones)."""
    kernel = np.ones((3, 3, 3), int)
    kernel[1, 1, 1] = 0
    return ndimage.convolve(sk.astype(int), kernel, mode="constant")


def _steps(path: np.ndarray) -> np.ndarray:
    return np.linalg.norm(np.diff(path, axis=0), axis=1)


def _assert_chain_adjacent(path: np.ndarray) -> None:
    """Consecutive voxel-path points are 26-neighbours (Chebyshev distance exactly 1)."""
    cheb = np.abs(np.diff(path, axis=0)).max(axis=1)
    np.testing.assert_array_equal(cheb, 1.0)


def test_straight_line():
    # 8 voxels along i: 2 end nodes (1 neighbour each), 1 branch, ordered path, length 7 voxel steps.
    sk = _skeleton((12, 7, 7), [(i, 3, 3) for i in range(2, 10)])
    g = build_graph(sk)
    assert len(g.branches) == 1 and len(g.nodes) == 2
    assert all(n.kind == "end" for n in g.nodes.values())
    # node ids follow raster order of the node's first voxel
    np.testing.assert_array_equal(g.nodes[0].position, [2, 3, 3])
    np.testing.assert_array_equal(g.nodes[1].position, [9, 3, 3])
    assert g.degree(0) == 1 and g.degree(1) == 1
    b = g.branches[0]
    assert not b.closed and {b.start, b.end} == {0, 1}
    np.testing.assert_array_equal(b.path, [(i, 3, 3) for i in range(2, 10)])
    assert _steps(b.path).sum() == pytest.approx(7.0)


def test_l_shaped_staircase():
    # An L without its corner voxel (a thinned corner): the diagonal step keeps every voxel at <= 2
    # 26-neighbours, so still one branch between two ends; length 3 + sqrt(2) + 4 + sqrt(3) in voxel
    # steps, the last leg a 3D diagonal staircase step.
    vox = [(2, 2, 3), (3, 2, 3), (4, 2, 3), (5, 2, 3), (6, 3, 3), (6, 4, 3), (6, 5, 3), (6, 6, 3),
           (6, 7, 3), (7, 8, 4)]  # fmt: skip
    sk = _skeleton((10, 11, 7), vox)
    assert _neighbour_count(sk)[sk].max() == 2
    g = build_graph(sk)
    assert len(g.branches) == 1
    assert sorted(n.kind for n in g.nodes.values()) == ["end", "end"]
    b = g.branches[0]
    path = b.path if np.array_equal(b.path[0], vox[0]) else b.path[::-1]
    np.testing.assert_array_equal(path, vox)
    _assert_chain_adjacent(path)
    assert _steps(b.path).sum() == pytest.approx(7 + SQRT2 + np.sqrt(3.0))
    # the end nodes are the path's ends
    ends = {tuple(g.nodes[b.start].position), tuple(g.nodes[b.end].position)}
    assert ends == {vox[0], vox[-1]}


def test_y_one_junction_of_degree_three():
    # A Y: arm along -i, and two diagonal arms; the centre voxel has 3 neighbours (one junction),
    # 3 branches each from an end node to the junction, path ending at the junction voxel.
    centre = (10, 10, 2)
    vox = [(i, 10, 2) for i in range(5, 10)] + [centre]
    vox += [(10 + k, 10 + k, 2) for k in range(1, 6)] + [(10 + k, 10 - k, 2) for k in range(1, 6)]
    sk = _skeleton((20, 20, 5), vox)
    nc = _neighbour_count(sk)
    assert nc[centre] == 3 and (nc[sk] >= 3).sum() == 1
    g = build_graph(sk)
    assert len(g.branches) == 3 and len(g.nodes) == 4
    junctions = [k for k, n in g.nodes.items() if n.kind == "junction"]
    assert len(junctions) == 1
    j = junctions[0]
    np.testing.assert_array_equal(g.nodes[j].position, centre)
    assert g.degree(j) == 3
    for k, n in g.nodes.items():
        if k != j:
            assert n.kind == "end" and g.degree(k) == 1
    tips = {(5, 10, 2): 5.0, (15, 15, 2): 5 * SQRT2, (15, 5, 2): 5 * SQRT2}
    for b in g.branches:
        assert j in (b.start, b.end)
        tip = b.end if b.start == j else b.start
        assert g.nodes[tip].kind == "end"
        _assert_chain_adjacent(b.path)
        assert _steps(b.path).sum() == pytest.approx(tips[tuple(g.nodes[tip].position)])
        # the path starts at its start node and ends at its end node
        np.testing.assert_array_equal(b.path[0], g.nodes[b.start].position)
        np.testing.assert_array_equal(b.path[-1], g.nodes[b.end].position)


def test_cross_with_2x2_junction_blob():
    # A plus sign whose centre is a 2x2 block: the block and the first voxel of each arm have >= 3
    # neighbours; they form one 26-connected cluster (scipy.ndimage.label) -> one junction node of
    # degree 4 at the cluster centroid (10.5, 10.5, 2), and 4 branches to 4 end nodes.
    sk = np.zeros((22, 22, 5), bool)
    sk[10:12, 10:12, 2] = True
    sk[5:10, 10, 2] = True  # -i arm
    sk[12:17, 11, 2] = True  # +i arm
    sk[11, 5:10, 2] = True  # -j arm
    sk[10, 12:17, 2] = True  # +j arm
    junction_vox = sk & (_neighbour_count(sk) >= 3)
    _, n_clusters = ndimage.label(junction_vox, structure=np.ones((3, 3, 3)))
    assert n_clusters == 1 and junction_vox.sum() == 8
    g = build_graph(sk)
    junctions = [k for k, n in g.nodes.items() if n.kind == "junction"]
    assert len(junctions) == 1 and len(g.nodes) == 5 and len(g.branches) == 4
    j = junctions[0]
    assert g.degree(j) == 4
    np.testing.assert_allclose(g.nodes[j].position, np.argwhere(junction_vox).mean(axis=0))
    np.testing.assert_allclose(g.nodes[j].position, [10.5, 10.5, 2.0])
    assert len(g.nodes[j].voxels) == 8
    tips = sorted(tuple(n.position) for n in g.nodes.values() if n.kind == "end")
    assert tips == [(5, 10, 2), (10, 16, 2), (11, 5, 2), (16, 11, 2)]
    for b in g.branches:
        assert j in (b.start, b.end) and b.start != b.end
        assert g.nodes[b.start if b.end == j else b.end].kind == "end"


# an octagon: every voxel has exactly two 26-neighbours
_OCTAGON = [(2, 0), (3, 0), (4, 0), (5, 1), (6, 2), (6, 3), (6, 4), (5, 5), (4, 6), (3, 6), (2, 6),
            (1, 5), (0, 4), (0, 3), (0, 2), (1, 1)]  # fmt: skip


def test_digital_ring_one_closed_branch():
    # A digital ring (each voxel has exactly 2 neighbours): one closed branch, no nodes; the path
    # visits all 16 voxels once, in order around the loop (the last point adjacent to the first).
    vox = [(i + 1, j + 1, 1) for i, j in _OCTAGON]
    sk = _skeleton((9, 9, 3), vox)
    assert (_neighbour_count(sk)[sk] == 2).all()
    g = build_graph(sk)
    assert len(g.nodes) == 0 and len(g.branches) == 1
    b = g.branches[0]
    assert b.closed and b.start is None and b.end is None
    assert len(b.path) == 16
    assert {tuple(p) for p in b.path.astype(int)} == set(vox)
    _assert_chain_adjacent(np.concatenate([b.path, b.path[:1]]))
    # perimeter: 8 axis steps + 8 diagonal steps
    assert _steps(np.concatenate([b.path, b.path[:1]])).sum() == pytest.approx(8 + 8 * SQRT2)


def test_two_separate_lines():
    # Two disjoint lines: 2 branches, 4 end nodes, each branch joining two distinct ends.
    sk = np.zeros((12, 12, 6), bool)
    sk[1:8, 2, 2] = True
    sk[3, 5:11, 4] = True
    g = build_graph(sk)
    assert len(g.branches) == 2 and len(g.nodes) == 4
    assert all(n.kind == "end" and g.degree(k) == 1 for k, n in g.nodes.items())
    lengths = sorted(_steps(b.path).sum() for b in g.branches)
    assert lengths == pytest.approx([5.0, 6.0])
    used = [x for b in g.branches for x in (b.start, b.end)]
    assert sorted(used) == [0, 1, 2, 3]


def test_lollipop_self_loop_degree():
    # A ring with a tail: one junction (3 voxels of the ring plus the tail root form the cluster), a
    # self-loop counted twice by degree (SkeletonGraph.degree docstring) plus the tail: degree 3.
    vox = [(i + 1, j + 1, 1) for i, j in _OCTAGON] + [(i, 4, 1) for i in range(8, 15)]
    sk = _skeleton((20, 12, 3), vox)
    g = build_graph(sk)
    junctions = [k for k, n in g.nodes.items() if n.kind == "junction"]
    assert len(junctions) == 1 and len(g.branches) == 2
    j = junctions[0]
    assert g.degree(j) == 3
    loops = [b for b in g.branches if b.start == b.end == j]
    assert len(loops) == 1


def test_empty_skeleton():
    # No voxels: no nodes, no branches.
    g = build_graph(np.zeros((4, 4, 4), bool))
    assert g.nodes == {} and g.branches == []


# --------------------------------------------------------------------------- pruning


def _line_with_spur(spur_len: int) -> np.ndarray:
    sk = np.zeros((23, 16, 7), bool)
    sk[2:21, 5, 3] = True
    sk[10, 6 : 6 + spur_len, 3] = True
    return sk


def test_prune_short_spur_merges_branches():
    # A 2-voxel side spur: its branch runs from the junction centroid (10, 5.25, 3) to the tip
    # (10, 7, 3), 1.75 mm < ratio 1.5 x radius 2 mm = 3 mm, so it is dropped (Palagyi et al. 2006);
    # the junction is left with two branch ends and they merge into one end-to-end branch.
    g = build_graph(_line_with_spur(2))
    assert len(g.branches) == 3
    g = prune_spurs(g, linear=np.eye(3), radius_at=_radius_2mm, ratio=1.5)
    assert len(g.branches) == 1
    assert len(g.nodes) == 2 and all(n.kind == "end" for n in g.nodes.values())
    b = g.branches[0]
    assert set(g.nodes) == {b.start, b.end}
    assert all(g.degree(k) == 1 for k in g.nodes)
    ends = sorted(tuple(g.nodes[k].position) for k in (b.start, b.end))
    assert ends == [(2, 5, 3), (20, 5, 3)]
    # one ordered path from end to end through the junction centroid
    x = b.path[:, 0] if b.path[0, 0] < b.path[-1, 0] else b.path[::-1, 0]
    assert (np.diff(x) > 0).all()
    np.testing.assert_array_equal(b.path[[0, -1]], [g.nodes[b.start].position, g.nodes[b.end].position])
    assert any(np.allclose(p, [10, 5.25, 3]) for p in b.path)
    # 6 unit steps + 8 unit steps + two steps of sqrt(2^2 + 0.25^2) through the centroid
    assert _steps(b.path).sum() == pytest.approx(14 + 2 * np.hypot(2.0, 0.25))


def test_prune_keeps_long_spur():
    # A 9-voxel side branch is 8.75 mm > 3 mm: it stays, with the junction of degree 3.
    g = build_graph(_line_with_spur(9))
    g = prune_spurs(g, linear=np.eye(3), radius_at=_radius_2mm, ratio=1.5)
    assert len(g.branches) == 3
    junctions = [k for k, n in g.nodes.items() if n.kind == "junction"]
    assert len(junctions) == 1 and g.degree(junctions[0]) == 3
    assert sum(n.kind == "end" for n in g.nodes.values()) == 3


def test_prune_threshold_scales_with_ratio():
    # The same 1.75 mm spur survives a ratio of 0.5 (threshold 1 mm), and goes at ratio 1 (2 mm).
    g = prune_spurs(build_graph(_line_with_spur(2)), linear=np.eye(3), radius_at=_radius_2mm,
                    ratio=0.5)  # fmt: skip
    assert len(g.branches) == 3
    g = prune_spurs(build_graph(_line_with_spur(2)), linear=np.eye(3), radius_at=_radius_2mm,
                    ratio=1.0)  # fmt: skip
    assert len(g.branches) == 1


def test_prune_single_branch_never_removed():
    # A short isolated segment (2 mm < 3 mm) is its component's only branch: kept.
    sk = np.zeros((8, 8, 8), bool)
    sk[2:5, 3, 3] = True
    g = prune_spurs(build_graph(sk), linear=np.eye(3), radius_at=_radius_2mm, ratio=1.5)
    assert len(g.branches) == 1 and len(g.nodes) == 2


# --------------------------------------------------------------------------- topology


@pytest.mark.parametrize(("big", "small"), [(10.0, 3.0), (8.0, 2.5), (12.0, 3.5)])
def test_solid_torus_thins_to_one_loop(big, small):
    # METHODS.md topology check: a solid torus (voxel centres within ``small`` of a circle of radius
    # ``big``) thins to one closed loop with no ends and no junctions; Euler numbers (26-connectivity)
    # of mask and skeleton agree (both 0 for a torus).
    n = int(big + small) + 3
    g = np.arange(-n, n + 1)
    z = np.arange(-int(small) - 2, int(small) + 3)
    X, Y, Z = np.meshgrid(g, g, z, indexing="ij")
    mask = np.hypot(np.hypot(X, Y) - big, Z) <= small
    skel = thin(mask)
    assert euler_number(mask, connectivity=3) == 0
    assert euler_number(skel, connectivity=3) == euler_number(mask, connectivity=3)
    graph = build_graph(skel)
    assert len(graph.nodes) == 0
    assert len(graph.branches) == 1 and graph.branches[0].closed
    path = graph.branches[0].path
    assert len(path) == skel.sum()
    _assert_chain_adjacent(np.concatenate([path, path[:1]]))
    # the skeleton follows the torus' core circle: within one voxel of it
    idx = path.astype(int)
    core = np.hypot(np.hypot(g[idx[:, 0]], g[idx[:, 1]]) - big, z[idx[:, 2]])
    assert core.max() <= 1.0


def test_skeleton_of_junction_voxels_only_is_one_node_without_branches():
    # a 2 x 2 x 2 block: every voxel has 7 26-neighbours (>= 3: junction, METHODS.md), so the block is
    # one junction cluster (one 26-connected component, checked with scipy.ndimage.label) and no chain
    sk = np.zeros((5, 5, 5), bool)
    sk[1:3, 1:3, 1:3] = True
    assert ndimage.label(sk, structure=np.ones((3, 3, 3)))[1] == 1
    g = build_graph(sk)
    assert [n.kind for n in g.nodes.values()] == ["junction"]
    assert g.branches == []
    np.testing.assert_allclose(g.nodes[0].position, [1.5, 1.5, 1.5])


def test_pruning_many_spurs_matches_one_by_one_rule():
    # a comb: a long spine (x axis) with short teeth every 6 voxels; teeth of 2 voxels are below
    # 1.5 x 2 mm and are removed (Palagyi et al. 2006), leaving the spine as one branch between two ends
    sk = np.zeros((3, 64, 5), bool)
    sk[1, 1:63, 1] = True
    for y in range(7, 57, 6):
        sk[1, y, 2:4] = True
    g = prune_spurs(build_graph(sk), linear=np.eye(3), radius_at=_radius_2mm, ratio=1.5)
    assert len(g.branches) == 1
    assert sorted(n.kind for n in g.nodes.values()) == ["end", "end"]
    assert g.degree(next(iter(g.nodes))) == 1
    path = g.branches[0].path
    ends = sorted([path[0].tolist(), path[-1].tolist()])
    assert ends == [[1.0, 1.0, 1.0], [1.0, 62.0, 1.0]]
    assert np.all(np.abs(np.diff(path[:, 1])) > 0)  # runs along the spine, through each junction once


# --------------------------------------------------------------------------- several at once


def _assert_same_graph(got, want) -> None:
    """Same node ids, kinds, voxels and positions (bit for bit), same branches in the same order."""
    assert list(got.nodes) == list(want.nodes)
    for k, n in want.nodes.items():
        assert got.nodes[k].node_id == n.node_id == k and got.nodes[k].kind == n.kind
        assert got.nodes[k].voxels.dtype == n.voxels.dtype
        np.testing.assert_array_equal(got.nodes[k].voxels, n.voxels)
        assert got.nodes[k].position.tobytes() == n.position.tobytes()
    assert len(got.branches) == len(want.branches)
    for a, b in zip(got.branches, want.branches, strict=True):
        assert (a.start, a.end, a.closed) == (b.start, b.end, b.closed)
        assert a.path.dtype == b.path.dtype and a.path.tobytes() == b.path.tobytes()


def _random_skeletons(seed: int) -> list[np.ndarray]:
    """Thinned unions of random balls and rods (junctions, loops, ends), some touching their array's
    first and last planes, of different shapes; plus an empty, a one-voxel and a junction-only one."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(14):
        shape = tuple(int(v) for v in rng.integers(6, 24, 3))
        g = np.stack(np.meshgrid(*[np.arange(s) for s in shape], indexing="ij"), axis=-1).astype(float)
        mask = np.zeros(shape, bool)
        for _ in range(int(rng.integers(1, 5))):
            a, b = rng.uniform(0, shape), rng.uniform(0, shape)
            t = np.clip(((g - a) @ (b - a)) / max(np.dot(b - a, b - a), 1e-9), 0, 1)
            mask |= np.linalg.norm(g - a - t[..., None] * (b - a), axis=-1) <= rng.uniform(0.8, 2.5)
        out.append(thin(mask))
    # a ring through the first and last planes, and a line along the first axis end to end
    ring = np.zeros((9, 9, 3), bool)
    ring[0, 2:7, 1] = ring[8, 2:7, 1] = ring[1:8, 1, 1] = ring[1:8, 7, 1] = True
    line = np.zeros((7, 3, 3), bool)
    line[:, 1, 1] = True
    blob = np.zeros((4, 4, 4), bool)
    blob[1:3, 1:3, 1:3] = True
    one = np.zeros((3, 3, 3), bool)
    one[1, 1, 1] = True
    return out[:5] + [ring, line, line, np.zeros((5, 6, 7), bool)] + out[5:10] + [blob, one] + out[10:]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_build_graphs_equals_each_built_alone(seed):
    # the stacked build must give every skeleton exactly its own graph: the reference is build_graph of
    # each alone (ids, kinds, positions bit for bit, branch order and paths)
    skeletons = _random_skeletons(seed)
    # the stacking gap matters: without it, some neighbours' last and first planes would touch
    touching = [
        np.argwhere(a[-1])[:, None] - np.argwhere(b[0])[None]
        for a, b in zip(skeletons[:-1], skeletons[1:], strict=True)
    ]
    assert sum(bool(d.size) and bool((np.abs(d).max(axis=-1) <= 1).any()) for d in touching) >= 2
    assert any(
        len(build_graph(s).nodes) and any(n.kind == "junction" for n in build_graph(s).nodes.values())
        for s in skeletons
    )
    graphs = build_graphs(skeletons)
    assert len(graphs) == len(skeletons)
    for got, skel in zip(graphs, skeletons, strict=True):
        _assert_same_graph(got, build_graph(skel))


def test_build_graphs_of_nothing_and_of_one():
    assert build_graphs([]) == []
    sk = np.zeros((6, 6, 6), bool)
    sk[1:5, 2, 2] = True
    (g,) = build_graphs([sk])
    _assert_same_graph(g, build_graph(sk))
