"""Image similarity: PSNR, SSIM and RMSE between frames and their true views.

Images are float arrays with values in [0, data_range] (default [0, 1]). A single image has shape
(H, W) (grayscale) or (H, W, C); a batch has shape (N, H, W) or (N, H, W, C). Every batch function
returns one value per image, shape (N,). Pure numpy / scipy.

SSIM follows Wang et al. 2004 (Gaussian window, sigma 1.5 pixels, K1 = 0.01, K2 = 0.03, population
covariance) and averages the SSIM map exactly as scikit-image's ``structural_similarity`` with
``gaussian_weights=True, use_sample_covariance=False``: a border of (win_size - 1) // 2 pixels is left
out, then channels are averaged.
"""
from __future__ import annotations

import numpy as np
from scipy.ndimage import gaussian_filter

__all__ = ["psnr", "psnr_batch", "rmse_batch", "ssim", "ssim_batch"]


def _pair(a, b, *, batch: bool) -> tuple[np.ndarray, np.ndarray]:
    """Both inputs as float64 arrays of shape (N, H, W, C)."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"images a and b must have the same shape, got {a.shape} and {b.shape}")
    allowed = (3, 4) if batch else (2, 3)
    if a.ndim not in allowed:
        layout = "(N, H, W) or (N, H, W, C)" if batch else "(H, W) or (H, W, C)"
        raise ValueError(f"images must have shape {layout}, got shape {a.shape}")
    if not batch:
        a, b = a[None], b[None]
    if a.ndim == 3:
        a, b = a[..., None], b[..., None]
    if a.size == 0:
        raise ValueError(f"images must not be empty, got shape {a.shape}")
    return a, b


def _check_range(data_range: float) -> float:
    data_range = float(data_range)
    if not np.isfinite(data_range) or data_range <= 0:
        raise ValueError(f"data_range must be a finite number > 0, got {data_range!r}")
    return data_range


def _mse(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.mean((a - b) ** 2, axis=(1, 2, 3))  # (N,)


def rmse_batch(a, b) -> np.ndarray:
    """Root mean squared error per image, in the images' own units; shape (N,)."""
    a, b = _pair(a, b, batch=True)
    return np.sqrt(_mse(a, b))


def psnr_batch(a, b, data_range: float = 1.0) -> np.ndarray:
    """Peak signal-to-noise ratio per image, in dB; shape (N,).

    Identical images have zero error and give ``inf``; callers that average or store PSNR cap it.
    """
    data_range = _check_range(data_range)
    a, b = _pair(a, b, batch=True)
    mse = _mse(a, b)
    with np.errstate(divide="ignore"):  # mse == 0 is the documented inf, not a fault
        return 10.0 * np.log10(data_range ** 2 / mse)


def psnr(a, b, data_range: float = 1.0) -> float:
    """PSNR of one image pair in dB; ``inf`` for identical images (see ``psnr_batch``)."""
    a, b = _pair(a, b, batch=False)
    return float(psnr_batch(a, b, data_range=data_range)[0])


def ssim_batch(a, b, data_range: float = 1.0, *, sigma: float = 1.5, truncate: float = 3.5,
               k1: float = 0.01, k2: float = 0.03) -> np.ndarray:
    """Mean SSIM per image (channels averaged), unitless in [-1, 1]; shape (N,).

    sigma is the Gaussian window's standard deviation in pixels, truncated at ``truncate`` sigmas
    (3.5 gives the 11-tap window of Wang et al. 2004).
    """
    data_range = _check_range(data_range)
    if not (np.isfinite(sigma) and sigma > 0):
        raise ValueError(f"sigma must be a finite number > 0 (pixels), got {sigma!r}")
    if not (np.isfinite(truncate) and truncate > 0):
        raise ValueError(f"truncate must be a finite number > 0 (sigmas), got {truncate!r}")
    for name, k in (("k1", k1), ("k2", k2)):
        if not (np.isfinite(k) and k > 0):
            raise ValueError(f"{name} must be a finite number > 0, got {k!r}")
    a, b = _pair(a, b, batch=True)
    win_size = 2 * int(truncate * sigma + 0.5) + 1  # same radius rule as scipy.ndimage
    height, width = a.shape[1:3]
    if min(height, width) < win_size:
        raise ValueError(f"images must be at least {win_size}x{win_size} pixels for sigma={sigma:g}, "
                         f"got {height}x{width}")

    # sigma 0 on the batch and channel axes: each image and channel is filtered on its own,
    # as scikit-image does channel by channel, but in one call.
    sigmas = (0.0, sigma, sigma, 0.0)

    def blur(x: np.ndarray) -> np.ndarray:
        return gaussian_filter(x, sigma=sigmas, truncate=truncate, mode="reflect")

    ux, uy = blur(a), blur(b)  # (N, H, W, C)
    vx = blur(a * a) - ux * ux
    vy = blur(b * b) - uy * uy
    vxy = blur(a * b) - ux * uy
    c1 = (k1 * data_range) ** 2
    c2 = (k2 * data_range) ** 2
    s = ((2 * ux * uy + c1) * (2 * vxy + c2)) / ((ux ** 2 + uy ** 2 + c1) * (vx + vy + c2))
    pad = (win_size - 1) // 2  # the border where the window hangs over the edge is left out
    s = s[:, pad:height - pad, pad:width - pad, :]
    return s.mean(axis=(1, 2)).mean(axis=1)


def ssim(a, b, data_range: float = 1.0, *, sigma: float = 1.5, truncate: float = 3.5,
         k1: float = 0.01, k2: float = 0.03) -> float:
    """Mean SSIM of one image pair (see ``ssim_batch``)."""
    a, b = _pair(a, b, batch=False)
    return float(ssim_batch(a, b, data_range, sigma=sigma, truncate=truncate, k1=k1, k2=k2)[0])
