"""Frames made from the real captures around them: two, or three where no two fit.

A frame on a route shows settings s. Bank captures whose settings bracket s (s on, or near, the
segment between two of them, or inside the triangle of three) hold nearly every pixel the frame
needs when the subject or the camera moves: the frame is synthesized from them, and the decoded
frame only arbitrates.

Bracket (`Bracketer`): among the bank samples nearest to s (settings in sample-spacing units,
periodic settings wrapped), the cheapest of
  - a pair (i, j): cost = off + LENGTH_COST * length, off the distance from s to the segment and
    length the segment's; `at` is where s projects on it, from i (0) to j (1);
  - a triangle (i, j, k) holding s's projection on its plane: cost = off + LENGTH_COST * its
    longest side, the weights s's barycentric coordinates. On scattered samples a frame often lies
    off every pair's segment, and the frame made along the nearest one shows settings it should not
    (measured on the scattered camera move, frames at the true settings: SSIM 0.92 within 0.1
    spacings of the segment, 0.40 beyond 0.5; with triangles 0.821 -> 0.854 over all frames);
  - a single capture (length 0), the bracket of a frame at its setting (within AT_CAPTURE);
    anywhere else it costs SINGLE_COST more, so a bracket through s wins (measured on the photo
    window: a capture 0.44 spacings from the frame, taken whole, gave SSIM 0.55-0.6 where the pair
    through the frame gave 0.95).
Every bracket is kept as up to three members with barycentric weights (a pair's third weight is 0).

Synthesis (`synthesize`), written for a pair, captures A, B, fraction a and decoded frame D, all (H, W, C)
(a triangle's members move by the weighted sums of their flows to the other two, `moved`, and its
agreement g is that of the two members that differ most):
    F_AB, F_BA     dense flow both ways (models.flow: A(x) ~ B(x + F_AB(x)))
    e_A(x)         = |F_AB(x) + F_BA(x + F_AB(x))|        forward-backward inconsistency at A's pixels
    to_A, to_B     flows from the frame back to A and to B (points moving on straight lines at
                   constant speed, as models.flow.tween): W_A = warp(A, to_A), W_B = warp(B, to_B)
    v_A            = exp(-(e_A(x + to_A) / CONSISTENCY)^2)  A's pixel is seen in both captures
    P              = ((1 - a) v_A W_A + a v_B W_B) / ((1 - a) v_A + a v_B)        occlusion-aware blend
    g              = exp(-(spread(|W_A - W_B|) / tolerance)^2)  where the two warped captures agree
    X              = the warped captures weighted by closeness to D (1 / (c^2 + DELTA^2), c the blurred
                     difference to D) and by visibility: where they disagree (a light that moved, a
                     part that came into view), the decoded frame picks which capture to believe
    out            = g P + (1 - g) X
Per frame it reports the share of pixels where the captures agree (mean g, the frame's `detail`),
the inconsistency of the flows it used, and how far the result lies from the decoded frame: the
confidence signals of a model that serves these frames.
"""
from __future__ import annotations

import itertools
import threading
from collections import OrderedDict
from concurrent.futures import Executor
from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from . import flow as lflow
from .refine import blur

LENGTH_COST = 0.2   # spacings of `off` one spacing of bracket length is worth: a 1-spacing pair
#                     through s (0.2) beats a capture half a spacing away (0.5)
MAX_LENGTH = 3.0    # spacings: longer pairs are not brackets (the flow between them gets unreliable);
#                     a held-out or missing capture leaves 2-spacing gaps, and their diagonals are longer
AT_CAPTURE = 0.05   # spacings: a frame this close to a capture is that capture
SINGLE_COST = 1.0   # what a single capture costs beyond its distance anywhere else
NEIGHBOURS = 8      # nearest bank samples among which the bracket is chosen
WEIGHTLESS = 1e-6   # a bracket member's weight below which it takes no part
# px of forward-backward inconsistency at which visibility falls to 1/e: only gross failures. Measured on
# the turntable (captures 15 deg of yaw or 10 deg of camera height apart, 20 frames): SSIM 0.877 at
# 1 px, 0.881 at 2 px, 0.887 at 4 px, 0.890 with no visibility at all; 4 px keeps the guard against
# a flow that lost its way at a cost of 0.003
CONSISTENCY = 4.0
MATCH, SPREAD = 1.0, 1.5  # px: blur before comparing with the decoded frame, and pooling of differences
DELTA = 0.02        # closeness to the decoded frame below which a capture is fully believed
PAIR_FLOWS = lflow.METHODS


