"""The settings spacing of scattered scenes (models.spacing): scattered axes rebalanced by how fast the
images change along each. Reference: the first-order Taylor law for a shifted picture, the RMS
difference of I(x + d) and I(x) is |d| times the RMS of the picture's gradient along d (common
practice); the picture is scikit-image's "camera" photograph, its gradients by numpy."""
import numpy as np
import pytest
from scipy import ndimage
from skimage import data as skdata

from geotween.models.params import Parameter, ParamSpace
from geotween.models.refine import blur
from geotween.models.spacing import BLUR, STRETCH, balanced_spacing

SPACE = ParamSpace([Parameter("a", 0.0, 10.0), Parameter("b", 0.0, 10.0)])
SIDE = 48
PX_A, PX_B = 0.5, 2.0  # px the picture moves per unit of a (along x) and of b (along y)


def shifted_views(params: np.ndarray) -> np.ndarray:
    # scikit-image's "camera" photograph, a 96 px patch moved by cubic-spline shifts (scipy.ndimage),
    # its central SIDE px kept
    photo = skdata.camera()[200:296, 200:296].astype(np.float64) / 255.0
    out = [ndimage.shift(photo, (b * PX_B, a * PX_A), order=3, mode="nearest")[24:24 + SIDE, 24:24 + SIDE]
           for a, b in params]
    return np.clip(np.stack(out), 0.0, 1.0)[..., None].astype(np.float32)


def test_scattered_axes_follow_how_fast_the_picture_moves():
    params = np.random.default_rng(0).random((200, 2)) * 10.0
    views = shifted_views(params)
    scale = balanced_spacing(SPACE, params, views)
    # Taylor law: per unit of a the views change by PX_A * rms(dI/dx), per unit of b by PX_B * rms(dI/dy);
    # equal change per spacing puts scale_a / scale_b at their inverse ratio
    soft = blur(views, BLUR)[..., 0]
    gy, gx = np.gradient(soft, axis=(1, 2))
    expected = (PX_B * np.sqrt(np.mean(gy ** 2))) / (PX_A * np.sqrt(np.mean(gx ** 2)))
    assert scale[0] / scale[1] == pytest.approx(expected, rel=0.2)
    assert scale[0] / scale[1] > 2.0  # far from the unbalanced 1.0
    # a spacing cell keeps its volume: still about one sample per cell
    plain = SPACE.spacing(params)
    assert np.prod(scale) == pytest.approx(np.prod(plain), rel=1e-6)


def test_grid_axes_keep_their_step():
    a, b = np.meshgrid(np.arange(0.0, 10.0, 1.0), np.arange(0.0, 10.0, 2.5), indexing="ij")
    params = np.stack([a.ravel(), b.ravel()], axis=-1)
    scale = balanced_spacing(SPACE, params, shifted_views(params))
    np.testing.assert_allclose(scale, [1.0, 2.5])


def test_an_axis_the_images_ignore_is_stretched_only_to_the_bound():
    params = np.random.default_rng(1).random((60, 2)) * 10.0
    views = shifted_views(np.stack([params[:, 0], np.zeros(len(params))], axis=-1))  # b changes nothing
    ratio = balanced_spacing(SPACE, params, views) / SPACE.spacing(params)
    np.testing.assert_allclose(ratio, [1.0 / STRETCH, STRETCH], rtol=1e-9)


def test_still_images_leave_the_spacing_as_it_was():
    params = np.random.default_rng(2).random((30, 2)) * 10.0
    views = np.full((30, 8, 8, 1), 0.5, np.float32)
    np.testing.assert_allclose(balanced_spacing(SPACE, params, views), SPACE.spacing(params))
