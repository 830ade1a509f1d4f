import numpy as np
import pytest

from geotween.models.params import Parameter, ParamSpace
from geotween.models.triplets import mine_triplets


def _grid(nx, ny, periodic_x=False):
    space = ParamSpace([Parameter("x", 0.0, float(nx) if periodic_x else nx - 1.0, periodic=periodic_x),
                        Parameter("y", 0.0, ny - 1.0)])
    gx, gy = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float), indexing="ij")
    return space, np.stack([gx.ravel(), gy.ravel()], axis=-1)


def test_exact_count_on_an_open_grid():
    space, p = _grid(7, 5)
    trip = mine_triplets(p, space, span=3.0)
    # span 3 on a unit grid: 2-step axis pairs (1 middle), 3-step axis pairs (2 middles),
    # 2-step diagonals of length 2.83 (1 middle); nothing else has a grid point on its segment.
    nx, ny = 7, 5
    axis = (nx - 2) * ny + 2 * (nx - 3) * ny + nx * (ny - 2) + 2 * nx * (ny - 3)
    diagonal = 2 * (nx - 2) * (ny - 2)
    assert len(trip) == axis + diagonal
    assert np.all(trip.residual < 1e-9)
    mid = space.lerp(p[trip.s], p[trip.t], trip.a)
    assert np.allclose(mid, p[trip.m])


def test_exact_count_on_a_periodic_grid():
    space, p = _grid(12, 4, periodic_x=True)
    trip = mine_triplets(p, space, span=3.0)
    nx, ny = 12, 4
    axis = nx * ny + 2 * nx * ny + nx * (ny - 2) + 2 * nx * (ny - 3)  # x wraps: every start has pairs
    diagonal = 2 * nx * (ny - 2)
    assert len(trip) == axis + diagonal


def test_short_arc_across_the_seam():
    space = ParamSpace([Parameter("azimuth", 0.0, 360.0, periodic=True)])
    p = np.array([[350.0], [0.0], [10.0], [180.0], [90.0], [270.0]])
    trip = mine_triplets(p, space, scale=np.array([10.0]), span=2.0)
    # 350 -> 10 passes through 0 on the short arc, never through 180: exactly one triplet
    assert len(trip) == 1
    assert {p[trip.s[0], 0], p[trip.t[0], 0]} == {350.0, 10.0}
    assert p[trip.m[0], 0] == 0.0
    assert trip.a == pytest.approx([0.5])


def test_tolerance_is_respected_on_scattered_samples():
    rng = np.random.default_rng(3)
    space = ParamSpace([Parameter("u", 0.0, 10.0), Parameter("v", 0.0, 10.0)])
    p = rng.uniform(0, 10, size=(300, 2))
    scale = np.array([1.0, 1.0])
    tight = mine_triplets(p, space, scale=scale, span=2.0, tolerance=0.05)
    loose = mine_triplets(p, space, scale=scale, span=2.0, tolerance=0.2)
    assert 0 < len(tight) < len(loose)
    for trip, tol in ((tight, 0.05), (loose, 0.2)):
        on_line = space.lerp(p[trip.s], p[trip.t], trip.a)
        resid = np.linalg.norm(p[trip.m] - on_line, axis=1)
        assert np.all(resid <= tol + 1e-9)
        assert np.allclose(resid, trip.residual)
        assert np.all(np.linalg.norm(p[trip.s] - p[trip.t], axis=1) <= 2.0 + 1e-9)
        assert np.all((trip.a > 0) & (trip.a < 1))