@dataclass
class Bracket:
    """Per frame: up to three captures `members` (N, 3) (capture indices, ascending among those with
    weight) and their barycentric `weights` (N, 3), summing to 1: a single capture is (i, i, i) with
    weights (1, 0, 0), a pair (i, j, j) with (1 - a, a, 0), a triangle (i, j, k); `length` is the
    bracket's longest side and `off` the frame's distance from it (both in sample spacings)."""
    members: np.ndarray
    weights: np.ndarray
    length: np.ndarray
    off: np.ndarray

    @property
    def first(self) -> np.ndarray:
        return self.members[:, 0]

    @property
    def second(self) -> np.ndarray:
        return self.members[:, 1]

    @property
    def at(self) -> np.ndarray:
        """A pair's fraction from first to second (0 for a single capture)."""
        return self.weights[:, 1]

    @property
    def triangle(self) -> np.ndarray:
        return self.weights[:, 2] > 0

    @property
    def single(self) -> np.ndarray:
        return self.weights[:, 0] >= 1.0


def canonical(members: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(members, weights) (N, 3) with weights under WEIGHTLESS dropped and the rest renormalised, the
    captures with weight in ascending order first, and empty slots repeating the last of them at weight 0:
    frames between the same captures share their flows whichever way a route passes them."""
    members, weights = np.asarray(members, dtype=np.int64), np.asarray(weights, dtype=np.float64)
    weights = np.where(weights < WEIGHTLESS, 0.0, weights)
    weights = weights / weights.sum(axis=1, keepdims=True)
    key = np.where(weights > 0, members, np.iinfo(np.int64).max)  # weightless slots last
    order = np.argsort(key, axis=1, kind="stable")
    members, weights = np.take_along_axis(members, order, 1), np.take_along_axis(weights, order, 1)
    used = (weights > 0).sum(axis=1)
    last = members[np.arange(len(members)), used - 1]
    members = np.where(weights > 0, members, last[:, None])
    return members, weights


class Bracketer:
    """Brackets of settings points among bank samples `u` (M, P) in spacing units, `box` the
    period of every coordinate (triplets.normalised_coords)."""

    def __init__(self, u: np.ndarray, box: np.ndarray, *, neighbours: int = NEIGHBOURS,
                 length_cost: float = LENGTH_COST, max_length: float = MAX_LENGTH, triangles: bool = True):
        self.u, self.box = np.asarray(u, dtype=np.float64), np.asarray(box, dtype=np.float64)
        self.tree = cKDTree(np.mod(self.u, self.box), boxsize=self.box)
        self.k = min(int(neighbours), len(self.u))
        self.length_cost, self.max_length = float(length_cost), float(max_length)
        self.triangles = bool(triangles) and self.u.shape[1] >= 2

    def __call__(self, points: np.ndarray, rank: int = 0) -> Bracket:
        """The bracket of each point; rank r > 0: the (r+1)-th cheapest instead (calibration uses
        them to show the confidence frames made from brackets that miss the point, as served frames
        between captures can)."""
        s = np.mod(np.atleast_2d(np.asarray(points, dtype=np.float64)), self.box)
        _, idx = self.tree.query(s, k=self.k)
        idx = np.asarray(idx).reshape(len(s), self.k)
        d = self.u[idx] - s[:, None, :]
        d -= self.box * np.round(d / self.box)                       # (N, K, P) nearest images
        slots, weights, length, off = self._all(d) if self.triangles else self._lines(d)
        cost = (off + self.length_cost * length + np.where(length > self.max_length, np.inf, 0.0)
                + np.where((length == 0) & (off > AT_CAPTURE), SINGLE_COST, 0.0))
        cost = np.round(cost, 9)  # ties are ties, whatever the rounding of each candidate's off
        best = np.argsort(cost, axis=1, kind="stable")[:, min(int(rank), cost.shape[1] - 1)]
        rows = np.arange(len(s))
        members, w = canonical(idx[rows[:, None], slots[best]], weights[rows, best])
        return Bracket(members=members, weights=w, length=length[rows, best], off=off[rows, best])

    def _lines(self, d: np.ndarray):
        """Singles and pairs among the K neighbours: slots (Q, 3), weights (N, Q, 3), length and off (N, Q)."""
        i, j = np.triu_indices(self.k, 1)
        i, j = np.concatenate([np.arange(self.k), i]), np.concatenate([np.arange(self.k), j])  # singles first
        di, dj = d[:, i], d[:, j]                                    # (N, Q, P)
        seg = dj - di
        length2 = np.sum(seg * seg, axis=-1)
        at = np.clip(np.sum(-di * seg, axis=-1) / np.maximum(length2, 1e-12), 0.0, 1.0)
        off = np.linalg.norm(di + at[..., None] * seg, axis=-1)
        weights = np.stack([1.0 - at, at, np.zeros_like(at)], axis=-1)
        return np.stack([i, j, j], axis=-1), weights, np.sqrt(length2), off

    def _all(self, d: np.ndarray):
        """`_lines` and the triangles among the K neighbours that hold the point's projection on their
        plane (barycentric weights all >= 0); the others are left to the pairs along their sides."""
        slots, weights, length, off = self._lines(d)
        if self.k < 3:
            return slots, weights, length, off
        a, b, c = np.array(list(itertools.combinations(range(self.k), 3))).T
        da, e1, e2 = d[:, a], d[:, b] - d[:, a], d[:, c] - d[:, a]   # (N, T, P)
        g11, g12, g22 = (np.sum(e1 * e1, -1), np.sum(e1 * e2, -1), np.sum(e2 * e2, -1))
        r1, r2 = -np.sum(da * e1, -1), -np.sum(da * e2, -1)
        det = g11 * g22 - g12 * g12
        flat = det <= 1e-9 * g11 * g22                               # collinear: no triangle
        det = np.where(flat, 1.0, det)
        wb, wc = (g22 * r1 - g12 * r2) / det, (g11 * r2 - g12 * r1) / det
        tw = np.stack([1.0 - wb - wc, wb, wc], axis=-1)
        inside = ~flat & np.all(tw >= 0.0, axis=-1)
        toff = np.linalg.norm(da + wb[..., None] * e1 + wc[..., None] * e2, axis=-1)
        side = np.sqrt(np.maximum(np.maximum(g11, g22), np.sum((e2 - e1) ** 2, -1)))
        tw = np.where(inside[..., None], np.clip(tw, 0.0, 1.0), [1.0, 0.0, 0.0])
        # singles, then pairs, then triangles: a tie keeps the pair, as before triangles were tried. Letting
        # the triangle win it (on a grid cell's diagonal its sides span one spacing, not 1.4: turntable 0.894
        # -> 0.903 SSIM at the true settings) also flipped the pair across a held-out capture's gap from
        # zoom to roll on the camera move, and the held-out choice turned frames from captures off there
        # (0.585 -> 0.539 SSIM): ties are settled by candidate order, not by how alike the captures look
        return (np.concatenate([slots, np.stack([a, b, c], -1)]), np.concatenate([weights, tw], axis=1),
                np.concatenate([length, np.where(inside, side, np.inf)], axis=1),
                np.concatenate([off, np.where(inside, toff, np.inf)], axis=1))


def likely_pairs(bracketer: "Bracketer", reach: float = 2.0) -> list[tuple[int, int]]:
    """Capture pairs whose flows brackets are likely to need (a bracket's sides): the brackets of points
    a quarter, a half and three quarters of the way from each capture to every other one within `reach`
    spacings (as frames between captures lie; 2 spacings spans the gap a missing capture leaves), the
    pairs most often taken first, then the shortest."""
    starts, ends = [], []
    for i, near in enumerate(bracketer.tree.query_ball_point(np.mod(bracketer.u, bracketer.box), r=reach)):
        near = [j for j in near if j != i]
        starts += [i] * len(near)
        ends += near
    if not starts:
        return []
    start, end = np.asarray(starts), np.asarray(ends)
    d = bracketer.u[end] - bracketer.u[start]
    d -= bracketer.box * np.round(d / bracketer.box)                      # nearest images across seams
    points = bracketer.u[start, None, :] + np.array([0.25, 0.5, 0.75])[None, :, None] * d[:, None, :]
    br = bracketer(points.reshape(-1, bracketer.u.shape[1]))
    sides = np.concatenate([br.members[:, [x, y]][br.weights[:, y] > 0] for x, y in ((0, 1), (0, 2), (1, 2))])
    pairs, counts = np.unique(sides, axis=0, return_counts=True)
    g = bracketer.u[pairs[:, 1]] - bracketer.u[pairs[:, 0]]
    lengths = np.linalg.norm(g - bracketer.box * np.round(g / bracketer.box), axis=-1)
    return [(int(pairs[n, 0]), int(pairs[n, 1])) for n in np.lexsort((lengths, -counts))]


def warm(cache: "FlowCache", captures, pairs: list[tuple[int, int]], method: str,
         stop: threading.Event | None = None) -> int:
    """Estimate the flows of `pairs` in order into `cache` until it is full (nothing already kept is
    pushed out) or `stop` is set; returns how many pairs were added."""
    added = 0
    for key in pairs:
        if stop is not None and stop.is_set():
            break
        if cache.get((method,) + key) is not None:
            continue
        a, b = np.asarray(captures(np.asarray(key, dtype=np.int64)), dtype=np.float32)
        flows = pair_flows(a, b, method)
        if cache.used + flows.nbytes > cache.budget:
            break
        cache.put((method,) + key, flows)
        added += 1
    return added


@dataclass
class PairFlows:
    """Flows between two captures A and B both ways, and each side's visibility: exp(-(e / CONSISTENCY)^2)
    of its forward-backward inconsistency e (px), (H, W, 1)."""
    ab: np.ndarray
    ba: np.ndarray
    seen_a: np.ndarray
    seen_b: np.ndarray

    @property
    def nbytes(self) -> int:
        return self.ab.nbytes + self.ba.nbytes + self.seen_a.nbytes + self.seen_b.nbytes


class FlowCache:
    """The flows of the most recently used capture pairs, up to `budget` bytes (least recently used
    dropped first). Captures never change, so a pair's flows are estimated once for as long as they
    stay: neighbouring requests (a batch filling one region, frames of consecutive answers) reuse
    them. Safe to share between threads."""

    def __init__(self, budget: int = 32 << 20):
        self.budget, self.used = int(budget), 0
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key):
        with self._lock:
            found = self._items.get(key)
            if found is not None:
                self._items.move_to_end(key)
            return found

    def put(self, key, flows: "PairFlows") -> None:
        size = flows.nbytes
        with self._lock:
            if key in self._items or size > self.budget:
                return
            self._items[key] = flows
            self.used += size
            while self.used > self.budget:
                _, old = self._items.popitem(last=False)
                self.used -= old.nbytes

    def __len__(self) -> int:
        return len(self._items)


def pair_flows(a: np.ndarray, b: np.ndarray, method: str = "dis") -> PairFlows:
    fab, fba = lflow.flow(a, b, method=method), lflow.flow(b, a, method=method)
    err_a = np.linalg.norm(fab + lflow.warp(fba, fab), axis=-1, keepdims=True)
    err_b = np.linalg.norm(fba + lflow.warp(fab, fba), axis=-1, keepdims=True)
    return PairFlows(fab, fba, np.exp(-(err_a / CONSISTENCY) ** 2), np.exp(-(err_b / CONSISTENCY) ** 2))


def moved(images: list[np.ndarray], weights: np.ndarray, flows) -> tuple[np.ndarray, np.ndarray]:
    """Bracket members `images` (K of them, (H, W, C)) moved to the frame at barycentric `weights` (K,),
    with their visibility there: (K, H, W, C) and (K, H, W, 1). `flows(x, y)` gives (F_xy, F_yx,
    seen_xy): the flows from member x to member y and back, and x's visibility against y. Member x is
    sampled along
        to_x = -sum_y w_y ((1 - w_y) F_xy - w_y F_yx)
    (points moving on straight lines at constant speed, as models.flow.tween for a pair: the pair's
    terms are exactly tween's), and its visibility is the weighted geometric mean of its visibilities
    against the others."""
    w = np.asarray(weights, dtype=np.float64)
    c = images[0].shape[-1]
    out = np.zeros((len(images),) + images[0].shape, np.float32)  # weightless members stay 0: unused
    seen = np.zeros((len(images),) + images[0].shape[:-1] + (1,), np.float32)
    for x, img in enumerate(images):
        if w[x] <= 0:
            continue
        others = [y for y in range(len(images)) if y != x and w[y] > 0]
        if not others:
            out[x], seen[x] = img, 1.0
            continue
        to, visible = np.zeros(img.shape[:-1] + (2,), np.float32), np.ones(img.shape[:-1] + (1,), np.float32)
        for y in others:
            fxy, fyx, vis = flows(x, y)
            to -= np.float32(w[y]) * (np.float32(1 - w[y]) * fxy - np.float32(w[y]) * fyx)
            visible *= vis if len(others) == 1 else np.power(vis, np.float32(w[y] / w[others].sum()))
        # each capture moved together with its visibility (one warp for both)
        both = lflow.warp(np.concatenate([img, visible], axis=-1), to)
        out[x], seen[x] = both[..., :c], both[..., c:]
    return out, seen


def combine(warped: np.ndarray, seen: np.ndarray, weights: np.ndarray, decoded: np.ndarray,
            tolerance: float) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """The frames (N, H, W, C) from the moved members of `moved` stacked over N frames, (N, K, H, W, C)
    and (N, K, H, W, 1), at barycentric `weights` (N, K), the decoded frames arbitrating; and per frame
    {"detail": share where the members agree, "flow_error": share of the blend's weight on pixels the
    flows could not follow}. Whole batches at once: per-frame array calls cost more than their
    arithmetic at these sizes."""
    n, m, h, wd, c = warped.shape
    w = np.asarray(weights, dtype=np.float32).reshape(n, m, 1, 1, 1)
    mean_c = np.full((c, 1), 1.0 / c, np.float32)  # channel means as one matrix product (a reduction costs more)
    # member by member (K <= 3): reductions over a short middle axis cost more than their arithmetic
    k = [w[:, x] * seen[:, x] + np.float32(1e-6) * (w[:, x] > 0) for x in range(m)]
    mixed = sum(kx * warped[:, x] for x, kx in enumerate(k)) / sum(k)
    # where the members disagree most: the largest of their pairwise differences (a pair has one)
    agree = np.zeros((n, h, wd, 1), np.float32)
    for x, y in itertools.combinations(range(m), 2):
        both = (w[:, x] > 0) & (w[:, y] > 0)
        if both.any():
            agree = np.maximum(agree, blur(np.abs(warped[:, x] - warped[:, y]) @ mean_c, SPREAD) * both)
    agree = np.exp(-np.square(agree / tolerance))
    soft = blur(warped.reshape(n * m, h, wd, c), MATCH).reshape(warped.shape)
    close = blur((np.abs(soft - decoded[:, None]) @ mean_c).reshape(n * m, h, wd, 1), SPREAD).reshape(seen.shape)
    trust = [kx / (np.square(close[:, x]) + DELTA ** 2) for x, kx in enumerate(k)]
    out = agree * mixed + (1 - agree) * (sum(t * warped[:, x] for x, t in enumerate(trust)) / sum(trust))
    lost = sum(w[:, x] * (1 - seen[:, x]) for x in range(m)).mean(axis=(1, 2, 3))
    return (np.clip(out, 0.0, 1.0).astype(np.float32),
            {"detail": agree.mean(axis=(1, 2, 3)).astype(np.float64), "flow_error": lost.astype(np.float64)})


def signal_figures(figures: dict[str, np.ndarray], bracket: Bracket) -> dict[str, np.ndarray]:
    """`synthesize`'s per-frame figures under the names the confidence signals read them by."""
    return {"detail": figures["detail"], "pair_flow": figures["flow_error"], "pair_span": bracket.length,
            "pair_off": bracket.off, "pair_gap": figures["decoded_gap"]}


def pair_sides(flows: PairFlows, x: int):
    """`moved`'s flows(x, y) for the two members of one pair: member 0 is the pair's A."""
    return (flows.ab, flows.ba, flows.seen_a) if x == 0 else (flows.ba, flows.ab, flows.seen_b)


def moved_pair(a: np.ndarray, b: np.ndarray, at: float, flows: PairFlows) -> tuple[np.ndarray, ...]:
    """Captures a and b moved to the frame at fraction `at` between them, with their visibility
    there: (W_A, v_A, W_B, v_B), (H, W, C) and (H, W, 1)."""
    (wa, wb), (va, vb) = moved([a, b], np.array([1.0 - at, at]), lambda x, y: pair_sides(flows, x))
    return wa, va, wb, vb


def blend(a: np.ndarray, b: np.ndarray, at: float, decoded: np.ndarray, flows: PairFlows | None,
          tolerance: float) -> tuple[np.ndarray, dict[str, float]]:
    """One frame at fraction `at` from capture a to capture b (`moved`, then `combine`), and its
    figures. flows None: a and b are one capture, and the frame is that capture."""
    if flows is None:
        return np.asarray(a, dtype=np.float32), {"detail": 1.0, "flow_error": 0.0}
    wa, va, wb, vb = moved_pair(np.asarray(a, np.float32), np.asarray(b, np.float32), at, flows)
    out, fig = combine(np.stack([wa, wb])[None], np.stack([va, vb])[None], np.array([[1.0 - at, at]]),
                       np.asarray(decoded, np.float32)[None], tolerance)
    return out[0], {k: float(v[0]) for k, v in fig.items()}


def synthesize(captures, bracket: Bracket, decoded: np.ndarray, *, tolerance: float, method: str = "dis",
               pool: Executor | None = None, cache: FlowCache | None = None
               ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """(N, H, W, C) frames from the bracketing captures, and per frame the figures of `combine` plus
    "decoded_gap" (mean blurred difference to the decoded frame). `captures(indices)` gives float
    images of capture indices. Each distinct pair's flows (a bracket's sides) are estimated once, or
    taken from `cache`; flows run on `pool` if given. The captures are moved on the calling thread: at
    64 px, moving 16 frames' captures on two threads took longer than on one (many small numpy calls
    holding the GIL; measured on the camera move, a 16-frame answer 40-44 ms against 30-31)."""
    decoded = np.asarray(decoded, dtype=np.float32)
    n = len(decoded)
    if n == 0:
        return decoded, {"detail": np.zeros(0), "flow_error": np.zeros(0), "decoded_gap": np.zeros(0)}
    if method not in PAIR_FLOWS:
        raise ValueError(f"pair flow: {method!r} is not allowed; expected one of {list(PAIR_FLOWS)}")
    members, weights, single = bracket.members, bracket.weights, bracket.single
    used_slots = weights > 0
    keys = sorted({(int(m[x]), int(m[y])) for m, on in zip(members, used_slots)
                   for x, y in ((0, 1), (0, 2), (1, 2)) if on[y]})
    used = sorted({int(i) for m, on in zip(members, used_slots) for i in m[on]})
    images = dict(zip(used, np.asarray(captures(np.asarray(used, dtype=np.int64)), dtype=np.float32)))

    def estimate(key):
        got = None if cache is None else cache.get((method,) + key)
        if got is None:
            got = pair_flows(images[key[0]], images[key[1]], method)
            if cache is not None:
                cache.put((method,) + key, got)
        return key, got

    found = dict(pool.map(estimate, keys) if pool is not None and len(keys) > 1 else map(estimate, keys))
    m = int((weights > 0).sum(axis=1).max())  # members any frame uses: pairs alone need two, singles one

    def made(f: int):
        def sides(x: int, y: int):
            flows = found[(int(members[f, min(x, y)]), int(members[f, max(x, y)]))]
            return pair_sides(flows, 0 if x < y else 1)

        return moved([images[int(i)] for i in members[f, :m]], weights[f, :m], sides)  # a single: itself, seen

    warped, seen = (np.stack(x) for x in zip(*map(made, range(n))))
    out, figures = combine(warped, seen, weights[:, :m], decoded, tolerance)
    out[single] = warped[single, 0]  # exactly the capture, not a blend of it with itself
    gap = np.abs(blur(out, SPREAD) - blur(decoded, SPREAD)).mean(axis=(1, 2, 3))
    return out, {**figures, "decoded_gap": gap.astype(np.float64)}
