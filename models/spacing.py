"""The settings spacing of a scene: the unit every distance between settings is measured in.

On a grid the spacing of an axis is its grid step (`ParamSpace.spacing`): a capture's grid
neighbours lie one spacing away along every axis. Scattered samples carry no such step, and
span / N^(1/P) per axis says nothing about how far apart two captures look: on the turntable from
scattered settings (yaw over 360 deg, camera height over 50 deg) it made one spacing 24 deg of yaw
but 3.4 deg of height, so frames were made from captures 17 deg of yaw apart where 8 deg pairs
existed (SSIM 0.76 at the true settings, against 0.85 with the balanced spacing below).

`balanced_spacing` keeps the grid steps and rebalances two or more scattered axes so that one spacing
along each changes the images alike, keeping the volume of a spacing cell (so a cell still holds
about one sample). How fast the images change along each axis is fitted on near capture pairs:
    r_ij^2 ~ sum_k g_k d_k^2        (non-negative least squares over the pairs)
with r_ij the RMS difference of the two captures (blurred over BLUR px, so that small moves of
texture count in proportion) and d_k their settings difference along axis k; the spacing of axis k
goes as 1 / sqrt(g_k). The near pairs depend on the spacing, so the fit is repeated with the pairs
of the new spacing until it settles (a neighbourhood stretched along one axis reaches further
along it, where the differences saturate and look slower than they are; the repeat undoes that).
Measured (64 px): the turntable from scattered settings settles at 9.4 deg of yaw against 8.6 of
height (ratio 1.10; its grid, fitted the same way, gives 1.35 against the grid's own 1.5); the
scattered camera move at 39.5 against its grid's 51.
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import nnls
from scipy.spatial import cKDTree

from .params import ParamSpace
from .refine import blur
from .triplets import normalised_coords

BLUR = 1.0      # px, of the captures before they are compared
ROUNDS = 20     # fits at most; it settles in about ten
SETTLED = 0.005  # relative change of every scattered axis' spacing at which it has settled
CHUNK = 256     # capture pairs compared at once
STRETCH = 4.0   # an axis' spacing stays within a factor of this of span / N^(1/P): one the images
#                 hardly change along is not allowed to swallow the whole range


def balanced_spacing(space: ParamSpace, params: np.ndarray, images: np.ndarray) -> np.ndarray:
    """(P,) spacing per axis: `ParamSpace.spacing`, with two or more scattered axes rebalanced by
    how fast `images` (N, H, W, C) change along each (see the module's note)."""
    params = np.asarray(params, dtype=np.float64)
    scale = space.spacing(params)
    loose = ~space.gridlike(params)
    if loose.sum() < 2 or len(params) < 4:
        return scale
    soft = blur(np.asarray(images, dtype=np.float32), BLUR)
    n, k = len(params), 2 * len(space)
    plain = np.log(scale[loose])
    for _ in range(ROUNDS):
        u, box = normalised_coords(params, space, scale)
        _, idx = cKDTree(u, boxsize=box).query(u, k=min(k + 1, n))
        i, j = np.repeat(np.arange(n), idx.shape[1] - 1), idx[:, 1:].ravel()
        d = space.delta(params[i], params[j])[:, loose]
        # a few hundred pairs at a time: all at once held a difference image per pair (3.9 GB for 5000
        # captures at 128 px)
        r2 = np.concatenate([np.mean(np.square(soft[i[lo:lo + CHUNK]] - soft[j[lo:lo + CHUNK]]), axis=(1, 2, 3))
                             for lo in range(0, len(i), CHUNK)])
        g, _ = nnls(np.square(d), r2)
        if not np.any(g > 0):  # the images do not change at all: nothing to balance
            return scale
        new = -0.5 * np.log(np.maximum(g, g.max() * 1e-12))  # log spacings, shifted to keep the cell's volume
        new = np.exp(plain + np.clip(new - new.mean() + plain.mean() - plain, -np.log(STRETCH), np.log(STRETCH)))
        done = np.all(np.abs(new / scale[loose] - 1.0) < SETTLED)
        scale = scale.copy()
        scale[loose] = new
        if done:
            break
    return scale
