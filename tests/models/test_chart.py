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


def test_the_chart_run_backwards_reads_settings_from_codes_of_an_affine_bank():
    # a bank whose codes are an exact affine function of its settings (a worked example: the
    # inverse of z = c + B p is p = B^+ (z - c), numpy.linalg.pinv), with a periodic first axis
    from geotween.models.chart import SettingsChart
    from geotween.models.params import Parameter, ParamSpace

    space = ParamSpace([Parameter("turn", 0.0, 360.0, periodic=True), Parameter("height", 0.0, 50.0)])
    turn, height = np.meshgrid(np.arange(0.0, 90.0, 15.0), np.arange(0.0, 50.0, 10.0), indexing="ij")
    params = np.stack([turn.ravel(), height.ravel()], axis=-1)
    c, b = np.array([0.5, -1.0, 2.0]), np.array([[0.02, 0.01, -0.03], [-0.05, 0.04, 0.01]])
    chart = SettingsChart(params, c + params @ b, space, np.array([15.0, 10.0]), fallback=lambda p: p)

    def head(z):  # what the fallback would say: far off on purpose, so a test of it can tell
        return np.full((len(z), 2), -999.0)

    want = np.array([[22.0, 13.0], [40.0, 31.0], [15.0, 20.0]])  # the last is a sample's own settings
    got = chart.settings_of(c + want @ b, head)
    assert np.allclose(got, want, atol=1e-9)
    assert np.allclose((c + want @ b - c) @ np.linalg.pinv(b), want)  # the reference inverse agrees
    # a code far off the bank (10 spacings beyond it) is left to the fallback
    far = chart.settings_of(c + np.array([[75.0, 150.0]]) @ b, head)
    assert np.allclose(far, -999.0)


def test_settings_read_back_stay_in_the_range_of_a_non_periodic_setting():
    from geotween.models.chart import SettingsChart
    from geotween.models.params import Parameter, ParamSpace

    space = ParamSpace([Parameter("pan", 0.0, 1.0), Parameter("zoom", 0.0, 1.0)])
    pan, zoom = np.meshgrid(np.linspace(0, 1, 5), np.linspace(0, 1, 5), indexing="ij")
    params = np.stack([pan.ravel(), zoom.ravel()], axis=-1)
    chart = SettingsChart(params, params @ np.array([[1.0, 0.0, 0.3], [0.0, 1.0, -0.2]]), space,
                          np.array([0.25, 0.25]), fallback=lambda p: p)
    # codes a little beyond the bank's edge (zoom -0.01, pan 1.02) read back on the edge, not past it
    got = chart.settings_of(np.array([[0.5, -0.01, 0.152], [1.02, 0.5, 0.206]]), lambda z: np.zeros((len(z), 2)))
    assert np.all(got >= 0.0) and np.all(got <= 1.0)
    assert got[0, 1] == 0.0 and got[1, 0] == 1.0
