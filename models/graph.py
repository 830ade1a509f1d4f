"""Nearest-neighbour graph of latent codes, with short-circuit pruning (search.py finds paths on it).

Codes are rows of an (N, d) array, in latent units. An edge weighs its code distance: Euclidean, or
sqrt(dz^T M dz) under a positive definite (d, d) metric M. A metric is applied by warping the codes
with the Cholesky factor of M (M = L L^T, warped = codes @ L): plain Euclidean distance between
warped codes is the metric distance, so the kd-tree, the weights and the A* bound all use it.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

from .params import Parameter, ParamSpace

# Zero-length edges (duplicate codes) must stay stored: sparse arithmetic drops explicit zeros.
TINY = np.finfo(np.float64).tiny


@dataclass(eq=False)  # arrays inside: compare graphs by identity
class LatentGraph:
    """Symmetric weighted graph over bank codes; treat as immutable once built.

    Every edge must weigh at least the code distance between its ends (build_graph's edges do): the
    searches rely on it, and a graph built by hand is checked for it.
    """

    codes: np.ndarray                    # (N, d) latent codes
    adjacency: sparse.csr_matrix         # (N, N) symmetric, weight = code distance
    k: int = 0                           # neighbours per node used to build it
    pruned: int = 0                      # short-circuit edges removed
    components: int = 1                  # connected pieces before bridging
    bridges: int = 0                     # edges added to join those pieces
    restored: int = 0                    # flagged edges kept because removing them would disconnect
    metric: np.ndarray | None = None     # (d, d) positive definite, or None for Euclidean
    tree: cKDTree | None = field(default=None, repr=False)       # kd-tree over `warped`
    warped: np.ndarray | None = field(default=None, repr=False)  # (N, d) codes @ L
    _cache: dict = field(default_factory=dict, init=False, repr=False)

    def __post_init__(self):
        self.codes = np.ascontiguousarray(self.codes, dtype=np.float64)
        if self.warped is None:
            self.warped = self.warp(self.codes)
        if self.tree is None:
            self.tree = cKDTree(self.warped)
        self.adjacency = a = sparse.csr_matrix(self.adjacency, dtype=np.float64)
        n = len(self.codes)
        if a.shape == (n, n):
            diff = self.warped[np.repeat(np.arange(n), np.diff(a.indptr))] - self.warped[a.indices]
            short = a.data < np.sqrt(np.sum(diff * diff, axis=1)) * (1 - 1e-12)
        if a.shape != (n, n) or np.any(short):
            raise ValueError(f"adjacency: shape {a.shape} or weights below code distance not allowed; "
                             f"expected ({n}, {n}), weight >= code distance")

    def __len__(self) -> int:
        return len(self.codes)

    def warp(self, z) -> np.ndarray:
        """(..., d) codes into the space where the metric is Euclidean."""
        chol = _cholesky(self.metric, self.codes.shape[1])
        z = np.asarray(z, dtype=np.float64)
        return z if chol is None else np.ascontiguousarray(z @ chol)

    def cached(self, name: str, make):
        if name not in self._cache:
            self._cache[name] = make()
        return self._cache[name]


# -- building ----------------------------------------------------------------------------------
def build_graph(codes, *, k=None, params=None, space=None, param_scale=None, images=None,
                max_param_ratio=3.0, max_image_ratio=3.0, metric=None,
                k_min=None, k_max=32) -> LatentGraph:
    """Symmetric kNN graph of `codes` (N, d) with short-circuit edges pruned.

    k rule (k=None): try k = max(4, 2d) (or k_min) up to k_max, both capped at N - 1, and take the
    smallest k whose pruned graph is connected. Failing that, the smallest k whose unpruned graph is
    connected, keeping the shortest flagged edges that reconnect it (`restored`). Failing that, k_max,
    with each extra component bridged to the largest by its shortest code-space edge (`bridges`).
    A given k gets the same restoring and bridging, so the result is always connected.

    Short-circuit rule: an edge of code length c spans a true length g: the settings distance in
    units of `param_scale` (periodic axes on the short arc), or the RMS pixel difference. At each
    end e, rho_e is the median of g / c over e's edges (truth per code length) and m_e the median
    of g. The edge is a short-circuit if at either end g > ratio * rho_e * c (far more truth than
    its code length buys there) and g > ratio * m_e (longer in truth than that end's edges; without
    this, near-duplicate codes make g / c explode though they are no shortcut).

    params (N, P) settings, with `space` a ParamSpace (default: non-periodic axes over the data's
    range) and param_scale (P,) the typical spacing per axis (default space.spacing(params));
    images (N, ...) pixels; metric (d, d) positive definite.
    """
    codes = np.ascontiguousarray(codes, dtype=np.float64)
    if codes.ndim != 2 or len(codes) < 2 or codes.shape[1] < 1 or not np.all(np.isfinite(codes)):
        raise ValueError(f"codes: shape {codes.shape} not allowed; expected finite (N, d), N >= 2")
    n, d = codes.shape
    graph = LatentGraph(codes=codes, adjacency=sparse.csr_matrix((n, n)), metric=metric)
    warped = graph.warped
    truths = _truths(n, params, space, param_scale, images, max_param_ratio, max_image_ratio)
    if k is None:
        k_hi = min(checked_int(k_max, "k_max", 1), n - 1)
        k_lo = min(max(4, 2 * d) if k_min is None else checked_int(k_min, "k_min", 1), k_hi)
        candidates = range(k_lo, k_hi + 1)
    else:
        candidates = [checked_int(k, "k", 1, n - 1)]

    _, idx = graph.tree.query(warped, k=max(candidates) + 1)
    idx = _drop_self(idx)
    truths = [(_EdgeMemo(n, truth_of), ratio) for truth_of, ratio in truths]  # each k reuses the last's
    chosen = fallback = None
    for kk in candidates:
        u, v, w = _knn_edges(warped, idx[:, :kk])
        flagged = np.zeros(len(u), dtype=bool)
        for truth_of, ratio in truths:
            flagged |= _short_circuits(n, u, v, w, truth_of(u, v), ratio)
        trial = (kk, u, v, w, flagged)
        if _components(n, u[~flagged], v[~flagged])[0] == 1:
            chosen = trial
            break
        if fallback is None and _components(n, u, v)[0] == 1:
            fallback = trial
    kk, u, v, w, flagged = chosen or fallback or trial

    keep, restored = _restore(n, u, v, w, flagged)
    u, v, w = u[keep], v[keep], w[keep]
    n_comp, labels = _components(n, u, v)
    if n_comp > 1:
        bu, bv = _bridges(warped, labels, n_comp)
        u, v, w = np.r_[u, bu], np.r_[v, bv], np.r_[w, _lengths(warped, bu, bv)]
    graph.adjacency = _symmetric(n, u, v, w)
    graph.k, graph.pruned, graph.restored = kk, int(flagged.sum()) - restored, restored
    graph.components, graph.bridges = n_comp, n_comp - 1
    return graph


def checked_int(value, name: str, lo: int, hi: float = math.inf) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or not lo <= value <= hi:
        raise ValueError(f"{name}: {value!r} is out of range; allowed integers {lo} <= {name} <= {hi}")
    return int(value)


def _cholesky(metric, d: int) -> np.ndarray | None:
    if metric is None:
        return None
    m = np.asarray(metric, dtype=np.float64)
    if m.shape != (d, d) or not np.allclose(m, m.T, rtol=1e-10, atol=1e-12):
        raise ValueError(f"metric: {m.shape} or asymmetric not allowed; expected symmetric ({d}, {d})")
    try:
        return np.linalg.cholesky(m)
    except np.linalg.LinAlgError:
        raise ValueError("metric: not positive definite; allowed positive definite matrices") from None


def _truths(n, params, space, param_scale, images, max_param_ratio, max_image_ratio) -> list:
    """(edge truth function, ratio) pairs for the pruning tests that have data."""
    for name, ratio in (("max_param_ratio", max_param_ratio), ("max_image_ratio", max_image_ratio)):
        if not ratio > 1.0:
            raise ValueError(f"{name}: {ratio!r} is out of range; allowed ratio > 1")
    out = []
    if params is None and (space is not None or param_scale is not None):
        raise ValueError("params: missing; space and param_scale need the settings of every code")
    if params is not None:
        p = np.asarray(params, dtype=np.float64)
        if p.ndim != 2 or len(p) != n or not np.all(np.isfinite(p)):
            raise ValueError(f"params: shape {p.shape} not allowed; expected finite ({n}, P)")
        if space is None:
            lo, hi = p.min(axis=0), p.max(axis=0)
            space = ParamSpace([Parameter(f"p{j}", lo[j], max(hi[j], lo[j] + 1.0)) for j in range(len(lo))])
        if len(space) != p.shape[1]:
            raise ValueError(f"space: has {len(space)} parameters; params has {p.shape[1]} columns")
        scale = space.spacing(p) if param_scale is None else np.asarray(param_scale, dtype=np.float64)
        if scale.shape != (p.shape[1],) or not np.all(scale > 0):
            raise ValueError(f"param_scale: {scale!r} not allowed; expected {p.shape[1]} positive values")
        out.append((lambda u, v: space.distance(p[u], p[v], scale), float(max_param_ratio)))
    if images is not None:
        img = np.asarray(images)  # kept as given (uint8 too): a large bank is not copied to floats
        img = img.reshape(len(img), -1)
        if img.dtype.kind not in "uif" or len(img) != n or (
                img.dtype.kind == "f" and not np.isfinite(np.sum(img, axis=1, dtype=np.float64)).all()):
            raise ValueError(f"images: {len(img)} images of {img.dtype} not allowed; expected {n} finite images")
        out.append((lambda u, v: _rms(img, u, v), float(max_image_ratio)))
    return out


class _EdgeMemo:
    """An edge truth function (u, v) -> values that computes each undirected edge once: the k rule
    tries growing k, and every k's edges include the previous k's."""

    def __init__(self, n: int, truth_of):
        self.n, self.truth_of = np.int64(n), truth_of
        self.keys, self.values = np.zeros(0, dtype=np.int64), np.zeros(0)

    def __call__(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        keys = np.minimum(u, v).astype(np.int64) * self.n + np.maximum(u, v)
        pos = np.minimum(np.searchsorted(self.keys, keys), max(len(self.keys) - 1, 0))
        known = self.keys[pos] == keys if len(self.keys) else np.zeros(len(keys), dtype=bool)
        out = np.empty(len(keys))
        out[known] = self.values[pos[known]]
        new = ~known
        out[new] = self.truth_of(u[new], v[new])
        keys_all, values_all = np.r_[self.keys, keys[new]], np.r_[self.values, out[new]]
        order = np.argsort(keys_all, kind="stable")
        self.keys, self.values = keys_all[order], values_all[order]
        return out


def _rms(img: np.ndarray, u: np.ndarray, v: np.ndarray, *, chunk=4096) -> np.ndarray:
    """RMS pixel difference per edge, in the images' units; chunked to bound memory."""
    out = np.empty(len(u))
    for s in range(0, len(u), chunk):
        diff = img[u[s:s + chunk]].astype(np.float32) - img[v[s:s + chunk]]
        out[s:s + chunk] = np.sqrt(np.mean(diff * diff, axis=1, dtype=np.float64))
    return out


def _drop_self(idx: np.ndarray) -> np.ndarray:
    """Neighbour lists without the node itself (duplicates may push it off position 0)."""
    n, m = idx.shape
    keep = idx != np.arange(n)[:, None]
    keep[keep.all(axis=1), -1] = False
    return idx[keep].reshape(n, m - 1)


def _lengths(warped, u, v) -> np.ndarray:
    diff = warped[u] - warped[v]
    return np.maximum(np.sqrt(np.sum(diff * diff, axis=1)), TINY)


def _knn_edges(warped, idx):
    """Undirected edge list (u < v, no repeats) of the union of directed kNN edges."""
    n, k = idx.shape
    rows, cols = np.repeat(np.arange(n), k), idx.ravel()
    lo, hi = np.minimum(rows, cols), np.maximum(rows, cols)
    _, first = np.unique(lo * np.int64(n) + hi, return_index=True)
    return lo[first], hi[first], _lengths(warped, lo[first], hi[first])


def _node_median(n, u, v, values) -> np.ndarray:
    """Median of `values` over the edges at each node (NaN for a node without edges)."""
    nodes, vals = np.r_[u, v], np.r_[values, values]
    vals = vals[np.lexsort((vals, nodes))]
    counts = np.bincount(nodes, minlength=n)
    starts = np.cumsum(counts) - counts
    med, has = np.full(n, np.nan), counts > 0
    med[has] = 0.5 * (vals[(starts + (counts - 1) // 2)[has]] + vals[(starts + counts // 2)[has]])
    return med


def _short_circuits(n, u, v, code_len, truth, ratio) -> np.ndarray:
    """Edges spanning far more truth than their code length buys at either end (see build_graph)."""
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        rho = _node_median(n, u, v, truth / code_len)
        typical = _node_median(n, u, v, truth)
        flagged = np.zeros(len(u), dtype=bool)
        for end in (u, v):
            flagged |= (truth > ratio * rho[end] * code_len) & (truth > ratio * typical[end])
    return flagged


def _symmetric(n, u, v, w) -> sparse.csr_matrix:
    return sparse.csr_matrix((np.r_[w, w], (np.r_[u, v], np.r_[v, u])), shape=(n, n))


def _components(n, u, v) -> tuple[int, np.ndarray]:
    n_comp, labels = csgraph.connected_components(_symmetric(n, u, v, np.ones(len(u))), directed=False)
    return int(n_comp), labels


def _restore(n, u, v, w, flagged) -> tuple[np.ndarray, int]:
    """Keep mask: unflagged edges plus the shortest flagged ones needed to stay connected (Kruskal)."""
    keep = ~flagged
    _, labels = _components(n, u[keep], v[keep])
    parent = list(range(int(labels.max()) + 1))

    def root(a):
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    restored, candidates = 0, np.flatnonzero(flagged)
    for e in candidates[np.argsort(w[candidates], kind="stable")]:
        a, b = root(labels[u[e]]), root(labels[v[e]])
        if a != b:
            parent[a], keep[e] = b, True
            restored += 1
    return keep, restored


def _bridges(warped, labels, n_comp) -> tuple[np.ndarray, np.ndarray]:
    """For each component but the largest, its shortest code-space edge to the largest."""
    main = int(np.argmax(np.bincount(labels)))
    main_nodes = np.flatnonzero(labels == main)
    main_tree = cKDTree(warped[main_nodes])
    bu, bv = [], []
    for c in (c for c in range(n_comp) if c != main):
        members = np.flatnonzero(labels == c)
        dist, j = main_tree.query(warped[members])
        best = int(np.argmin(dist))
        bu.append(members[best])
        bv.append(main_nodes[j[best]])
    return np.array(bu, dtype=np.int64), np.array(bv, dtype=np.int64)
