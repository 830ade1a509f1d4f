"""Training losses. Codes are (B, d) tensors; all losses return scalars."""
from __future__ import annotations

import torch
import torch.nn.functional as F


def reconstruction(x_hat: torch.Tensor, x: torch.Tensor, *, l1_weight: float = 0.1) -> torch.Tensor:
    """Mean squared error plus a little L1, which sharpens edges (shadow boundaries) early on."""
    return F.mse_loss(x_hat, x) + l1_weight * F.l1_loss(x_hat, x)


def collinearity(z_s: torch.Tensor, z_m: torch.Tensor, z_t: torch.Tensor, a: torch.Tensor,
                 eps: float = 1e-3) -> torch.Tensor:
    """||z_m - ((1-a) z_s + a z_t)||^2 / (||z_s - z_t||^2 + eps), averaged over triplets.

    Dividing by the outer distance makes the term scale-free: shrinking the latent cannot cheat it.
    """
    a = a[:, None]
    off = z_m - ((1.0 - a) * z_s + a * z_t)
    return (off.pow(2).sum(-1) / (((z_s - z_t).pow(2).sum(-1)) + eps)).mean()


def isometry(z_a: torch.Tensor, z_b: torch.Tensor, settings_distance: torch.Tensor,
             eps: float = 1e-6) -> torch.Tensor:
    """Mean squared log-ratio of code distance to settings distance (in sample-spacing units).

    Pulls one spacing step of every axis to the same code length (about 1), which removes the
    anisotropy that turns graph routes into staircases, and fixes the latent's scale.
    """
    code = (z_a - z_b).pow(2).sum(-1).add(eps).sqrt()
    return (torch.log(code) - torch.log(settings_distance)).pow(2).mean()


def _gaussian_taps(sigma: float = 1.5, truncate: float = 3.5) -> torch.Tensor:
    r = int(truncate * sigma + 0.5)
    x = torch.arange(-r, r + 1, dtype=torch.float32)
    g = torch.exp(-0.5 * (x / sigma) ** 2)
    return g / g.sum()


def ssim(x_hat: torch.Tensor, x: torch.Tensor, *, k1: float = 0.01, k2: float = 0.03) -> torch.Tensor:
    """Mean SSIM of (B, C, H, W) images in [0, 1]: Gaussian window (sigma 1.5, 11 taps), population
    statistics, computed only where the window fits, as `models.metrics.ssim` and scikit-image's
    structural_similarity(gaussian_weights=True, use_sample_covariance=False) do."""
    c = x.shape[1]
    g = _gaussian_taps().to(x)
    gx = g.view(1, 1, 1, -1).repeat(c, 1, 1, 1)
    gy = g.view(1, 1, -1, 1).repeat(c, 1, 1, 1)

    def blur(v: torch.Tensor) -> torch.Tensor:
        return F.conv2d(F.conv2d(v, gx, groups=c), gy, groups=c)

    mu_a, mu_b = blur(x_hat), blur(x)
    var_a = blur(x_hat * x_hat) - mu_a ** 2
    var_b = blur(x * x) - mu_b ** 2
    cov = blur(x_hat * x) - mu_a * mu_b
    c1, c2 = k1 ** 2, k2 ** 2
    s = ((2 * mu_a * mu_b + c1) * (2 * cov + c2)) / ((mu_a ** 2 + mu_b ** 2 + c1) * (var_a + var_b + c2))
    return s.mean()
