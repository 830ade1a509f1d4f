"""Frames at the captures' own size. The model works small: it decides where a frame lies, makes it at
its working size and judges it there. The pixels of the large frame come from the real captures
around it, at their own size. Each of the two (or three) captures that bracket the frame, moved to
the frame's place, gives (a pair moved along one map fitted at full size where one map moves the whole
picture, models.motion; else along the dense flows estimated at the working size and scaled up,
models.pairs)

    C_k = B_k + up(blur(F - down(B_k)))

its own pixels with the broad difference from the served frame F added: F's light and placement
at scales above the blur (a Gaussian of SIGMA working-size pixels), but not F's fine error, which
enlarged would show as soft blotches over the capture's sharp detail. The large frame is

    large = up(F) + sum_k share_k * agree_k * (C_k - up(F)) / sum_k share_k

with `up` bicubic, `down` area resampling, share_k the capture's blend weight and agree_k the share
where B_k, brought down to the working size, matches F: where the captures disagree with what the
confidence judged, the frame is F enlarged. A frame is still synthesized, not captured.
"""
from __future__ import annotations

from collections import OrderedDict

import cv2
import numpy as np

from . import motion as lmotion
from . import pairs as lpairs

AGREE = 0.2    # mean absolute difference (0-1 scale) at working size at which a capture's share fades to 1/e
# working-size pixels: the Gaussian under which F's difference from a capture is F's fine error, not
# its light or placement (the window of the Gaussian SSIM the frames are scored with, common practice).
# Measured on frames between captures (bench/RESULTS.md): with no blur and AGREE 0.1 the lamp tile
# at 256 px lost to its nearest capture (0.940 against 0.972); with these it wins (0.975)
SIGMA = 1.5
HELD = 4  # full-size captures, and pairs' flows scaled to the frame's size, an enlargement keeps at hand of each


def long_side(size: str | int, working: int, full: tuple[int, int] | None) -> int:
    """The long side in pixels of frames asked for with `size` ("working", "full", or pixels)."""
    top = working if full is None else max(full)
    if size == "working":
        return working
    if size == "full":
        return top
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or not 8 <= size <= top:
        raise ValueError(f"size: {size!r} is out of range; allowed 'working', 'full' or 8 to {top} pixels "
                         f"(the long side of this model's captures)")
    return int(size)


def frame_size(size: str | int, working: int, full: tuple[int, int] | None) -> tuple[int, int]:
    """(width, height) of frames asked for with `size` (the captures' aspect when they are kept)."""
    long = long_side(size, working, full)
    if full is None or long == working:  # frames at the working size are the model's own square
        return long, long
    scale = long / max(full)
    return max(1, round(full[0] * scale)), max(1, round(full[1] * scale))


def resize(images: np.ndarray, width: int, height: int, *, enlarge: int = cv2.INTER_CUBIC) -> np.ndarray:
    """(N, H, W, C) float images to (N, height, width, C): area resampling down, `enlarge` up."""
    images = np.asarray(images, dtype=np.float32)
    n, h, w, c = images.shape
    if (w, h) == (width, height):
        return images
    how = cv2.INTER_AREA if width <= w and height <= h else enlarge
    out = np.stack([cv2.resize(img, (width, height), interpolation=how) for img in images])
    return np.clip(out.reshape(n, height, width, c), 0.0, 1.0)


def _scaled(flows: lpairs.PairFlows, width: int, height: int) -> lpairs.PairFlows:
    h, w = flows.ab.shape[:2]
    gain = np.array([width / w, height / h], dtype=np.float32)

    def up(a: np.ndarray, scale: np.ndarray | None = None) -> np.ndarray:
        out = cv2.resize(a, (width, height), interpolation=cv2.INTER_LINEAR).reshape(height, width, a.shape[-1])
        return out * scale if scale is not None else out

    return lpairs.PairFlows(up(flows.ab, gain), up(flows.ba, gain), up(flows.seen_a), up(flows.seen_b))


def _kept(store: OrderedDict, key, make):
    """store[key], made if missing; the least recently used dropped past HELD entries."""
    if key not in store:
        store[key] = make()
        if len(store) > HELD:
            store.popitem(last=False)
    store.move_to_end(key)
    return store[key]


