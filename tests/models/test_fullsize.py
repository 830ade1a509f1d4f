"""Frames at the captures' own size (models.fullsize): a frame between two shifted crops of a real
photograph comes out at full size equal to the true crop; resampling against scikit-image's."""
from types import SimpleNamespace

import numpy as np
import pytest
from PIL import Image

from geotween.models import fullsize as lfull
from geotween.models import pairs as lpairs
from geotween.models.bundle import Bundle
from geotween.models.params import Parameter, ParamSpace

skdata = pytest.importorskip("skimage.data")
skmetrics = pytest.importorskip("skimage.metrics")
sktransform = pytest.importorskip("skimage.transform")

FULL, SMALL, STEP = 256, 64, 24  # px: full-size side, working side, shift between captures (full-size px)


def ssim(a, b):
    # scikit-image's structural_similarity, Gaussian window of Wang et al. 2004 (sigma 1.5)
    return skmetrics.structural_similarity(a, b, channel_axis=2, data_range=1.0, gaussian_weights=True, sigma=1.5,
                                           use_sample_covariance=False)


@pytest.fixture(scope="module")
def photo():
    # scikit-image's "astronaut" photograph, which ships inside the scikit-image wheel
    return skdata.astronaut()


def crop(photo, x: float, side: int) -> np.ndarray:
    """The FULL x FULL window of the photo at (120 + x, 60), resampled to side px (Lanczos)."""
    box = (120 + x, 60, 120 + x + FULL, 60 + FULL)
    return np.asarray(Image.fromarray(photo).resize((side, side), Image.Resampling.LANCZOS, box=box),
                      dtype=np.float32) / 255.0


def two_capture_engine(photo):
    """An engine stand-in with two captures STEP px apart along one setting (pan, in pixels)."""
    space = ParamSpace([Parameter(name="pan", min=0.0, max=2.0 * STEP)])
    params = np.array([[0.0], [float(STEP)]])
    full = np.stack([np.round(crop(photo, x, FULL) * 255).astype(np.uint8) for x in (0, STEP)])
    small = np.stack([crop(photo, x, SMALL) for x in (0, STEP)])
    arrays = {"codes": np.zeros((2, 2)), "params": params, "full_images": full,
              "holdout_full_images": full[:0]}
    bundle = Bundle(manifest=None, model=None, arrays=arrays)
    scale = np.array([float(STEP)])
    u = params / scale
    big = full.astype(np.float32) / 255.0
    return SimpleNamespace(bundle=bundle, space=space, scale=scale, refine=None, flow_cache=lpairs.FlowCache(),
                           bracketer=lpairs.Bracketer(u, np.array([100.0])), full_pixels=(full, full[:0]),
                           captures=lambda idx, full=False: (big if full else small)[np.asarray(idx)])


def test_a_frame_between_two_shifted_crops_comes_out_at_full_size_as_the_true_crop(photo):
    engine = two_capture_engine(photo)
    served = crop(photo, STEP / 2, SMALL)[None]  # the frame at working size, as served (here: its truth)
    got = lfull.enlarge(engine, served, np.array([[STEP / 2]]), FULL)[0]
    truth = crop(photo, STEP / 2, FULL)
    plain = lfull.resize(served, FULL, FULL)[0]  # the served frame only enlarged (bicubic)
    assert got.shape == (FULL, FULL, 3)
    assert ssim(got, truth) >= 0.95, ssim(got, truth)
    assert ssim(got, truth) > ssim(plain, truth) + 0.1  # the detail comes from the captures
    # at a size between the working and the full one, the frame is the true crop at that size
    half = lfull.enlarge(engine, served, np.array([[STEP / 2]]), FULL // 2)[0]
    assert half.shape == (FULL // 2, FULL // 2, 3) and ssim(half, crop(photo, STEP / 2, FULL // 2)) >= 0.95
    # at a capture's own settings the full-size frame is that capture
    at_capture = lfull.enlarge(engine, crop(photo, 0, SMALL)[None], np.array([[0.0]]), FULL)[0]
    assert ssim(at_capture, crop(photo, 0, FULL)) > 0.97
    # where the captures disagree with the served frame, the served frame (enlarged) is kept: a white
    # frame over the photograph, looked at where the photograph is far from white (3 AGREE away)
    white = np.ones((1, SMALL, SMALL, 3), np.float32)
    kept = lfull.enlarge(engine, white, np.array([[STEP / 2]]), FULL)[0]
    far = (1.0 - crop(photo, STEP / 2, SMALL)).mean(axis=-1) > 3 * lfull.AGREE
    far = lfull.resize(far[None, ..., None].astype(np.float32), FULL, FULL)[0, ..., 0] > 0.99
    assert far.mean() > 0.05
    assert np.abs(kept[far] - 1.0).mean() < 0.02


def test_resampling_matches_scikit_image(photo):
    img = crop(photo, 0, FULL)[None]
    down = lfull.resize(img, SMALL, SMALL)[0]
    # scikit-image's resize with anti-aliasing is the reference for shrinking (area averaging here)
    ref = sktransform.resize(img[0], (SMALL, SMALL), order=1, anti_aliasing=True)
    assert np.abs(down - ref).mean() < 0.02
    up = lfull.resize(down[None], FULL, FULL)[0]
    ref_up = sktransform.resize(down, (FULL, FULL), order=3)  # bicubic, scikit-image's spline of order 3
    assert np.abs(up - ref_up).mean() < 0.01


def test_sizes_are_checked_against_the_captures():
    assert lfull.long_side("working", 64, (512, 384)) == 64
    assert lfull.long_side("full", 64, (512, 384)) == 512
    assert lfull.long_side("full", 64, None) == 64
    assert lfull.long_side(300, 64, (512, 384)) == 300
    for bad in (4, 513, True, "huge", 2.5):
        with pytest.raises(ValueError, match="size"):
            lfull.long_side(bad, 64, (512, 384))
