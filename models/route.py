"""Polylines in latent space: length, equal-arc-length resampling, relaxation, straight routes.

Points are (M, d) arrays of codes, in latent units; t is the fraction of a route's length, in
[0, 1]. The frame contract: of `count` in-between frames, frame i (1-based) sits at
t = i / (count + 1), ends excluded, whatever the route.
"""
from __future__ import annotations

from typing import Callable

import numpy as np


def _points(points, name="points", least=1) -> np.ndarray:
    p = np.asarray(points, dtype=np.float64)
    if p.ndim != 2 or len(p) < least or p.shape[1] < 1 or not np.all(np.isfinite(p)):
        raise ValueError(f"{name}: shape {p.shape} not allowed; expected finite (M, d) with M >= {least}")
    return p


def _count(count, least=0) -> int:
    if isinstance(count, bool) or not isinstance(count, (int, np.integer)) or count < least:
        raise ValueError(f"count: {count!r} is out of range; allowed integers >= {least}")
    return int(count)


def interior_t(count: int) -> np.ndarray:
    """(count,) positions t = i / (count + 1), i = 1..count: the in-between frames, ends excluded."""
    count = _count(count)
    return np.arange(1, count + 1) / (count + 1)


def polyline_length(points) -> float:
    """Sum of segment lengths of an (M, d) polyline, in latent units."""
    return float(np.sum(_segments(_points(points))))


def _segments(p: np.ndarray) -> np.ndarray:
    diff = np.diff(p, axis=0)
    return np.sqrt(np.sum(diff * diff, axis=1))


def at_t(points, t) -> np.ndarray:
    """Points at fractions t (K,) of the polyline's arc length -> (K, d); t is clipped to [0, 1]."""
    p = _points(points)
    t = np.clip(np.asarray(t, dtype=np.float64).ravel(), 0.0, 1.0)
    if len(p) == 1:
        return np.repeat(p, len(t), axis=0)
    cum = np.r_[0.0, np.cumsum(_segments(p))]
    if cum[-1] == 0.0:  # all points coincide
        return np.repeat(p[:1], len(t), axis=0)
    s = t * cum[-1]
    seg = np.clip(np.searchsorted(cum, s, side="right") - 1, 0, len(p) - 2)
    span = cum[seg + 1] - cum[seg]
    frac = np.divide(s - cum[seg], span, out=np.zeros_like(s), where=span > 0)
    out = p[seg] + frac[:, None] * (p[seg + 1] - p[seg])
    out[t == 0.0], out[t == 1.0] = p[0], p[-1]  # ends exactly, not up to rounding
    return out


def resample(points, count, *, include_ends=False, return_t=False):
    """`count` points at equal arc length along an (M, d) polyline -> (count, d).

    include_ends=False: the interior points at t = i / (count + 1), i = 1..count (the frame
    contract). include_ends=True: t = i / (count - 1), i = 0..count-1, the ends included
    (count >= 2). return_t=True also returns the (count,) t values.
    """
    if include_ends:
        count = _count(count, least=2)
        t = np.linspace(0.0, 1.0, count)
    else:
        t = interior_t(count)
    out = at_t(points, t)
    return (out, t) if return_t else out


def straight(z_start, z_end, count) -> np.ndarray:
    """(count, d) interior points of the straight line z_start -> z_end at t = i / (count + 1)."""
    a, b = (np.asarray(z, dtype=np.float64).ravel() for z in (z_start, z_end))
    if a.shape != b.shape or not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        raise ValueError(f"z_start, z_end: shapes {a.shape}, {b.shape} not allowed; "
                         "expected two finite codes of one length")
    t = interior_t(count)[:, None]
    return (1.0 - t) * a + t * b


