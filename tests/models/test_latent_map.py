"""The latent map: PCA of bank codes (against scikit-learn), its determinism, and the PNG."""
import numpy as np
import pytest
from PIL import Image

from geotween.models.latent_map import RouteMarks, colour_fraction, draw_map, fit_map


def _codes(n=120, d=5, seed=0):
    rng = np.random.default_rng(seed)
    # anisotropic cloud, so the principal axes are well separated
    return rng.normal(size=(n, d)) * np.array([5.0, 2.0, 1.0, 0.5, 0.2])[:d] @ _rotation(d, rng) + 3.0


def _rotation(d, rng):
    q, _ = np.linalg.qr(rng.normal(size=(d, d)))
    return q


@pytest.mark.parametrize("d", [2, 3, 5])
def test_projection_equals_scikit_learn_pca_up_to_sign(d):
    from sklearn.decomposition import PCA  # reference: scikit-learn's PCA (full SVD solver)

    codes = _codes(d=d)
    lmap = fit_map(codes)
    ref = PCA(n_components=2, svd_solver="full").fit(codes)
    ours, theirs = lmap.project(codes), ref.transform(codes)
    for k in range(2):
        sign = np.sign(np.dot(ours[:, k], theirs[:, k]))
        assert sign != 0
        np.testing.assert_allclose(sign * ours[:, k], theirs[:, k], atol=1e-9)
        np.testing.assert_allclose(sign * lmap.axes[k], ref.components_[k], atol=1e-9)
    np.testing.assert_allclose(lmap.explained, ref.explained_variance_ratio_, rtol=1e-9)
    np.testing.assert_allclose(lmap.mean, ref.mean_, atol=1e-12)


def test_map_is_deterministic_and_sign_fixed():
    codes = _codes()
    a, b = fit_map(codes), fit_map(codes.copy())
    np.testing.assert_array_equal(a.project(codes), b.project(codes))
    # the largest loading of each axis is positive, so a reflected fit cannot come back
    assert all(ax[np.argmax(np.abs(ax))] > 0 for ax in a.axes)
    # the same codes in another order give the same map
    perm = np.random.default_rng(1).permutation(len(codes))
    np.testing.assert_allclose(fit_map(codes[perm]).project(codes), a.project(codes), atol=1e-9)


def test_projection_is_affine_and_centred():
    codes = _codes(d=3)
    lmap = fit_map(codes)
    xy = lmap.project(codes)
    np.testing.assert_allclose(xy.mean(axis=0), 0.0, atol=1e-9)  # centred on the bank's mean
    a, b = codes[3], codes[40]
    mid = lmap.project(((a + b) / 2)[None])[0]
    np.testing.assert_allclose(mid, (xy[3] + xy[40]) / 2, atol=1e-9)  # midpoints map to midpoints


def test_one_dimensional_codes_get_a_flat_map():
    codes = np.linspace(-1, 1, 9)[:, None]
    lmap = fit_map(codes)
    xy = lmap.project(codes)
    assert xy.shape == (9, 2) and np.all(xy[:, 1] == 0)
    assert lmap.explained.tolist() == [1.0, 0.0]


@pytest.mark.parametrize("bad, words", [(np.zeros((0, 3)), "shape"), (np.zeros(3), "shape"),
                                        (np.array([[0.0, np.nan]]), "finite")])
def test_bad_codes_are_refused(bad, words):
    with pytest.raises(ValueError, match=words):
        fit_map(bad)


def test_project_refuses_the_wrong_latent_size():
    lmap = fit_map(_codes(d=3))
    with pytest.raises(ValueError, match=r"expected \(N, 3\)"):
        lmap.project(np.zeros((2, 4)))


def test_draw_map_writes_a_png_with_the_route_marked(tmp_path):
    codes = _codes(d=3)
    lmap = fit_map(codes)
    frames = lmap.project(codes[10:15])
    ends = lmap.project(codes[[9, 15]])
    route = RouteMarks(frames=frames, ends=ends, accepted=[True, True, False, True, True])
    out = draw_map(lmap, codes, colour_fraction(np.linspace(0, 360, len(codes), endpoint=False), 0, 360), [route],
                   tmp_path / "map.png", colour_name="lamp_azimuth", periodic=True, size=(640, 480))
    img = np.asarray(Image.open(out).convert("RGB"))
    assert img.shape == (480, 640, 3)
    route_blue = np.all(img == (20, 70, 160), axis=-1).sum()
    assert route_blue > 100  # the route line and its accepted frames are drawn
    empty = draw_map(lmap, codes, np.zeros(len(codes)), [], tmp_path / "bank.png", size=(640, 480))
    assert np.all(np.asarray(Image.open(empty).convert("RGB")) == (20, 70, 160), axis=-1).sum() < route_blue
