"""Shortest paths on the latent graph: nearest nodes, the A* bound, and the route search between
two codes attached to their nearest nodes (a corridor of kd-tree balls searched with scipy's
Dijkstra, or A* over the whole graph with heapq)."""
from __future__ import annotations

import heapq
import math

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from .graph import TINY, LatentGraph, checked_int

_BLOCK = 32  # codes per bounding ball when selecting a search corridor; tuning only


def nearest_nodes(graph: LatentGraph, z, count=1) -> tuple[np.ndarray, np.ndarray]:
    """Indices and code distances of the `count` nearest nodes; z (d,) gives (count,) arrays,
    z (M, d) gives (M, count)."""
    count = checked_int(count, "count", 1, len(graph))
    z, d = np.asarray(z, dtype=np.float64), graph.codes.shape[1]
    if z.ndim not in (1, 2) or z.shape[-1] != d or not np.all(np.isfinite(z)):
        raise ValueError(f"z: shape {z.shape} not allowed; expected finite ({d},) or (M, {d})")
    dist, idx = graph.tree.query(graph.warp(z), k=list(range(1, count + 1)))
    return idx, dist


def lower_bound(graph: LatentGraph, target: int) -> np.ndarray:
    """(N,) the A* heuristic: straight code distance from every node to `target`."""
    diff = graph.warped - graph.warped[checked_int(target, "target", 0, len(graph) - 1)]
    return np.sqrt(np.sum(diff * diff, axis=1))


def shortest_path(graph: LatentGraph, source: int, target: int, *, heuristic=True,
                  backend="corridor", slack=0.1) -> tuple[np.ndarray, float]:
    """Node indices from source to target and the path length (code units).

    Every edge weighs at least the straight code distance between its ends, so that distance to
    the target is an admissible, consistent A* heuristic. backend "heap": A* (Dijkstra if
    heuristic=False) in Python over the CSR arrays. backend "corridor": the same bound used as a
    filter; only nodes v with |v - source| + |v - target| <= U can lie on a path of length <= U,
    so scipy's Dijkstra runs on that corridor, U starting at (1 + slack) * |source - target| and
    raised to the corridor path's length until the path fits (then it is exact). Much faster.
    Raises LookupError if target is unreachable.
    """
    s, t = checked_int(source, "source", 0, len(graph) - 1), checked_int(target, "target", 0, len(graph) - 1)
    path, length = _route(graph, {s: 0.0}, {t: 0.0}, graph.warped[s], graph.warped[t],
                          heuristic=heuristic, backend=backend, slack=slack)
    return np.array(path, dtype=np.int64), length


def path_with_ends(graph: LatentGraph, z_start, z_end, *, attach=3, backend="corridor",
                   return_nodes=False):
    """Code polyline (M, d) from z_start through graph nodes to z_end (and the node indices).

    Each end is an extra vertex joined to its `attach` nearest nodes by code-distance edges; the
    route is the shortest path between the two extra vertices.
    """
    z_start, z_end = (np.asarray(z, dtype=np.float64) for z in (z_start, z_end))
    d = graph.codes.shape[1]
    if z_start.shape != (d,) or z_end.shape != (d,):
        raise ValueError(f"z_start, z_end: shapes {z_start.shape}, {z_end.shape}; expected ({d},) each")
    count = min(checked_int(attach, "attach", 1), len(graph))
    (si, sd), (ei, ed) = nearest_nodes(graph, z_start, count), nearest_nodes(graph, z_end, count)
    starts = {int(i): float(c) for i, c in zip(si, sd)}
    exits = {int(i): float(c) for i, c in zip(ei, ed)}
    path, _ = _route(graph, starts, exits, graph.warp(z_start), graph.warp(z_end), backend=backend)
    line = np.vstack([z_start[None], graph.codes[path], z_end[None]])
    return (line, np.array(path, dtype=np.int64)) if return_nodes else line


def _route(graph, starts: dict, exits: dict, a, b, *, heuristic=True, backend="corridor", slack=0.1):
    """Shortest route from a virtual start (edges to `starts`, with costs) to a virtual goal (reached
    from `exits`, with costs); a and b are the warped end codes the straight-distance bound uses."""
    if backend == "heap":
        return _heap_search(graph, starts, exits, b.tolist() if heuristic else None)
    if backend != "corridor":
        raise ValueError(f"backend: {backend!r} is not allowed; expected 'corridor' or 'heap'")
    if not slack >= 0:
        raise ValueError(f"slack: {slack!r} is out of range; allowed slack >= 0")
    view = graph.cached("kd", lambda: _KdView(graph))
    unreachable = LookupError(f"target: unreachable from start nodes {sorted(starts)[:5]}")
    starts = {int(view.rank[i]): c for i, c in starts.items()}  # into kd-tree numbering
    exits = {int(view.rank[i]): c for i, c in exits.items()}
    pinned = np.array(list(starts) + list(exits), dtype=np.int64)
    bound = max((1.0 + slack) * float(np.linalg.norm(a - b)), view.step) if heuristic else math.inf
    while True:
        nodes = _corridor(view, a, b, bound, pinned)
        whole = len(nodes) == len(graph)
        path, length = _corridor_search(view, nodes, starts, exits)
        if path is None and whole:
            raise unreachable
        if path is None:
            bound *= 1.5  # the corridor has a gap; widen it
        elif length <= bound or whole:
            return view.order[path].tolist(), length
        else:
            bound = length  # a real route this long exists, so the optimum fits in that corridor