def enlarge(engine, frames: np.ndarray, places: np.ndarray, long: int) -> np.ndarray:
    """The (N, h, w, C) working-size frames `frames`, made at settings `places` (N, P), at a long
    side of `long` pixels (the captures' aspect), as the module docstring says."""
    frames = np.asarray(frames, dtype=np.float32)
    n, h, w, c = frames.shape
    if not engine.bundle.has_full or len(frames) == 0:  # nothing larger was kept: the frames enlarged
        return resize(frames, long, long)
    full_h, full_w = engine.full_pixels[0].shape[1:3]
    width, height = frame_size(long, w, (full_w, full_h))
    u = (engine.space.wrap(np.asarray(places, dtype=np.float64)) - engine.space.lo) / engine.scale
    bracket = engine.bracketer(u)
    # the pair flows of a model that makes frames from pairs (shared with its cache), else DIS
    method = engine.refine.flow if engine.refine is not None and engine.refine.mode == "pair" else "dis"
    # captures are read and resized as frames need them, a few at a time (consecutive frames share
    # them): a 16-frame answer at 512 px would otherwise hold 32 of them as floats at once
    held, scaled = OrderedDict(), OrderedDict()  # captures by index, flows at the frame's size by pair

    def big(k: int) -> np.ndarray:
        return _kept(held, k, lambda: resize(engine.captures(np.array([k]), full=True), width, height)[0])

    def pair(i: int, j: int) -> lpairs.PairFlows:
        key = (method, i, j)
        flows = engine.flow_cache.get(key)
        if flows is None:
            small = engine.captures(np.array([i, j]))
            flows = lpairs.pair_flows(small[0], small[1], method)
            engine.flow_cache.put(key, flows)
        return flows

    def side(x: int, y: int, m: list[int]):  # `moved`'s flows between members x and y, at the frame's size
        i, j = m[min(x, y)], m[max(x, y)]
        return lpairs.pair_sides(_kept(scaled, (i, j), lambda: _scaled(pair(i, j), width, height)), 0 if x < y else 1)

    out = np.empty((n, height, width, c), dtype=np.float32)
    for f in range(n):
        m, weights = [int(x) for x in bracket.members[f]], bracket.weights[f]
        count = int((weights > 0).sum())
        motion = global_motion(engine, m[0], m[1], pair(m[0], m[1])) if count == 2 else None
        if count == 1:
            moved = [(big(m[0]), 1.0)]
        elif motion is not None:  # one map moves the whole picture: followed at the frame's size
            at = float(weights[1])
            wa, va, wb, vb = motion.at_size((full_w, full_h), (width, height)).moved(big(m[0]), big(m[1]), at)
            moved = [(wa, (1.0 - at) * va), (wb, at * vb)]
        else:  # along the dense flows between the members, estimated at the working size and scaled up
            warped, seen = lpairs.moved([big(x) for x in m[:count]], weights[:count], lambda x, y: side(x, y, m))
            moved = [(warped[x], weights[x] * seen[x]) for x in range(count)]
        # each moved capture with the served frame's broad difference, where it agrees with it:
        # large = up(F) + sum_k share_k * agree_k * (C_k - up(F)) / sum_k share_k
        base = resize(frames[f][None], width, height)[0]
        total = np.zeros((height, width, c), np.float32)
        shares = np.zeros((height, width, 1), np.float32)
        for img, share in moved:
            back = resize(img[None], w, h)[0]
            agree = np.exp(-(np.abs(back - frames[f]).mean(axis=-1, keepdims=True) / AGREE) ** 2)
            broad = cv2.GaussianBlur(frames[f] - back, (0, 0), SIGMA).reshape(h, w, c)
            total += share * resize(agree[None], width, height, enlarge=cv2.INTER_LINEAR)[0] * (
                img + resize(broad[None], width, height)[0] - base)
            shares += share
        np.clip(base + total / np.maximum(shares, 1e-6), 0.0, 1.0, out=out[f])
    return out


def global_motion(engine, i: int, j: int, flows: lpairs.PairFlows) -> lmotion.GlobalMotion | None:
    """The global motion of capture pair (i, j) (models.motion.fit at the captures' own size, which
    the homography needs; kept in the engine's flow cache), or None where the pair moves otherwise."""
    key = ("global", i, j)
    found = engine.flow_cache.get(key)
    if found is None:
        full = engine.captures(np.array([i, j]), full=True)
        small = engine.captures(np.array([i, j]))
        found = lmotion.fit(full[0], full[1], small[0], small[1], flows.ab) or NO_GLOBAL
        engine.flow_cache.put(key, found)
    return None if found is NO_GLOBAL else found


class _NoGlobal:
    nbytes = 64


NO_GLOBAL = _NoGlobal()  # cached for pairs whose motion is not global


def captures_size(engine) -> tuple[int, int] | None:
    """(width, height) of the engine's captures at their own size; None when its bundle kept none."""
    return engine.full_pixels[0].shape[1:3][::-1] if engine.bundle.has_full else None


def sized(engine, frames: list, size: str | int = "full") -> list:
    """`frames` (engine.Frame, made at the working size) with their images at `size` ("working",
    "full", or a long side in pixels up to the captures'); each frame's confidence is unchanged."""
    long = long_side(size, engine.manifest.model_config.resolution, captures_size(engine))
    if long == engine.manifest.model_config.resolution or not frames:
        return frames
    images = enlarge(engine, np.stack([f.image for f in frames]), np.stack([f.place for f in frames]), long)
    for f, img in zip(frames, images):
        f.image = img
    return frames
