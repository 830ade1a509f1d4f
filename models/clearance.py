"""How far points lie from the bank, in the bank's own local sample spacing.

A route is faithful where every point of it lies between real samples: near some bank code,
measured against how densely the bank is sampled *there*. One global radius cannot say that: a
bank sampled 15 deg apart on one setting and 10 deg on another, or scattered, has spacings that
vary from place to place. The clearance of a point is min over nearby bank codes i of
||p - z_i|| / s_i, where s_i, the local spacing at z_i, is the distance from z_i to its
(2m)-th nearest other bank code (m = the number of settings: on a grid that reaches the
neighbours along every setting, so s_i is the coarser of the grid steps around z_i).

Points are (K, d): codes in the graph's metric (warped codes, `LatentGraph.warp`), or settings in
sample-spacing units (`triplets.normalised_coords`, with its box for periodic settings), as the
route planner uses it.
"""
from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

_TINY = 1e-12


class Clearance:
    """Clearance of points from the bank codes `bank` (N, d), in local spacings.

    dims: the number of settings (the manifold's dimension), which sets whose distance is the
    local spacing; candidates: how many nearest bank codes each point is measured against (the
    nearest in code distance need not be the nearest in spacings where the spacing varies)."""

    def __init__(self, bank: np.ndarray, *, dims: int = 1, tree: cKDTree | None = None, candidates: int = 4,
                 box: np.ndarray | None = None):
        bank = np.asarray(bank, dtype=np.float64)
        if bank.ndim != 2 or len(bank) < 2:
            raise ValueError(f"bank: shape {bank.shape} not allowed; expected (N, d) with N >= 2")
        if isinstance(dims, bool) or not isinstance(dims, (int, np.integer)) or dims < 1:
            raise ValueError(f"dims: {dims!r} is out of range; allowed integers >= 1")
        self.bank = bank
        # box: the period of every coordinate (as normalised_coords gives it: a periodic setting's
        # period, a box wider than the data for the others); points are wrapped into it before each look-up
        self.box = None if box is None else np.asarray(box, dtype=np.float64)
        self.tree = tree if tree is not None else cKDTree(bank, boxsize=self.box)
        k = min(2 * int(dims), len(bank) - 1)
        dist, _ = self.tree.query(bank, k=k + 1)  # the first is the code itself
        self.local = np.maximum(dist[:, k], _TINY)  # (N,) local spacing at each bank code
        self.candidates = min(int(candidates), len(bank))
        self.step = 0.25 * float(np.min(self.local))  # samples along a segment: a quarter of the finest spacing

    def nearest(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(K,) clearance in local spacings and (K,) the bank index that gives it."""
        points = np.atleast_2d(np.asarray(points, dtype=np.float64))
        if self.box is not None:
            points = np.mod(points, self.box)
        dist, idx = self.tree.query(points, k=self.candidates)
        dist, idx = dist.reshape(len(points), -1), idx.reshape(len(points), -1)
        ratio = dist / self.local[idx]
        best = np.argmin(ratio, axis=1)
        rows = np.arange(len(points))
        return ratio[rows, best], idx[rows, best]

    def __call__(self, points: np.ndarray) -> np.ndarray:
        return self.nearest(points)[0]

    def segment_within(self, a: np.ndarray, b: np.ndarray, limit: float) -> bool:
        """True when every point of the segment a -> b (sampled at most `step` apart, ends
        included) keeps within `limit` local spacings of the bank."""
        return self.worst(np.vstack([a, b])) <= limit

    def worst(self, line: np.ndarray) -> float:
        """The largest clearance along a polyline (M, d), sampled at most `step` apart."""
        line = np.atleast_2d(np.asarray(line, dtype=np.float64))
        pts = [line[:1]]
        for a, b in zip(line[:-1], line[1:]):
            n = max(int(np.ceil(np.linalg.norm(b - a) / self.step)), 1)
            pts.append(a + (np.arange(1, n + 1)[:, None] / n) * (b - a))
        return float(np.max(self(np.vstack(pts))))
