"""Global motion (models.motion): a homography fitted between two captures, followed in steps by its
matrix power. References: scikit-image's SimilarityTransform and warp for the true maps and views,
its structural_similarity for the comparison, and elementary geometry (a rotation by s * theta is
the s-th power of a rotation by theta)."""
import numpy as np
import pytest
from skimage import data as skdata
from skimage import metrics as skmetrics
from skimage import transform as sktransform

from geotween.models import flow as lflow
from geotween.models import fullsize as lfull
from geotween.models import motion as lmotion

SIDE, SMALL = 256, 64
CENTRE = np.array([(SIDE - 1) / 2, (SIDE - 1) / 2])


@pytest.fixture(scope="module")
def photo():
    # scikit-image's "astronaut" photograph (ships inside the scikit-image wheel), its central 256 px
    img = skdata.astronaut()[128:384, 128:384].astype(np.float32) / 255.0
    return img


def about_centre(angle_deg: float, zoom: float) -> sktransform.SimilarityTransform:
    """A roll by angle_deg and a zoom about the picture's centre (scikit-image's transform algebra)."""
    to_origin = sktransform.SimilarityTransform(translation=-CENTRE)
    turn = sktransform.SimilarityTransform(rotation=np.radians(angle_deg), scale=zoom)
    back = sktransform.SimilarityTransform(translation=CENTRE)
    return to_origin + turn + back


def view(photo, tf: sktransform.SimilarityTransform) -> np.ndarray:
    """The photo as a camera rolled and zoomed by tf sees it: view(tf(x)) = photo(x)."""
    return sktransform.warp(photo, tf.inverse, order=3, mode="reflect").astype(np.float32)


def ssim(a, b):
    # Gaussian SSIM of Wang et al. 2004 (sigma 1.5), scikit-image's implementation
    return skmetrics.structural_similarity(a, b, channel_axis=2, data_range=1.0, gaussian_weights=True, sigma=1.5,
                                           use_sample_covariance=False)


def inner(img: np.ndarray, margin: int = 40) -> np.ndarray:
    return img[margin:-margin, margin:-margin]


CORNERS = np.array([[0, 0, 1], [SIDE - 1, 0, 1], [0, SIDE - 1, 1], [SIDE - 1, SIDE - 1, 1]], float).T


def mapped(h: np.ndarray) -> np.ndarray:
    """Where the map sends the picture's four corners, (2, 4) pixels."""
    p = h @ CORNERS
    return p[:2] / p[2]


def fitted(photo, angle: float, zoom: float):
    a = photo
    b = view(photo, about_centre(angle, zoom))
    a_s, b_s = lfull.resize(a[None], SMALL, SMALL)[0], lfull.resize(b[None], SMALL, SMALL)[0]
    return a, b, lmotion.fit(a, b, a_s, b_s, lflow.flow(a_s, b_s, method="dis-fine"))


def test_a_roll_and_zoom_is_found_to_a_fraction_of_a_pixel(photo):
    a, b, motion = fitted(photo, 12.0, 1.1)
    assert motion is not None and motion.matches >= 100
    assert np.abs(mapped(motion.h) - mapped(about_centre(12.0, 1.1).params)).max() < 0.5
    assert motion.error <= motion.flow_error * lmotion.MATCH_SLACK + 1e-3


def test_a_step_along_the_map_is_its_matrix_power(photo):
    # elementary geometry: half of a roll by theta and zoom by z is a roll by theta / 2 and zoom by sqrt(z)
    _, _, motion = fitted(photo, 12.0, 1.1)
    half = motion.power(0.5)
    assert np.abs(mapped(half) - mapped(about_centre(6.0, np.sqrt(1.1)).params)).max() < 0.5
    assert np.allclose(half @ half, motion.h, atol=1e-9)
    assert np.allclose(motion.power(0.0), np.eye(3)) and np.allclose(motion.power(1.0), motion.h)


def test_the_frame_halfway_is_the_view_halfway(photo):
    a, b, motion = fitted(photo, 12.0, 1.1)
    wa, va, wb, vb = motion.moved(a, b, 0.5)
    truth = view(photo, about_centre(6.0, np.sqrt(1.1)))
    for moved, seen in ((wa, va), (wb, vb)):
        assert ssim(inner(moved), inner(truth)) >= 0.95
        assert inner(seen).min() > 0.99  # the middle of the picture is seen from both captures
    # the dense flow at the working size, scaled up, cannot place fine detail as well
    from geotween.models import pairs as lpairs

    a_s, b_s = lfull.resize(a[None], SMALL, SMALL)[0], lfull.resize(b[None], SMALL, SMALL)[0]
    flows = lfull._scaled(lpairs.pair_flows(a_s, b_s, "dis-fine"), SIDE, SIDE)
    by_flow = lpairs.moved_pair(a, b, 0.5, flows)[0]
    assert ssim(inner(wa), inner(truth)) > ssim(inner(by_flow), inner(truth)) + 0.05


def test_a_picture_whose_halves_move_apart_has_no_global_motion(photo):
    # the left half slides up and the right half down: no one map moves both, the dense flow does
    a = photo
    b = a.copy()
    b[:, :SIDE // 2] = np.roll(a[:, :SIDE // 2], -8, axis=0)
    b[:, SIDE // 2:] = np.roll(a[:, SIDE // 2:], 8, axis=0)
    a_s, b_s = lfull.resize(a[None], SMALL, SMALL)[0], lfull.resize(b[None], SMALL, SMALL)[0]
    assert lmotion.fit(a, b, a_s, b_s, lflow.flow(a_s, b_s, method="dis-fine")) is None


def test_a_map_rewritten_for_another_size_keeps_pixel_centres():
    h = about_centre(10.0, 1.2).params
    small = lmotion.to_size(h, (SIDE, SIDE), (SMALL, SMALL))
    back = lmotion.to_size(small, (SMALL, SMALL), (SIDE, SIDE))
    assert np.allclose(back, h)
    # the picture's centre stays put under a map about the centre, at any size
    c = np.array([(SMALL - 1) / 2, (SMALL - 1) / 2, 1.0])
    p = small @ c
    assert np.allclose(p[:2] / p[2], c[:2])


def test_where_only_the_light_moves_nothing_is_moved():
    # the lamp tile under two lamp directions 15 deg apart: its shading changes, its relief stays put
    from geotween.models.render import render

    a, b = render(90.0, 40.0, SIDE, colour=True), render(105.0, 40.0, SIDE, colour=True)
    a_s, b_s = lfull.resize(a[None], SMALL, SMALL)[0], lfull.resize(b[None], SMALL, SMALL)[0]
    motion = lmotion.fit(a, b, a_s, b_s, lflow.flow(a_s, b_s, method="dis-fine"))
    assert motion is not None and motion.matches == 0 and np.array_equal(motion.h, np.eye(3))
    wa, va, wb, vb = motion.moved(a, b, 0.3)
    assert np.abs(wa - a).max() < 1e-5 and np.abs(wb - b).max() < 1e-5 and va.min() == vb.min() == 1.0
    # a pair that does move is not taken for a still one
    rolled = view(a, about_centre(12.0, 1.0))
    r_s = lfull.resize(rolled[None], SMALL, SMALL)[0]
    moving = lmotion.fit(a, rolled, a_s, r_s, lflow.flow(a_s, r_s, method="dis-fine"))
    assert moving is None or moving.matches > 0