def _corridor(view, a, b, bound, pinned) -> np.ndarray:
    """Sorted kd numbers of the nodes v with |v - a| + |v - b| <= bound, plus `pinned`."""
    if not np.isfinite(bound):
        return np.arange(len(view.order))
    # Blocks whose bounding ball may meet the ellipsoid, then the exact test on their codes only.
    near = _dist(view.centre, a) + _dist(view.centre, b) - 2 * view.radius <= bound * (1 + 1e-9)
    cand = (np.flatnonzero(near)[:, None] * _BLOCK + np.arange(_BLOCK)).ravel()
    cand = cand[cand < len(view.order)]
    x = view.warped[cand]
    inside = np.zeros(len(view.order), dtype=bool)
    inside[cand[_dist(x, a) + _dist(x, b) <= bound * (1 + 1e-9)]] = True
    inside[pinned] = True
    return np.flatnonzero(inside)


def _dist(x, p) -> np.ndarray:
    diff = x - p
    return np.sqrt(np.einsum("ij,ij->i", diff, diff))  # einsum: no multi-threaded BLAS call


class _KdView:
    """The graph renumbered in kd-tree order, so nearby codes sit together in memory, with
    bounding balls of runs of _BLOCK consecutive codes (spatially compact runs)."""

    def __init__(self, graph: LatentGraph):
        self.order = graph.tree.indices
        self.rank = np.empty_like(self.order)
        self.rank[self.order] = np.arange(len(self.order))
        self.adjacency = graph.adjacency[self.order][:, self.order].tocsr()
        self.degree = np.diff(self.adjacency.indptr)
        self.warped = graph.warped[self.order]
        self.step = float(np.median(graph.adjacency.data)) if graph.adjacency.nnz else 0.0
        n = len(self.order)
        x = self.warped[np.minimum(np.arange(-(-n // _BLOCK) * _BLOCK), n - 1)]  # last run padded
        x = x.reshape(-1, _BLOCK, x.shape[1])                                     # (runs, _BLOCK, d)
        self.centre = x.mean(axis=1)
        self.radius = np.sqrt(np.max(np.sum((x - self.centre[:, None]) ** 2, axis=2), axis=1))


def _corridor_search(view: _KdView, nodes, starts, exits):
    """scipy Dijkstra on the subgraph of `nodes` (sorted kd numbers) from a virtual start.

    The subgraph is renumbered compactly (corridor position; the virtual start is the last row),
    so the search costs the corridor's size, not the bank's. Edges leaving the corridor are
    dropped: a path through a node outside it is longer than the bound anyway."""
    a, m = view.adjacency, len(nodes)
    lo, counts = a.indptr[nodes], view.degree[nodes]
    ends = np.cumsum(counts)
    pos = np.arange(ends[-1]) - np.repeat(ends - counts - lo, counts)  # CSR slots of those rows
    local_of = np.full(len(view.order), -1, dtype=np.int32)  # kd number -> corridor position
    local_of[nodes] = np.arange(m, dtype=np.int32)
    local = local_of[a.indices[pos]]
    inside = local >= 0
    kept = np.add.reduceat(inside, ends - counts) if len(pos) else np.zeros(m, dtype=np.int64)
    kept = np.where(counts > 0, kept, 0)  # reduceat reads the next row's first slot for empty rows
    indptr = np.r_[0, np.cumsum(kept), np.sum(kept) + len(starts)].astype(np.int32)
    start_local = local_of[np.array(list(starts), dtype=np.int64)]
    indices = np.r_[local[inside], start_local].astype(np.int32)
    data = np.r_[a.data[pos][inside], np.maximum(list(starts.values()), TINY)]
    sub = sparse.csr_matrix((data, indices, indptr), shape=(m + 1, m + 1), copy=False)
    dist, pred = csgraph.dijkstra(sub, indices=m, return_predecessors=True)
    exit_local = local_of[np.array(list(exits), dtype=np.int64)]
    totals = dist[exit_local] + np.array(list(exits.values()))
    best = int(np.argmin(totals))
    if not np.isfinite(totals[best]):
        return None, math.inf
    path, node = [], int(exit_local[best])
    while node != m:
        path.append(int(nodes[node]))
        node = int(pred[node])
    return path[::-1], float(totals[best])


def _heap_search(graph, starts: dict, exits: dict, goal):
    """A* with heapq over the CSR arrays; `goal` is the warped goal code (None: Dijkstra).

    The virtual goal vertex is -1, entered from each exit node at its exit cost."""
    indptr, indices, weights, pts = graph.cached("lists", lambda: (
        graph.adjacency.indptr.tolist(), graph.adjacency.indices.tolist(),
        graph.adjacency.data.tolist(), graph.warped.tolist()))
    h = (lambda v: math.dist(pts[v], goal)) if goal is not None else (lambda v: 0.0)
    goal_id, inf = -1, math.inf
    best, parent, heap, closed, exit_node = {}, {}, [], set(), None
    for s, cost in starts.items():
        if cost < best.get(s, inf):
            best[s], parent[s] = cost, goal_id
            heapq.heappush(heap, (cost + h(s), cost, s))
    while heap:
        _, g, u = heapq.heappop(heap)
        if u == goal_id:
            break
        if u in closed:
            continue
        closed.add(u)
        if u in exits and g + exits[u] < best.get(goal_id, inf):
            best[goal_id], exit_node = g + exits[u], u
            heapq.heappush(heap, (best[goal_id], best[goal_id], goal_id))
        for p in range(indptr[u], indptr[u + 1]):
            v, nd = indices[p], g + weights[p]
            if nd < best.get(v, inf):
                best[v], parent[v] = nd, u
                heapq.heappush(heap, (nd + h(v), nd, v))
    else:
        raise LookupError(f"target: unreachable from start nodes {sorted(starts)[:5]}")
    path, node = [], exit_node
    while node != goal_id:
        path.append(node)
        node = parent[node]
    return path[::-1], best[goal_id]
