"""Polyline routes: length, equal-arc-length resampling, relaxation, straight lines."""
import numpy as np
import pytest
from scipy.spatial import cKDTree

from geotween.models.route import at_t, interior_t, polyline_length, relax, resample, straight, taut

# An L: 2 along x, then 1 along y; total length 3.
L_SHAPE = np.array([[0.0, 0.0], [2.0, 0.0], [2.0, 1.0]])


def l_point(s):
    """Point at arc length s on L_SHAPE, written out by hand (elementary geometry)."""
    return np.where((s <= 2.0)[:, None], np.stack([s, 0 * s], 1), np.stack([2.0 + 0 * s, s - 2.0], 1))


def l_arc(p):
    """Arc length position of a point on L_SHAPE (inverse of l_point)."""
    return np.where(p[:, 1] == 0.0, p[:, 0], 2.0 + p[:, 1])


def test_polyline_length_sums_segments():
    assert polyline_length(L_SHAPE) == pytest.approx(3.0)
    assert polyline_length(L_SHAPE[:1]) == 0.0
    # Pythagoras (3-4-5 triangle legs).
    assert polyline_length([[0, 0, 0], [3, 4, 0], [3, 4, 12]]) == pytest.approx(5.0 + 12.0)


@pytest.mark.parametrize("count", [1, 2, 5, 7, 12])
def test_resample_interior_points_sit_at_equal_arc_length(count):
    pts, t = resample(L_SHAPE, count, return_t=True)
    assert pts.shape == (count, 2)
    # The frame contract: frame i of n sits at t = i / (n + 1).
    assert np.array_equal(t, np.array([i / (count + 1) for i in range(1, count + 1)]))
    assert np.allclose(pts, l_point(3.0 * t), atol=1e-12)
    gaps = np.diff(np.r_[0.0, l_arc(pts), 3.0])
    assert np.allclose(gaps, 3.0 / (count + 1), atol=1e-12)


def test_resample_with_ends_keeps_them_exactly():
    pts, t = resample(L_SHAPE, 7, include_ends=True, return_t=True)
    assert np.array_equal(pts[0], L_SHAPE[0]) and np.array_equal(pts[-1], L_SHAPE[-1])
    assert np.allclose(np.diff(l_arc(pts)), 0.5, atol=1e-12)
    assert np.allclose(t, np.arange(7) / 6)


def test_resample_degenerate_polylines():
    same = np.array([[1.0, 2.0], [1.0, 2.0], [1.0, 2.0]])
    assert np.array_equal(resample(same, 3), np.repeat(same[:1], 3, axis=0))
    assert np.array_equal(resample(same[:1], 2), np.repeat(same[:1], 2, axis=0))
    # A zero-length segment in the middle is skipped over, not divided by.
    doubled = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 0.0], [2.0, 0.0]])
    assert np.allclose(resample(doubled, 3), [[0.5, 0.0], [1.0, 0.0], [1.5, 0.0]])


def test_at_t_clips_and_hits_vertices():
    assert np.allclose(at_t(L_SHAPE, [-1.0, 0.0, 2 / 3, 1.0, 2.0]), [[0, 0], [0, 0], [2, 0], [2, 1], [2, 1]])


def test_straight_matches_numpy_linspace():
    a, b = np.array([0.0, 1.0, -2.0]), np.array([3.0, -1.0, 4.0])
    # numpy's linspace over the closed segment, ends dropped, as the reference.
    assert np.allclose(straight(a, b, 6), np.linspace(a, b, 8)[1:-1])
    assert np.allclose(interior_t(6), np.linspace(0, 1, 8)[1:-1])
    assert straight(a, b, 0).shape == (0, 3)


def zigzag():
    x = 10.0 * np.linspace(0.0, 1.0, 21) ** 2  # unevenly spaced on purpose
    y = np.where(np.arange(21) % 2 == 1, 1.0, -1.0)
    y[0] = y[-1] = 0.0
    return np.stack([x, y], axis=1)


def test_relax_shortens_a_zigzag_and_keeps_its_ends():
    path = zigzag()
    lengths = [polyline_length(relax(path, lambda z: z, rounds=r)) for r in (0, 1, 3, 10)]
    assert lengths[0] == pytest.approx(polyline_length(path))
    assert all(b < a for a, b in zip(lengths, lengths[1:]))
    out = relax(path, lambda z: z, rounds=10)
    assert np.array_equal(out[0], path[0]) and np.array_equal(out[-1], path[-1])
    assert lengths[-1] < 1.01 * 10.0  # near the straight segment, the shortest curve
    # Evenly spread along the curve (the input is not) thanks to the resampling step.
    seg = np.linalg.norm(np.diff(out, axis=0), axis=1)
    assert seg.max() - seg.min() < 0.01 * seg.mean()


