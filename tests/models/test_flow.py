"""Dense optical flow, warping and the flow-warping baseline, against known motions."""
import numpy as np
import pytest
from scipy import ndimage

from geotween.models import flow as lflow
from geotween.models.metrics import psnr

skdata = pytest.importorskip("skimage.data")


@pytest.fixture(scope="module")
def photo():
    # scikit-image's "coffee" photograph (ships inside the scikit-image wheel), as floats in [0, 1]
    return skdata.coffee().astype(np.float32) / 255.0


def crop(photo, x, y, size=64):
    return photo[y:y + size, x:x + size]


@pytest.mark.parametrize("method", lflow.METHODS)
@pytest.mark.parametrize("dx, dy", [(3, 0), (0, -2), (2, 3), (-4, 1)])
def test_flow_recovers_a_known_translation_within_a_pixel(photo, dx, dy, method):
    # a(x) = P(x + o) and b(x) = P(x + o + s), so a(x) = b(x - s): the true flow is -s everywhere
    a, b = crop(photo, 200, 150), crop(photo, 200 + dx, 150 + dy)
    f = lflow.flow(a, b, method=method)[8:-8, 8:-8]  # away from the edges, where content enters or leaves
    med = np.median(f.reshape(-1, 2), axis=0)
    assert abs(med[0] + dx) < 1.0 and abs(med[1] + dy) < 1.0, med
    # most pixels too; flat patches carry no measurable motion (the aperture problem)
    assert np.mean(np.hypot(f[..., 0] + dx, f[..., 1] + dy) < 1.0) > 0.75


def test_warp_with_a_constant_flow_matches_scipy_shift(photo):
    img = crop(photo, 120, 90)
    f = np.zeros(img.shape[:2] + (2,), dtype=np.float32)
    f[..., 0], f[..., 1] = 1.5, -0.5  # sample at (x + 1.5, y - 0.5)
    got = lflow.warp(img, f)
    # scipy.ndimage.shift moves content by +shift: output(y, x) = input(y - sy, x - sx), order 1 = bilinear
    want = ndimage.shift(img, (0.5, -1.5, 0), order=1, mode="nearest")
    assert np.abs(got - want)[2:-2, 2:-2].max() < 2e-3


def test_warp_with_zero_flow_is_the_identity(photo):
    img = crop(photo, 10, 10)
    assert np.array_equal(lflow.warp(img, np.zeros(img.shape[:2] + (2,), np.float32)), img)


def test_warping_b_by_the_flow_reproduces_a(photo):
    a, b = crop(photo, 300, 200), crop(photo, 303, 198)
    assert psnr(lflow.warp(b, lflow.flow(a, b))[4:-4, 4:-4], a[4:-4, 4:-4]) > psnr(b, a) + 8.0


def test_tween_lands_between_the_ends_and_beats_a_cross_dissolve(photo):
    # the most textured corner of the photo (largest mean Sobel gradient over 64 px crops)
    a, b = crop(photo, 320, 240), crop(photo, 326, 240)
    mid = lflow.tween(a, b, [0.5])[0]
    truth = crop(photo, 323, 240)
    inner = (slice(6, -6), slice(6, -6))
    assert psnr(mid[inner], truth[inner]) > psnr(((a + b) / 2)[inner], truth[inner]) + 5.0
    ends = lflow.tween(a, b, [0.0, 1.0])
    assert np.allclose(ends[0], a, atol=1e-6) and np.allclose(ends[1], b, atol=1e-6)


def test_grayscale_frames_keep_their_shape():
    rng = np.random.default_rng(0)
    a = ndimage.gaussian_filter(rng.random((32, 32, 1)).astype(np.float32), (1.5, 1.5, 0))
    out = lflow.tween(a, a, [0.25, 0.75])
    assert out.shape == (2, 32, 32, 1) and np.allclose(out, a, atol=2e-3)


def test_every_flow_gets_its_own_dis_estimator(photo):
    # an OpenCV DIS object shared by two threads corrupts memory, and one reused carries state from
    # earlier pictures: every flow makes its own, and the answers do not depend on the thread
    from concurrent.futures import ThreadPoolExecutor

    pairs = [(crop(photo, 100 + 9 * i, 120), crop(photo, 102 + 9 * i, 121)) for i in range(12)]
    alone = [lflow.flow(a, b, method="dis") for a, b in pairs]
    with ThreadPoolExecutor(2) as pool:
        together = list(pool.map(lambda p: lflow.flow(*p, method="dis"), pairs * 4))
    assert all(np.array_equal(x, y) for x, y in zip(alone * 4, together))
    assert lflow._dis() is not lflow._dis()


def test_an_unknown_flow_method_is_refused(photo):
    with pytest.raises(ValueError, match="flow method"):
        lflow.flow(crop(photo, 0, 0), crop(photo, 1, 0), method="nearest")


def test_a_flow_does_not_depend_on_the_flows_before_it():
    # the same pair gives the same flow whatever was estimated before, at other sizes included
    rng = np.random.default_rng(3)
    a = rng.random((64, 64, 3)).astype(np.float32)
    b = np.roll(a, 2, axis=1)
    first = lflow.flow(a, b, method="dis-fine")
    for size in (16, 32, 128, 64):
        x = rng.random((size, size, 3)).astype(np.float32)
        lflow.flow(x, x[::-1].copy(), method="dis-fine")
    assert np.array_equal(lflow.flow(a, b, method="dis-fine"), first)
