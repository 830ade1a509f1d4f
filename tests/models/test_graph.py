"""Latent graph: kNN construction, short-circuit pruning, k rule, shortest paths."""
import numpy as np
import pytest
from scipy.sparse import csgraph, csr_matrix
from scipy.spatial.distance import cdist, mahalanobis
from sklearn.datasets import make_swiss_roll
from sklearn.neighbors import kneighbors_graph

from geotween.models.graph import LatentGraph, build_graph
from geotween.models.params import Parameter, ParamSpace
from geotween.models.search import lower_bound, nearest_nodes, path_with_ends, shortest_path


def spiral_arc(t):
    # Arc length of the spiral (t cos t, t sin t) from 0 to t: (t sqrt(1 + t^2) + asinh t) / 2
    # (standard calculus, the integral of sqrt(1 + t^2)).
    return (t * np.sqrt(1 + t * t) + np.arcsinh(t)) / 2


def roll_geodesic(t, y, i, j):
    # The swiss roll is a developable surface (spiral x height); unrolled it is flat, so the
    # geodesic is the straight line in (arc length, height) (Tenenbaum, de Silva, Langford 2000).
    return np.hypot(spiral_arc(t[j]) - spiral_arc(t[i]), y[j] - y[i])


@pytest.fixture(scope="module")
def roll():
    # scikit-learn's make_swiss_roll: X = (t cos t, y, t sin t), t in [1.5 pi, 4.5 pi], y in [0, 21].
    x, t = make_swiss_roll(n_samples=2000, noise=0.0, random_state=0)
    return x, t, x[:, 1]


@pytest.fixture(scope="module")
def roll_with_shortcuts(roll):
    """The roll plus five samples midway between the layers at t = 2 pi and t = 4 pi. Their
    settings say "inner layer", but their codes sit close to both layers."""
    x, t, y = roll
    tn, yn = 2 * np.pi, np.array([3.0, 7.0, 11.0, 15.0, 19.0])
    r = tn + np.pi
    noise = np.stack([np.full(5, r * np.cos(tn)), yn, np.full(5, r * np.sin(tn))], axis=1)
    inner = np.flatnonzero(np.abs(t - tn) < 0.3)
    outer = np.flatnonzero(np.abs(t - tn - 2 * np.pi) < 0.15)
    pairs = [(i, j) for i in inner for j in outer if abs(y[i] - y[j]) < 3][:20]
    return (np.vstack([x, noise]), np.r_[t, np.full(5, tn)], np.r_[y, yn], pairs)


def test_geodesics_match_the_unrolled_swiss_roll(roll):
    x, t, y = roll
    graph = build_graph(x, k=14)
    sources = np.arange(40)
    dist = csgraph.dijkstra(graph.adjacency, indices=sources)
    rel = []
    for i in sources:
        for j in range(0, len(x), 5):
            true = roll_geodesic(t, y, i, j)
            if true > 40.0:  # far-apart pairs: the graph's zig-zag is a small share of the length
                rel.append(dist[i, j] / true - 1.0)
    rel = np.array(rel)
    assert len(rel) > 500
    assert np.median(rel) < 0.03
    assert rel.max() < 0.05 and rel.min() > -0.01  # chords barely undercut the surface


def test_shortcuts_shrink_geodesics_and_pruning_by_settings_fixes_them(roll_with_shortcuts):
    x, t, y, pairs = roll_with_shortcuts
    truth = np.array([roll_geodesic(t, y, i, j) for i, j in pairs])

    plain = build_graph(x, k=14)
    plain_len = np.array([shortest_path(plain, int(i), int(j))[1] for i, j in pairs])
    assert plain.pruned == 0
    assert np.all(plain_len < 0.5 * truth)  # the shortcut halves (here: quarters) the route

    pruned = build_graph(x, k=14, params=np.stack([t, y], axis=1))
    pruned_len = np.array([shortest_path(pruned, int(i), int(j))[1] for i, j in pairs])
    assert pruned.pruned > 0 and pruned.restored == 0
    assert np.all(np.abs(pruned_len / truth - 1.0) < 0.04)


