import numpy as np
import pytest
from skimage import data
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from geotween.models.metrics import psnr, psnr_batch, rmse_batch, ssim, ssim_batch

# Wang et al. 2004 settings, as scikit-image names them.
WANG = dict(gaussian_weights=True, sigma=1.5, use_sample_covariance=False, K1=0.01, K2=0.03)


def _shrink(img: np.ndarray, factor: int) -> np.ndarray:
    """Block-average downscale of a scikit-image sample image to [0, 1] floats."""
    h, w = img.shape[0] // factor, img.shape[1] // factor
    blocks = img[:h * factor, :w * factor].reshape(h, factor, w, factor, *img.shape[2:])
    return blocks.mean(axis=(1, 3)) / 255.0


@pytest.fixture(scope="module")
def gray_pairs():
    # skimage.data.camera() (512x512 uint8) shrunk to 64x64, with noise of three strengths.
    rng = np.random.default_rng(0)
    clean = _shrink(data.camera(), 8)
    noisy = [np.clip(clean + rng.normal(0, s, clean.shape), 0, 1) for s in (0.02, 0.08, 0.2)]
    return np.stack([clean] * 3), np.stack(noisy)


@pytest.fixture(scope="module")
def rgb_pairs():
    # skimage.data.astronaut() (512x512x3 uint8) shrunk to 64x64x3; one noisy, one blurred-by-shift.
    rng = np.random.default_rng(1)
    clean = _shrink(data.astronaut(), 8)
    noisy = np.clip(clean + rng.normal(0, 0.05, clean.shape), 0, 1)
    shifted = np.roll(clean, 2, axis=1)
    return np.stack([clean, clean]), np.stack([noisy, shifted])


def test_psnr_of_constant_offset_is_20_db():
    # Worked example: an offset of 0.1 everywhere gives MSE 0.01, PSNR = 20 log10(1 / 0.1) = 20 dB.
    img = np.full((16, 16), 0.3)
    assert psnr(img, img + 0.1) == pytest.approx(20.0, abs=1e-9)
    assert rmse_batch(img[None], img[None] + 0.1)[0] == pytest.approx(0.1, abs=1e-12)


def test_psnr_matches_scikit_image(gray_pairs, rgb_pairs):
    # Reference: skimage.metrics.peak_signal_noise_ratio.
    for clean, noisy in (gray_pairs, rgb_pairs):
        ours = psnr_batch(clean, noisy)
        ref = [peak_signal_noise_ratio(c, n, data_range=1.0) for c, n in zip(clean, noisy)]
        np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-9)
        assert psnr(clean[0], noisy[0]) == pytest.approx(ref[0], abs=1e-9)


def test_psnr_of_identical_images_is_inf(gray_pairs):
    clean = gray_pairs[0][0]
    assert psnr(clean, clean) == np.inf
    assert np.all(np.isinf(psnr_batch(gray_pairs[0], gray_pairs[0])))


def test_ssim_gray_matches_scikit_image(gray_pairs):
    # Reference: skimage.metrics.structural_similarity with the Wang et al. 2004 settings.
    clean, noisy = gray_pairs
    ref = [structural_similarity(c, n, data_range=1.0, **WANG) for c, n in zip(clean, noisy)]
    np.testing.assert_allclose(ssim_batch(clean, noisy), ref, rtol=0, atol=1e-6)
    for c, n, r in zip(clean, noisy, ref):
        assert ssim(c, n) == pytest.approx(r, abs=1e-6)
    assert ref[0] > ref[1] > ref[2]  # the three noise levels really differ, so the check has bite


def test_ssim_rgb_matches_scikit_image(rgb_pairs):
    # Reference: skimage.metrics.structural_similarity, channels on the last axis, averaged.
    clean, other = rgb_pairs
    ref = [structural_similarity(c, o, data_range=1.0, channel_axis=-1, **WANG) for c, o in zip(clean, other)]
    np.testing.assert_allclose(ssim_batch(clean, other), ref, rtol=0, atol=1e-6)
    assert ssim(clean[1], other[1]) == pytest.approx(ref[1], abs=1e-6)


def test_ssim_other_data_range_matches_scikit_image(gray_pairs):
    # Reference: skimage.metrics.structural_similarity on 0..255 values with data_range=255.
    clean, noisy = gray_pairs[0][1] * 255, gray_pairs[1][1] * 255
    ref = structural_similarity(clean, noisy, data_range=255.0, **WANG)
    assert ssim(clean, noisy, data_range=255.0) == pytest.approx(ref, abs=1e-6)


def test_ssim_non_square_matches_scikit_image(gray_pairs):
    # Reference: skimage.metrics.structural_similarity; a 40x64 crop catches swapped-axis cropping.
    clean, noisy = gray_pairs[0][2][:40], gray_pairs[1][2][:40]
    ref = structural_similarity(clean, noisy, data_range=1.0, **WANG)
    assert ssim(clean, noisy) == pytest.approx(ref, abs=1e-6)


def test_batch_equals_per_image(gray_pairs):
    clean, noisy = gray_pairs
    np.testing.assert_allclose(ssim_batch(clean, noisy), [ssim(c, n) for c, n in zip(clean, noisy)], atol=1e-12)
    np.testing.assert_allclose(psnr_batch(clean, noisy), [psnr(c, n) for c, n in zip(clean, noisy)], atol=1e-12)


def test_identical_images_have_ssim_one(rgb_pairs):
    # From the formula: x == y gives (2 mu^2 + C1)(2 var + C2) / ((2 mu^2 + C1)(2 var + C2)) = 1.
    assert ssim(rgb_pairs[0][0], rgb_pairs[0][0]) == pytest.approx(1.0, abs=1e-12)


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="same shape"):
        ssim(np.zeros((16, 16)), np.zeros((16, 17)))
    with pytest.raises(ValueError, match="at least 11x11"):
        ssim(np.zeros((10, 16)), np.zeros((10, 16)))
    with pytest.raises(ValueError, match="data_range"):
        psnr(np.zeros((4, 4)), np.ones((4, 4)), data_range=0)
    with pytest.raises(ValueError, match=r"\(N, H, W\)"):
        psnr_batch(np.zeros((4, 4)), np.zeros((4, 4)))
