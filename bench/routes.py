"""Route search and graph build on large banks: synthetic codes on a smooth 2-D manifold in 8-D.

    python bench/routes.py [--sizes 1000,10000,100000] [--routes 200] [--bundle DIR]

For each size: graph build time (kNN, k rule, connectivity), route time per request (p50, p99)
between random bank codes with the engine's search (`search.path_with_ends`), and a check that
the route's length equals scipy's Dijkstra on the whole graph for a sample of pairs. With
--bundle, the same on a trained bundle's own bank (build with settings and pixel pruning).
Prints one JSON object.
"""
from __future__ import annotations

import argparse
import json
import time

import numpy as np
from common import set_threads


def manifold_codes(n: int, seed: int = 0) -> np.ndarray:
    """(n, 8) points of a smooth, curved 2-D sheet: 8 smooth features of (u, v), rotated."""
    rng = np.random.default_rng(seed)
    u, v = rng.uniform(0.0, 1.0, size=(2, n))
    feats = np.stack([u, v, np.sin(2 * u), np.cos(2 * v), u * u, v * v, u * v, np.sin(u + v)], axis=1)
    q, _ = np.linalg.qr(np.random.default_rng(99).normal(size=(8, 8)))
    return feats @ q * 10.0


def _route_len(graph, line) -> float:
    return float(np.sum(np.linalg.norm(np.diff(graph.warp(line), axis=0), axis=1)))


def measure_bank(codes: np.ndarray, *, routes: int, check: int, seed: int = 1, local: int | None = None,
                 **build) -> dict:
    """Build time and route times between random pairs (local=K: each code to its K-th nearest)."""
    from scipy.sparse import csgraph

    from geotween.models import graph as lgraph
    from geotween.models import search as lsearch

    t = time.perf_counter()
    g = lgraph.build_graph(codes, **build)
    build_s = time.perf_counter() - t
    rng = np.random.default_rng(seed)
    pairs = rng.integers(0, len(codes), size=(routes + 5, 2))
    if local is not None:
        pairs[:, 1] = g.tree.query(g.warped[pairs[:, 0]], k=min(local, len(codes)))[1][:, -1]
    for a, b in pairs[:5]:  # warm-up: the kd view is built once per graph
        lsearch.path_with_ends(g, codes[a], codes[b], attach=1)
    times = []
    for a, b in pairs[5:]:
        t = time.perf_counter()
        lsearch.path_with_ends(g, codes[a], codes[b], attach=1)
        times.append((time.perf_counter() - t) * 1e3)
    worst = 0.0
    for a, b in pairs[5:5 + check]:  # exactness against scipy's Dijkstra on the whole graph
        line, nodes = lsearch.path_with_ends(g, codes[a], codes[b], attach=1, return_nodes=True)
        ref = csgraph.dijkstra(g.adjacency, indices=int(a))[int(b)]
        got = float(np.sum(g.adjacency[nodes[:-1], nodes[1:]])) if len(nodes) > 1 else 0.0
        worst = max(worst, abs(got - ref) / max(ref, 1e-12))
    return {"codes": len(codes), "k": g.k, "edges": int(g.adjacency.nnz // 2), "build_s": round(build_s, 3),
            "route_ms_p50": round(float(np.median(times)), 3), "route_ms_p99": round(float(np.percentile(times, 99)), 3),
            "checked_pairs": int(min(check, routes)), "max_rel_length_diff": worst}


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--sizes", default="1000,10000,100000")
    p.add_argument("--routes", type=int, default=200)
    p.add_argument("--check", type=int, default=20)
    p.add_argument("--bundle", default=None)
    args = p.parse_args()
    set_threads()
    out = {"synthetic": [measure_bank(manifold_codes(int(s)), routes=args.routes, check=args.check)
                         for s in args.sizes.split(",")]}
    if args.bundle:
        from geotween.models.bundle import load_bundle

        b = load_bundle(args.bundle)
        imgs = b.images()
        out["demo_bank"] = measure_bank(b.codes, routes=args.routes, check=args.check, params=b.params,
                                        space=b.space, param_scale=b.scale, images=imgs.reshape(len(imgs), -1))
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
