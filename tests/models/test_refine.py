"""Detail transfer from real images: it falls back to the decoded frame where real images disagree,
and brings texture back where they agree."""
import numpy as np
import pytest
from scipy.ndimage import gaussian_filter

from geotween.models import refine as lrefine
from geotween.models.engine import Endpoint, Engine, ServingConfig
from geotween.models.metrics import psnr, psnr_batch
from geotween.models.render import render

skdata = pytest.importorskip("skimage.data")


def blurred(img, sigma=1.0):
    """A stand-in for a decoder's output: the true frame with its fine detail blurred away."""
    return gaussian_filter(img, (sigma, sigma, 0))


def test_references_equal_to_the_frame_leave_it_unchanged():
    rng = np.random.default_rng(0)
    frame = blurred(rng.random((32, 32, 3)).astype(np.float32), 2.0)
    out, detail = lrefine.refine_frame(frame, np.stack([frame, frame]))
    assert np.allclose(out, frame, atol=2e-3) and detail > 0.9


def test_disagreeing_references_fall_back_to_the_decoded_frame():
    frame = np.full((32, 32, 1), 0.7, np.float32)
    other = np.full((32, 32, 1), 0.1, np.float32)  # a different exposure: no pixel agrees
    out, detail = lrefine.refine_frame(frame, other[None])
    assert np.allclose(out, frame, atol=1e-4) and detail < 1e-3


def test_lamp_scene_a_real_lamp_neighbour_never_makes_a_frame_worse():
    # True renders of the relief tile (Lambert shading, cast shadows) at lamp settings between grid
    # points; references are the renders at the bracketing grid points, 15 deg / 10 deg away, where
    # shadows sit elsewhere: flow cannot explain a moving light, so the step must fall back.
    gains = []
    for az in np.arange(5.0, 360.0, 50.0):
        for el in (27.0, 53.0):
            truth = render(az, el, 32)[..., None]
            a0, e0 = np.floor(az / 15) * 15, 20 + np.floor((el - 20) / 10) * 10
            refs = np.stack([render(a0, e0, 32), render(a0 + 15, e0 + 10, 32)])[..., None]
            out, _ = lrefine.refine_frame(blurred(truth), refs)
            gains.append(psnr(out, truth) - psnr(blurred(truth), truth))
    assert min(gains) > -0.1, np.round(gains, 2)


def photo_view(photo, x, y, side, size=32):
    from PIL import Image

    box = (x, y, x + side, y + side)
    return np.asarray(Image.fromarray(photo).resize((size, size), Image.BILINEAR, box=box), np.float32) / 255.0


def test_textured_scene_gets_its_detail_back_from_neighbouring_views():
    # scikit-image's "coffee" photograph (ships inside the wheel), seen through a window that pans
    photo = skdata.coffee()
    gains = []
    for x in (40.0, 130.0, 220.0, 310.0):
        truth = photo_view(photo, x + 6.0, 60.0, 240.0)
        refs = np.stack([photo_view(photo, x, 60.0, 240.0), photo_view(photo, x + 12.0, 60.0, 240.0)])
        out, detail = lrefine.refine_frame(blurred(truth), refs)
        gains.append(psnr(out, truth) - psnr(blurred(truth), truth))
        assert detail > 0.5
    assert min(gains) > 1.0, np.round(gains, 2)


def test_engine_refinement_on_the_lamp_scene_stays_within_a_small_tolerance(small_engine, small_scene):
    # the trained tiny model's decoded frames against the true renders, refined or not
    on = Engine(small_engine.bundle, ServingConfig(refine=True))
    assert on.refine is not None
    p0, p1 = np.array([0.0, 30.0]), np.array([90.0, 50.0])
    worst = np.inf
    for route in ("geodesic", "straight"):
        ans = on.between(Endpoint(params=dict(lamp_azimuth=0.0, lamp_elevation=30.0)),
                         Endpoint(params=dict(lamp_azimuth=90.0, lamp_elevation=50.0)), frames=6, route=route)
        truth = np.stack([render(*on.space.lerp(p0, p1, f.t), 16)[..., None] for f in ans.frames])
        refined = np.stack([f.image for f in ans.frames])
        decoded = on.decode(ans.codes)
        assert all(f.detail is not None for f in ans.frames)
        worst = min(worst, float(np.min(psnr_batch(refined, truth) - psnr_batch(decoded, truth))))
    assert worst > -0.3, worst