def test_pruning_by_image_distance_fixes_shortcuts(roll_with_shortcuts):
    x, t, y, pairs = roll_with_shortcuts
    # Each sample's "image": a soft blob at its unrolled position (arc length, height), 48 x 12 px.
    gx = np.linspace(spiral_arc(1.5 * np.pi), spiral_arc(4.5 * np.pi), 48)
    gy = np.linspace(0.0, 21.0, 12)
    s = spiral_arc(t)
    images = np.exp(-((gx[None, None] - s[:, None, None]) ** 2 + (gy[None, :, None] - y[:, None, None]) ** 2)
                    / (2 * 8.0 ** 2))
    graph = build_graph(x, k=14, images=images)
    lengths = np.array([shortest_path(graph, int(i), int(j))[1] for i, j in pairs])
    truth = np.array([roll_geodesic(t, y, i, j) for i, j in pairs])
    assert graph.pruned > 0
    assert np.all(np.abs(lengths / truth - 1.0) < 0.04)


def test_periodic_settings_use_the_short_arc():
    theta = np.arange(0.0, 360.0, 10.0)
    codes = np.stack([np.cos(np.radians(theta)), np.sin(np.radians(theta))], axis=1)
    i350, i10 = int(np.flatnonzero(theta == 350)[0]), int(np.flatnonzero(theta == 10)[0])
    ring = ParamSpace([Parameter("azimuth", 0.0, 360.0, "deg", periodic=True)])
    graph = build_graph(codes, k=4, params=theta[:, None], space=ring)
    assert graph.pruned == 0
    assert graph.adjacency[i350, i10] > 0  # 350 deg to 10 deg is a 20 deg step, not 340

    line = ParamSpace([Parameter("azimuth", 0.0, 360.0, "deg", periodic=False)])
    cut = build_graph(codes, k=4, params=theta[:, None], space=line)
    assert cut.pruned > 0 and cut.adjacency[i350, i10] == 0
    assert csgraph.connected_components(cut.adjacency, directed=False)[0] == 1


def test_long_edges_across_a_density_change_are_not_short_circuits():
    # Settings = codes, sampled 8x sparser for x >= 5: the edges between the two regions are long
    # in settings, but no longer than their code length buys, so none is a short-circuit.
    dx, dy = np.meshgrid(np.arange(0, 5, 0.25), np.arange(0, 5, 0.25), indexing="ij")
    sx, sy = np.meshgrid(np.arange(5, 21, 2.0), np.arange(0, 5, 2.0), indexing="ij")
    codes = np.vstack([np.stack([dx.ravel(), dy.ravel()], 1), np.stack([sx.ravel(), sy.ravel()], 1)])
    for k in (None, 8):
        assert build_graph(codes, k=k, params=codes).pruned == 0


def test_near_duplicate_codes_are_not_short_circuits():
    # Two samples one small settings step apart whose codes nearly coincide: g / c explodes, but
    # the edge spans no more settings than its neighbours do.
    p = np.random.default_rng(0).uniform(0, 10, size=(300, 2))
    codes = p.copy()
    codes[1] = codes[0] + 1e-9
    p[1] = p[0] + [0.4, 0.0]
    assert build_graph(codes, params=p).pruned == 0


def test_pruning_never_disconnects():
    # A 20 x 10 grid of codes whose settings tear between columns 9 and 10: every edge across the
    # seam is a short-circuit, but one of them must stay.
    cx, cy = np.meshgrid(np.arange(20.0), np.arange(10.0), indexing="ij")
    codes = np.stack([cx.ravel(), cy.ravel()], axis=1)
    params = codes.copy()
    params[codes[:, 0] >= 10, 0] += 50.0
    graph = build_graph(codes, k=8, params=params)
    adj = graph.adjacency.tocoo()
    crossing = (codes[adj.row, 0] < 10) & (codes[adj.col, 0] >= 10)
    full = kneighbors_graph(codes, 8, mode="connectivity")  # scikit-learn's kNN, for the edge count
    full = full + full.T
    fr, fc = full.nonzero()
    assert graph.restored == 1 and crossing.sum() == 1
    assert graph.pruned == np.sum((codes[fr, 0] < 10) & (codes[fc, 0] >= 10)) - 1
    assert adj.data[crossing][0] == pytest.approx(1.0)  # the shortest crossing edge is the one kept
    assert csgraph.connected_components(graph.adjacency, directed=False)[0] == 1