def test_relax_with_a_projection_stays_on_the_circle_and_tends_to_the_arc():
    def onto_circle(z):
        return z / np.linalg.norm(z, axis=1, keepdims=True)

    m = 12
    angle = np.linspace(0.0, np.pi / 2, m)
    angle[1:-1] += 0.3 * np.where(np.arange(1, m - 1) % 2 == 0, 1.0, -1.0)  # back-and-forth wiggle
    path = np.stack([np.cos(angle), np.sin(angle)], axis=1)
    for rounds in (1, 2):  # on the circle after every round, not only once converged
        assert np.allclose(np.linalg.norm(relax(path, onto_circle, rounds=rounds), axis=1), 1.0, atol=1e-12)
    out = relax(path, onto_circle, rounds=40)
    assert np.allclose(np.linalg.norm(out, axis=1), 1.0, atol=1e-12)
    assert np.array_equal(out[0], path[0]) and np.array_equal(out[-1], path[-1])
    assert np.all(np.diff(np.arctan2(out[:, 1], out[:, 0])) > 0)
    # m points evenly on a quarter circle: (m - 1) chords of 2 sin(theta / 2), theta = (pi / 2) / (m - 1)
    # (elementary geometry); that is just under the arc length pi / 2.
    inscribed = (m - 1) * 2 * np.sin(np.pi / 4 / (m - 1))
    assert polyline_length(path) > 1.5 * inscribed
    assert polyline_length(out) == pytest.approx(inscribed, rel=2e-3)


def test_relax_can_project_the_ends_too():
    path = np.array([[2.0, 0.0], [1.0, 1.0], [0.0, 3.0]])
    out = relax(path, lambda z: z / np.linalg.norm(z, axis=1, keepdims=True), rounds=2, keep_ends=False)
    assert np.allclose(np.linalg.norm(out, axis=1), 1.0)
    assert np.allclose(out[0], [1.0, 0.0]) and np.allclose(out[-1], [0.0, 1.0])


@pytest.mark.parametrize("call, name", [
    (lambda: resample(L_SHAPE, -1), "count"),
    (lambda: resample(L_SHAPE, 1, include_ends=True), "count"),
    (lambda: resample(np.zeros(3), 2), "points"),
    (lambda: relax(L_SHAPE, step=0.0), "step"),
    (lambda: relax(L_SHAPE, rounds=-1), "rounds"),
    (lambda: relax(L_SHAPE, lambda z: z[:, :1]), "project"),
    (lambda: straight([0, 0], [1, 1, 1], 2), "z_start"),
])
def test_bad_arguments_name_the_parameter(call, name):
    with pytest.raises(ValueError, match=name):
        call()


def _clearance(samples):
    tree = cKDTree(samples)
    return lambda pts: tree.query(pts, k=1)[0]


def _segment_clearance(points, clearance, step=0.01):
    worst = 0.0
    for a, b in zip(points[:-1], points[1:]):
        s = np.linspace(0.0, 1.0, 200)[:, None]
        worst = max(worst, float(np.max(clearance(a + s * (b - a)))))
    return worst


def test_taut_takes_the_chord_over_a_filled_square():
    # A unit grid filling [0, 4] x [0, 4]: every point of the square is within sqrt(2)/2 of a grid
    # point (the covering radius of the square lattice, elementary geometry), so with a tube of
    # 0.75 the staircase from corner to corner collapses to the diagonal.
    grid = np.stack(np.meshgrid(np.arange(5.0), np.arange(5.0)), -1).reshape(-1, 2)
    stairs = np.array([[0, 0], [1, 0], [1, 1], [2, 1], [2, 2], [3, 2], [3, 3], [4, 3], [4, 4]], dtype=float)
    keep = taut(stairs, _clearance(grid), 0.75, step=0.05)
    assert keep.tolist() == [0, len(stairs) - 1]
    assert polyline_length(stairs[keep]) == pytest.approx(4 * np.sqrt(2))


def test_taut_keeps_the_bend_around_a_hole():
    # Samples on a ring of radius 3 (a hole in the middle): the chord between opposite points
    # passes the centre, 3 away from every sample, so the route must keep points of the arc.
    ang = np.linspace(0.0, 2 * np.pi, 120, endpoint=False)
    ring = 3.0 * np.stack([np.cos(ang), np.sin(ang)], 1)
    half = ring[:61]  # from angle 0 to pi along the ring
    clearance = _clearance(ring)
    keep = taut(half, clearance, 0.5, step=0.05)
    assert keep[0] == 0 and keep[-1] == 60 and len(keep) > 3
    kept = half[keep]
    assert _segment_clearance(kept, clearance) <= 0.5 + 1e-9  # every segment stays inside the tube
    # Shorter than the ring's half (3 pi) but no shorter than the chords of the kept arc allow.
    assert polyline_length(kept) < 3 * np.pi
    assert polyline_length(kept) > 6.0 + 1.0


def test_taut_rejects_bad_limits():
    with pytest.raises(ValueError, match="limit, step"):
        taut(L_SHAPE, lambda p: np.zeros(len(p)), 0.0, step=0.1)
    assert taut(L_SHAPE[:1], lambda p: np.zeros(len(p)), 1.0, step=0.1).tolist() == [0]