@pytest.mark.parametrize("shape", [(64, 64, 1), (3, 32, 32, 3), (50, 1, 24, 20, 3)])
def test_batch_blur_matches_scipy_gaussian_filter(shape):
    # reference: scipy.ndimage.gaussian_filter, mode "nearest" (edges repeated), over H and W only;
    # 50 RGB frames are 150 planes, more than one OpenCV call takes
    x = np.random.default_rng(3).random(shape, dtype=np.float32)
    sigma = (0,) * (len(shape) - 3) + (1.5, 1.5, 0)
    want = gaussian_filter(x, sigma, mode="nearest")
    got = lrefine.blur(x, 1.5)
    assert got.shape == x.shape and np.abs(got - want).max() < 1e-5


def test_a_batch_refines_as_its_frames_do_one_by_one(photo_views):
    frames, refs = photo_views
    out, detail = lrefine.refine(frames, refs)
    for i in range(len(frames)):
        one, share = lrefine.refine_frame(frames[i], refs[i])
        assert np.abs(one - out[i]).max() < 1e-6 and share == pytest.approx(detail[i], abs=1e-4)  # float32 sums in another order


def coffee_crops(dy: int = 0, dx: int = 0) -> np.ndarray:
    """5 crops, 64 px, of scikit-image's "coffee" photograph (ships inside the scikit-image wheel),
    20 px apart down the picture, shifted by (dy, dx) px."""
    photo = skdata.coffee().astype(np.float32) / 255.0
    return np.stack([photo[100 + dy + 20 * i:164 + dy + 20 * i, 200 + dx:264 + dx] for i in range(5)])


def photo_truth():
    """The unblurred crops behind the photo_views frames."""
    return coffee_crops()


@pytest.fixture(scope="module")
def photo_views():
    # 5 blurred coffee crops, each with two real neighbours shifted by a few pixels
    frames = np.stack([blurred(c) for c in coffee_crops()])
    refs = np.stack([coffee_crops(2, 3), coffee_crops(-2, -2)], axis=1)
    return frames, refs


def test_without_flow_the_references_are_blended_where_they_stand(photo_views, monkeypatch):
    # "none" must equal the flow path fed an all-zero flow (bilinear sampling at whole pixels is the
    # image itself), and must not call the estimator at all
    frames, refs = photo_views
    still, share = lrefine.refine(frames, refs, lrefine.RefineConfig(flow="none"))
    monkeypatch.setattr(lrefine.lflow, "flow", lambda a, b, method="dis": np.zeros(a.shape[:2] + (2,), np.float32))
    zero, zero_share = lrefine.refine(frames, refs, lrefine.RefineConfig(flow="dis"))
    assert np.abs(still - zero).max() < 1e-6 and np.allclose(share, zero_share)
    monkeypatch.setattr(lrefine.lflow, "flow", lambda *a, **k: pytest.fail("flow estimated with flow 'none'"))
    lrefine.refine(frames, refs, lrefine.RefineConfig(flow="none"))


def test_a_moving_view_needs_the_flow_and_a_still_one_does_not(photo_views):
    # the photo crops' references are shifted by 2-3 px: taken where they stand their detail lands
    # in the wrong place, warped it lands where it belongs; references that are the true view
    # itself need no flow, and estimating one only adds its errors
    frames, refs = photo_views
    truth = photo_truth()
    moved = {f: psnr_batch(lrefine.refine(frames, refs, lrefine.RefineConfig(flow=f))[0], truth).mean()
             for f in ("none", "dis")}
    assert moved["dis"] > moved["none"] + 3.0, moved
    still_refs = np.stack([truth, truth], axis=1)
    still = {f: psnr_batch(lrefine.refine(frames, still_refs, lrefine.RefineConfig(flow=f))[0], truth).mean()
             for f in ("none", "dis")}
    assert still["none"] >= still["dis"] and still["none"] > psnr_batch(frames, truth).mean() + 5.0, still


def test_an_unknown_flow_setting_is_refused():
    with pytest.raises(ValueError, match="refine flow: 'optical'.*none"):
        lrefine.RefineConfig(flow="optical")


@pytest.mark.parametrize("dec, ref, on", [
    ({"psnr": 32.0, "ssim": 0.950}, {"psnr": 32.25, "ssim": 0.950}, True),    # PSNR margin, SSIM kept
    ({"psnr": 32.0, "ssim": 0.950}, {"psnr": 32.25, "ssim": 0.949}, False),   # PSNR margin, SSIM lost
    ({"psnr": 32.683, "ssim": 0.9559}, {"psnr": 32.859, "ssim": 0.9601}, True),  # the 64 px demo's held-out
    ({"psnr": 32.0, "ssim": 0.950}, {"psnr": 31.99, "ssim": 0.960}, False),   # SSIM margin, PSNR lost
    ({"psnr": 32.0, "ssim": 0.950}, {"psnr": 32.1, "ssim": 0.952}, False),    # neither margin
])
def test_refine_wins_on_either_margin_without_losing_the_other(dec, ref, on):
    from geotween.models.calibrate import refine_wins

    assert refine_wins(dec, ref) is on