def test_knn_edges_match_scikit_learn():
    codes = np.random.default_rng(3).normal(size=(200, 3))
    graph = build_graph(codes, k=6)
    ref = kneighbors_graph(codes, 6, mode="distance")  # scikit-learn's directed kNN graph
    ref = ref.maximum(ref.T).tocsr()
    assert graph.adjacency.nnz == ref.nnz
    assert np.allclose(graph.adjacency.toarray(), ref.toarray(), rtol=1e-12, atol=0)
    assert (graph.adjacency - graph.adjacency.T).nnz == 0


def test_k_rule_takes_the_smallest_connecting_k():
    # Three tight clusters of 10: every point's 9 nearest are in its own cluster.
    centres = np.array([[0.0, 0.0], [10.0, 0.0], [20.0, 0.0]])
    rng = np.random.default_rng(0)
    codes = np.vstack([c + rng.normal(scale=0.5, size=(10, 2)) for c in centres])
    graph = build_graph(codes)
    assert graph.k == 10 and graph.bridges == 0

    def knn_connected(k):  # scikit-learn's kNN graph as the reference for connectivity
        a = kneighbors_graph(codes, k, mode="connectivity")
        return csgraph.connected_components(a + a.T, directed=False)[0] == 1

    assert knn_connected(graph.k) and not knn_connected(graph.k - 1)
    assert csgraph.connected_components(graph.adjacency, directed=False)[0] == 1


def test_separate_clusters_are_bridged_by_their_closest_pair():
    rng = np.random.default_rng(1)
    a = rng.normal(size=(100, 3))
    b = rng.normal(size=(100, 3)) + [40.0, 0.0, 0.0]
    graph = build_graph(np.vstack([a, b]))
    assert graph.components == 2 and graph.bridges == 1 and graph.k == 32
    assert csgraph.connected_components(graph.adjacency, directed=False)[0] == 1
    gap = cdist(a, b)  # scipy's pairwise distances: the bridge is the closest pair
    i, j = np.unravel_index(np.argmin(gap), gap.shape)
    assert graph.adjacency[i, 100 + j] == pytest.approx(gap.min())
    assert graph.adjacency[:100, 100:].nnz == 1


def random_graph(seed, n=300, degree=3):
    """Random sparse graph over random codes; each weight is the code distance times 1 to 2, so
    the straight-distance heuristic stays admissible. Some nodes may be unreachable."""
    rng = np.random.default_rng(seed)
    codes = rng.normal(size=(n, 3))
    rows = np.repeat(np.arange(n), degree)
    cols = rng.integers(0, n, size=n * degree)
    rows, cols = rows[rows != cols], cols[rows != cols]
    w = np.linalg.norm(codes[rows] - codes[cols], axis=1) * rng.uniform(1.0, 2.0, size=len(rows))
    adj = csr_matrix((w, (rows, cols)), shape=(n, n))
    return LatentGraph(codes=codes, adjacency=adj.maximum(adj.T))


SEARCHES = (("corridor", True), ("heap", True), ("heap", False), ("corridor", False))


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_shortest_paths_equal_scipy_dijkstra_on_random_graphs(seed):
    graph = random_graph(seed)
    ref = csgraph.dijkstra(graph.adjacency, indices=np.arange(5))  # scipy as the reference
    dense = graph.adjacency.toarray()
    for s in range(5):
        for t in range(0, len(graph), 11):
            for backend, heuristic in SEARCHES:
                if np.isinf(ref[s, t]):
                    with pytest.raises(LookupError):
                        shortest_path(graph, s, t, backend=backend, heuristic=heuristic)
                    continue
                path, length = shortest_path(graph, s, t, backend=backend, heuristic=heuristic)
                assert length == pytest.approx(ref[s, t], rel=1e-12)
                assert path[0] == s and path[-1] == t
                assert dense[path[:-1], path[1:]].sum() == pytest.approx(length, rel=1e-12)


