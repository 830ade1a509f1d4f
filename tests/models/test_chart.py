"""Batched local affine charts against numpy's own least squares, one point at a time."""
import numpy as np
import pytest

from geotween.models.chart import local_affine


def test_intercepts_equal_numpy_lstsq_row_by_row():
    rng = np.random.default_rng(3)
    n, k, p, d = 40, 6, 2, 5
    x, z, w = rng.normal(size=(n, k, p)), rng.normal(size=(n, k, d)), rng.uniform(0.1, 2.0, size=(n, k))
    got, ok = local_affine(x, z, w)
    assert ok.all()
    for r in range(n):
        # reference: numpy.linalg.lstsq on the weighted design [1, x] sqrt(w)
        a = np.hstack([np.ones((k, 1)), x[r]]) * np.sqrt(w[r])[:, None]
        coef, *_ = np.linalg.lstsq(a, z[r] * np.sqrt(w[r])[:, None], rcond=None)
        assert np.allclose(got[r], coef[0], atol=1e-10)


def test_an_exact_affine_map_is_recovered():
    rng = np.random.default_rng(4)
    c, b = rng.normal(size=3), rng.normal(size=(2, 3))
    x = rng.normal(size=(5, 7, 2))
    got, ok = local_affine(x, c + x @ b, np.ones((5, 7)))
    assert ok.all() and np.allclose(got, c)


def test_collinear_neighbours_are_flagged():
    x = np.zeros((2, 4, 2))
    x[0, :, 0] = np.arange(4.0)            # all on one line: the second direction is not seen
    x[1] = [[0, 0], [1, 0], [0, 1], [1, 1]]
    _, ok = local_affine(x, np.ones((2, 4, 3)), np.ones((2, 4)))
    assert ok.tolist() == [False, True]
    with np.testing.assert_raises(ValueError):
        local_affine(x, np.ones((2, 4, 3)), np.zeros((2, 4)))


@pytest.mark.parametrize("shape", [(3, 4), (3, 4, 2, 1)])
def test_bad_shapes_are_refused(shape):
    with pytest.raises(ValueError, match="shapes"):
        local_affine(np.zeros(shape), np.zeros((3, 4, 2)), np.ones((3, 4)))
