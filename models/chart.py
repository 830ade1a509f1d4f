"""Local affine charts: the code at a settings point, fitted by weighted least squares over the
bank samples around it, for many points at once.

For one point, with neighbours j at settings offsets x_j (P,) from it, codes z_j (d,) and weights
w_j, the chart is the affine map z(x) = c + B x minimising sum_j w_j ||c + B x_j - z_j||^2; its value
at the point itself is c. A stack of such fits is one batched SVD (numpy), instead of a Python
loop of per-point solves.
"""
from __future__ import annotations

from typing import Callable

import numpy as np
from scipy.spatial import cKDTree

from .params import ParamSpace
from .triplets import normalised_coords

EXACT = 1e-9  # spacing units: a settings point this close to a sample takes its code as it is


def local_affine(offsets: np.ndarray, values: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Intercepts of weighted affine fits, one per row.

    offsets (N, k, P), values (N, k, d), weights (N, k) > 0 -> ((N, d) the fits' values at offset
    0, (N,) True where the fit is determined: the k offsets span all P directions, with the rank
    rule of numpy.linalg.matrix_rank). Undetermined rows hold the minimum-norm solution's
    intercept; callers should not use them."""
    x = np.asarray(offsets, dtype=np.float64)
    z = np.asarray(values, dtype=np.float64)
    w = np.asarray(weights, dtype=np.float64)
    if x.ndim != 3 or z.ndim != 3 or w.shape != x.shape[:2] or z.shape[:2] != x.shape[:2]:
        raise ValueError(f"offsets, values, weights: shapes {x.shape}, {z.shape}, {w.shape} not allowed; "
                         "expected (N, k, P), (N, k, d), (N, k)")
    if not (np.all(np.isfinite(w)) and np.all(w > 0)):
        raise ValueError("weights: every weight must be finite and > 0")
    root = np.sqrt(w)[..., None]
    design = np.concatenate([np.ones(x.shape[:2] + (1,)), x], axis=2) * root  # (N, k, P + 1)
    u, s, vt = np.linalg.svd(design, full_matrices=False)  # s (N, P + 1), descending
    tol = s[:, :1] * max(design.shape[1:]) * np.finfo(np.float64).eps
    determined = np.all(s > tol, axis=1)
    inv = np.where(s > tol, 1.0 / np.where(s > tol, s, 1.0), 0.0)
    # coef = V diag(1/s) U^T (z * root); only its first row (the intercept) is needed
    rhs = np.einsum("nki,nkd->nid", u, z * root) * inv[..., None]  # (N, P + 1, d)
    intercept = np.einsum("ni,nid->nd", vt[:, :, 0], rhs)
    return intercept, determined


class SettingsChart:
    """Settings (N, P) -> codes (N, d): at each point, the weighted affine fit over the `neighbours`
    bank samples nearest in settings (weights 1 / (distance + 0.25)^2, distances in sample
    spacings), evaluated at the point; a sample's own settings give its own code. Where the
    neighbours do not span every setting (all on a line), `fallback` (the settings-to-code head)
    answers instead."""

    def __init__(self, params: np.ndarray, codes: np.ndarray, space: ParamSpace, scale: np.ndarray, *,
                 neighbours: int = 6, fallback: Callable[[np.ndarray], np.ndarray]):
        self.params, self.codes = np.asarray(params, dtype=np.float64), np.asarray(codes, dtype=np.float64)
        self.space, self.scale, self.fallback = space, np.asarray(scale, dtype=np.float64), fallback
        self.neighbours = min(int(neighbours), len(self.codes))
        u, self.box = normalised_coords(self.params, space, self.scale)
        self.tree = cKDTree(u, boxsize=self.box)

    def __call__(self, settings: np.ndarray) -> np.ndarray:
        p = np.atleast_2d(np.asarray(settings, dtype=np.float64))
        u = np.mod((self.space.wrap(p) - self.space.lo) / self.scale, self.box)
        dist, idx = self.tree.query(u, k=self.neighbours)
        dist, idx = dist.reshape(len(p), -1), idx.reshape(len(p), -1)
        offsets = self.space.delta(p[:, None, :], self.params[idx]) / self.scale  # (N, k, P) spacing units
        out, determined = local_affine(offsets, self.codes[idx], 1.0 / (dist + 0.25) ** 2)
        exact = dist[:, 0] < EXACT
        out[exact] = self.codes[idx[exact, 0]]
        lost = ~determined & ~exact
        if np.any(lost):
            out[lost] = self.fallback(p[lost])
        return out