@pytest.mark.parametrize("seed", [0, 1])
def test_heuristic_is_admissible(seed, roll):
    for graph in (random_graph(seed), build_graph(roll[0], k=8)):
        targets = np.random.default_rng(seed).integers(0, len(graph), size=5)
        to_target = csgraph.dijkstra(graph.adjacency, indices=targets)  # symmetric: to == from
        for row, t in zip(to_target, targets):
            h = lower_bound(graph, int(t))
            reachable = np.isfinite(row)
            assert np.all(h[reachable] <= row[reachable] * (1 + 1e-12))


def test_shortest_paths_on_the_roll_equal_scipy_dijkstra(roll):
    graph = build_graph(roll[0], k=10)
    rng = np.random.default_rng(5)
    sources = rng.integers(0, len(graph), size=6)
    ref = csgraph.dijkstra(graph.adjacency, indices=sources)
    for row, s in zip(ref, sources):
        for t in rng.integers(0, len(graph), size=8):
            for backend in ("corridor", "heap"):
                _, length = shortest_path(graph, int(s), int(t), backend=backend)
                assert length == pytest.approx(row[t], rel=1e-12)


def test_corridor_search_equals_scipy_dijkstra_on_a_curved_sheet_in_8d():
    # A smooth 2-D sheet in 8-D (the shape of the large-bank benchmark): the corridor search,
    # which renumbers only the nodes it needs, must give scipy's exact lengths (reference).
    rng = np.random.default_rng(7)
    u, v = rng.uniform(0.0, 1.0, size=(2, 4000))
    feats = np.stack([u, v, np.sin(2 * u), np.cos(2 * v), u * u, v * v, u * v, np.sin(u + v)], axis=1)
    graph = build_graph(feats * 10.0)
    sources = rng.integers(0, len(graph), size=5)
    ref = csgraph.dijkstra(graph.adjacency, indices=sources)
    for row, s in zip(ref, sources):
        for t in rng.integers(0, len(graph), size=10):
            path, length = shortest_path(graph, int(s), int(t))
            assert length == pytest.approx(row[t], rel=1e-12)
            assert graph.adjacency[path[:-1], path[1:]].sum() == pytest.approx(length, rel=1e-12)


def test_metric_weights_are_mahalanobis_distances():
    rng = np.random.default_rng(2)
    codes = rng.normal(size=(150, 3)) * [1.0, 3.0, 0.5]
    m = np.array([[4.0, 0.5, 0.0], [0.5, 1.0, 0.2], [0.0, 0.2, 2.0]])
    graph = build_graph(codes, k=6, metric=m)
    adj = graph.adjacency.tocoo()
    for r, c, w in list(zip(adj.row, adj.col, adj.data))[:200]:
        # scipy's mahalanobis(u, v, VI) = sqrt((u - v) VI (u - v)^T)
        assert w == pytest.approx(mahalanobis(codes[r], codes[c], m), rel=1e-12)
    ref = csgraph.dijkstra(graph.adjacency, indices=[0])[0]
    for t in range(0, 150, 9):
        assert shortest_path(graph, 0, t)[1] == pytest.approx(ref[t], rel=1e-12)
        assert shortest_path(graph, 0, t, backend="heap")[1] == pytest.approx(ref[t], rel=1e-12)
    assert np.all(lower_bound(graph, 0) <= ref * (1 + 1e-12))
    # The kd-tree uses the metric too: nearest nodes by Mahalanobis distance, as scipy's cdist finds.
    z = rng.normal(size=3)
    idx, dist = nearest_nodes(graph, z, count=3)
    ref_d = cdist(z[None], codes, "mahalanobis", VI=m)[0]
    assert np.array_equal(idx, np.argsort(ref_d)[:3])
    assert np.allclose(dist, np.sort(ref_d)[:3])


