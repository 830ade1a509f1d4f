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
