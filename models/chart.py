"""Local affine charts: the code at a settings point, fitted by weighted least squares over the
bank samples around it, for many points at once.

For one point, with neighbours j at settings offsets x_j (P,) from it, codes z_j (d,) and weights
w_j, the chart is the affine map z(x) = c + B x minimising sum_j w_j ||c + B x_j - z_j||^2; its value
at the point itself is c. A stack of such fits is one batched SVD (numpy), instead of a Python
loop of per-point solves.
"""
from __future__ import annotations

from functools import cached_property
from typing import Callable

import numpy as np
from scipy.spatial import cKDTree

from .params import ParamSpace
from .triplets import normalised_coords

EXACT = 1e-9  # spacing units: a settings point this close to a sample takes its code as it is
INVERSE_REACH = 2.0  # spacings: a code read back farther than this from its nearest sample is off the bank


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

    def settings_of(self, codes: np.ndarray, fallback: Callable[[np.ndarray], np.ndarray], *,
                    reach: float = INVERSE_REACH) -> np.ndarray:
        """Codes (N, d) -> settings (N, P), the chart run backwards: over the `neighbours` bank codes
        nearest to each code, the weighted affine fit z(x) = c + B x of their codes on their settings
        (offsets x from the nearest sample's, in spacings; weights 1 / (code distance + a tenth of
        the nearest's)^2), solved for the x whose chart value lies nearest the code. A code at a
        sample's own gives its settings exactly. `fallback` (the code-to-settings head) answers
        where the fit is undetermined or its answer lies more than `reach` spacings from the nearest
        sample (the code is far from the bank)."""
        z = np.atleast_2d(np.asarray(codes, dtype=np.float64))
        dist, idx = self.code_tree.query(z, k=self.neighbours)
        dist, idx = dist.reshape(len(z), -1), idx.reshape(len(z), -1)
        out = np.empty((len(z), self.params.shape[1]))
        lost = np.zeros(len(z), dtype=bool)
        for n in range(len(z)):
            base = self.params[idx[n, 0]]
            if dist[n, 0] <= 1e-5 * dist[n, -1]:  # the code of a sample (to float rounding of a re-encode)
                out[n] = base
                continue
            x = self.space.delta(base, self.params[idx[n]]) / self.scale              # (k, P)
            root = 1.0 / (dist[n] + 0.1 * dist[n, 0])                                  # sqrt of the weights
            design = np.hstack([np.ones((len(x), 1)), x]) * root[:, None]
            coef, _, rank, _ = np.linalg.lstsq(design, self.codes[idx[n]] * root[:, None], rcond=None)
            if rank < design.shape[1]:
                lost[n] = True
                continue
            step, _, rank, _ = np.linalg.lstsq(coef[1:].T, z[n] - coef[0], rcond=None)
            lost[n] = rank < len(step) or not np.linalg.norm(step) <= reach
            # periodic settings wrap; the others stay in their range (a code at the edge of the bank
            # reads back a hair outside it)
            out[n] = np.clip(self.space.wrap(base + step * self.scale), self.space.lo,
                             np.where(self.space.periodic, np.inf, self.space.hi))
        if np.any(lost):
            out[lost] = fallback(z[lost])
        return out

    @cached_property
    def code_tree(self) -> cKDTree:
        """A kd-tree of the bank codes (for reading settings back from codes), built on first use."""
        return cKDTree(self.codes)