def test_path_with_ends_attaches_the_end_codes(roll):
    x = roll[0]
    graph = build_graph(x, k=10)
    a, b = x[0] + [0.1, 0.1, 0.0], x[1] - [0.0, 0.1, 0.1]
    line, nodes = path_with_ends(graph, a, b, attach=3, return_nodes=True)
    assert np.array_equal(line[0], a) and np.array_equal(line[-1], b)
    assert np.array_equal(line[1:-1], x[nodes])
    # Brute force over the attach choices with scipy's Dijkstra between nodes.
    si, sd = nearest_nodes(graph, a, 3)
    ei, ed = nearest_nodes(graph, b, 3)
    d = csgraph.dijkstra(graph.adjacency, indices=si)
    best = min(sd[p] + d[p, ei[q]] + ed[q] for p in range(3) for q in range(3))
    length = np.sum(np.linalg.norm(np.diff(line, axis=0), axis=1))
    assert length == pytest.approx(best, rel=1e-9)
    heap_line = path_with_ends(graph, a, b, backend="heap")
    assert np.sum(np.linalg.norm(np.diff(heap_line, axis=0), axis=1)) == pytest.approx(best, rel=1e-9)


def test_nearest_nodes_match_brute_force():
    codes = np.random.default_rng(4).normal(size=(80, 2))
    graph = build_graph(codes)
    z = np.array([[0.1, 0.2], [1.0, -1.0]])
    idx, dist = nearest_nodes(graph, z, count=2)
    ref = cdist(z, codes)  # scipy's pairwise distances
    assert idx.shape == (2, 2)
    assert np.array_equal(idx, np.argsort(ref, axis=1)[:, :2])
    assert np.allclose(dist, np.sort(ref, axis=1)[:, :2])


@pytest.mark.parametrize("kwargs, name", [
    (dict(k=0), "k"), (dict(k=50), "k"), (dict(max_param_ratio=1.0), "max_param_ratio"),
    (dict(metric=-np.eye(2)), "metric"), (dict(params=np.zeros((3, 1))), "params"),
    (dict(space=ParamSpace([Parameter("a", 0, 1)])), "params"),
])
def test_bad_arguments_name_the_parameter(kwargs, name):
    codes = np.random.default_rng(0).normal(size=(20, 2))
    with pytest.raises(ValueError, match=name):
        build_graph(codes, **kwargs)


def test_query_arguments_are_checked():
    graph = build_graph(np.random.default_rng(0).normal(size=(20, 2)))
    with pytest.raises(ValueError, match="target"):
        shortest_path(graph, 0, 20)
    with pytest.raises(ValueError, match="backend"):
        shortest_path(graph, 0, 1, backend="magic")
    with pytest.raises(ValueError, match="count"):
        nearest_nodes(graph, np.zeros(2), count=0)
    with pytest.raises(ValueError, match="adjacency"):
        LatentGraph(codes=graph.codes, adjacency=graph.adjacency * 0.5)


def test_unreachable_targets_raise_lookup_error():
    # Two pieces with no edge between them (built by hand: build_graph would bridge them).
    codes = np.array([[0.0, 0.0], [1.0, 0.0], [5.0, 0.0], [6.0, 0.0]])
    adj = csr_matrix((np.ones(4), ([0, 1, 2, 3], [1, 0, 3, 2])), shape=(4, 4))
    graph = LatentGraph(codes=codes, adjacency=adj)
    assert np.isinf(csgraph.dijkstra(adj, indices=0)[3])  # scipy agrees there is no path
    for backend, heuristic in SEARCHES:
        with pytest.raises(LookupError, match="target"):
            shortest_path(graph, 0, 3, backend=backend, heuristic=heuristic)
        assert shortest_path(graph, 0, 1, backend=backend, heuristic=heuristic)[1] == pytest.approx(1.0)