def relax(points, project: Callable[[np.ndarray], np.ndarray] | None = None, *, rounds=5, step=0.5,
          keep_ends=True) -> np.ndarray:
    """Shorten an (M, d) polyline while keeping it on a manifold.

    Each round moves every interior point by `step` (0 < step <= 1) of the way to the midpoint of
    its neighbours (a discrete curve-shortening step), re-spaces the points at equal arc length,
    then applies `project` ((K, d) -> (K, d), e.g. z -> E(D(z))) if given. Projection comes last
    so the returned points lie on the manifold. keep_ends=True leaves the two ends untouched;
    keep_ends=False projects them too (an end has one neighbour, so it is never shortened).
    """
    p = _points(points).copy()
    if isinstance(rounds, bool) or not isinstance(rounds, (int, np.integer)) or rounds < 0:
        raise ValueError(f"rounds: {rounds!r} is out of range; allowed integers >= 0")
    if not 0.0 < step <= 1.0:
        raise ValueError(f"step: {step!r} is out of range; allowed 0 < step <= 1")
    moving = slice(1, -1) if keep_ends else slice(None)
    if not keep_ends:
        p = _projected(p, project, moving)
    if len(p) < 3:
        return p
    for _ in range(int(rounds)):
        mid = 0.5 * (p[:-2] + p[2:])
        p[1:-1] += step * (mid - p[1:-1])
        p = _respaced(p)
        p = _projected(p, project, moving)
    return p


def _respaced(p: np.ndarray) -> np.ndarray:
    """The same polyline's points at equal arc length, ends kept: at_t(p, linspace(0, 1, M)),
    without its checks (relax calls it every round on points it made itself)."""
    cum = np.concatenate(([0.0], np.cumsum(np.sqrt(np.sum(np.diff(p, axis=0) ** 2, axis=1)))))
    if cum[-1] == 0.0:
        return p
    s = np.linspace(0.0, cum[-1], len(p))
    out = np.column_stack([np.interp(s, cum, p[:, j]) for j in range(p.shape[1])])
    out[0], out[-1] = p[0], p[-1]
    return out


def _projected(p: np.ndarray, project, moving: slice) -> np.ndarray:
    if project is None:
        return p
    part = p[moving]
    moved = np.asarray(project(part.copy()), dtype=np.float64)
    if moved.shape != part.shape or not np.all(np.isfinite(moved)):
        raise ValueError(f"project: returned shape {moved.shape} or non-finite values; "
                         f"expected finite {part.shape}")
    p = p.copy()
    p[moving] = moved
    return p


def taut(points, clearance: Callable[[np.ndarray], np.ndarray], limit: float, *, step: float) -> np.ndarray:
    """Indices of the vertices of an (M, d) polyline kept by pulling it taut inside a tube.

    From each kept vertex the polyline jumps to the last vertex, if the straight segment there stays
    within `limit` everywhere, else as far forward as its line of sight reaches (each further vertex
    while the segment stays within), judged by `clearance` ((K, d) points -> (K,) distances to the
    data) at samples at most `step` apart; the next vertex is always reachable. On a flat stretch
    the route becomes the chord; where the chord would leave the tube (a gap, a bend of the
    manifold) the route keeps the vertices that hold it near the data. Ends are always kept.
    """
    p = _points(points, least=1)
    if not (limit > 0 and step > 0):
        raise ValueError(f"limit, step: {limit!r}, {step!r} not allowed; expected both > 0")
    keep, i, last = [0], 0, len(p) - 1
    while i < last:
        if segment_within(p[i], p[last], clearance, limit, step=step):
            j = last
        else:  # line of sight forward: the next vertex is always reachable
            j = i + 1
            while j + 1 < last and segment_within(p[i], p[j + 1], clearance, limit, step=step):
                j += 1
        keep.append(j)
        i = j
    return np.asarray(keep, dtype=np.int64)


def segment_within(a, b, clearance: Callable[[np.ndarray], np.ndarray], limit: float, *, step: float) -> bool:
    """True when the segment a -> b keeps within `limit` of the data at samples at most `step`
    apart, ends excluded (see `taut`)."""
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    n = int(np.ceil(np.linalg.norm(b - a) / step))
    if n < 2:
        return True
    s = np.arange(1, n)[:, None] / n
    return bool(np.max(clearance(a + s * (b - a))) <= limit)
