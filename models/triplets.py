"""Collinear triplets of samples: (s, m, t, a) with p_m = (1 - a) p_s + a p_t within a local span.

Distances are measured in settings space with every axis divided by its typical sample spacing,
so "span 3" means three grid steps whatever the units. Periodic axes take the short arc.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from .params import ParamSpace


@dataclass(frozen=True)
class Triplets:
    s: np.ndarray  # (T,) int, start sample
    m: np.ndarray  # (T,) int, middle sample
    t: np.ndarray  # (T,) int, end sample
    a: np.ndarray  # (T,) float, fraction of the way from s to t
    residual: np.ndarray  # (T,) distance of p_m from the segment, in spacing units

    def __len__(self) -> int:
        return len(self.a)


def normalised_coords(params: np.ndarray, space: ParamSpace, scale: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates in spacing units and the cKDTree box sizes (periodic axes wrap, others never do)."""
    u = (space.wrap(params) - space.lo) / scale
    extent = u.max(axis=0) + 1.0
    box = np.where(space.periodic, space.span / scale, 4.0 * extent + 1.0)
    return np.mod(u, box), box


def mine_triplets(params: np.ndarray, space: ParamSpace, *, scale: np.ndarray | None = None,
                  span: float = 3.0, tolerance: float = 0.15, min_fraction: float = 0.05) -> Triplets:
    """All triplets whose outer pair lies within `span` and whose middle lies within `tolerance`
    of the segment between them (both in spacing units), with a in [min_fraction, 1 - min_fraction].

    On a grid with the defaults (span 3, tolerance 0.15) exactly the grid-collinear triplets are
    found: the nearest off-line grid point of a segment that short is 0.3 spacing away.
    Each unordered outer pair is reported once (s < t).
    """
    params = np.asarray(params, dtype=np.float64)
    if scale is None:
        scale = space.spacing(params)
    u, box = normalised_coords(params, space, scale)
    tree = cKDTree(u, boxsize=box)
    neighbours = tree.query_ball_point(u, r=span + 1e-9)
    out_s, out_m, out_t, out_a, out_r = [], [], [], [], []
    for s, nb in enumerate(neighbours):
        nb = np.asarray([j for j in nb if j != s], dtype=int)
        if len(nb) < 2:
            continue
        d = space.delta(params[s], params[nb]) / scale  # (K, P) from s to each neighbour
        t_idx = nb > s
        if not t_idx.any():
            continue
        d_t = d[t_idx]                                   # (Kt, P) candidate ends
        length2 = np.sum(d_t * d_t, axis=1)              # (Kt,)
        a = (d_t @ d.T) / length2[:, None]               # (Kt, K) projection of every middle
        resid = np.linalg.norm(d[None, :, :] - a[..., None] * d_t[:, None, :], axis=-1)
        ok = (a >= min_fraction) & (a <= 1 - min_fraction) & (resid <= tolerance)
        ti, mi = np.nonzero(ok)
        if len(ti) == 0:
            continue
        out_s.append(np.full(len(ti), s))
        out_t.append(nb[t_idx][ti])
        out_m.append(nb[mi])
        out_a.append(a[ti, mi])
        out_r.append(resid[ti, mi])
    if not out_s:
        empty = np.zeros(0, dtype=int)
        return Triplets(empty, empty, empty, np.zeros(0), np.zeros(0))
    cat = np.concatenate
    return Triplets(cat(out_s), cat(out_m), cat(out_t), cat(out_a), cat(out_r))
