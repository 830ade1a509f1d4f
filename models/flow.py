"""Dense optical flow (OpenCV's Farneback and DIS methods) and flow warping.

`flow(a, b)` gives, per pixel x of `a`, the displacement f(x) with a(x) ~ b(x + f(x)); `warp(img, f)`
samples img at x + f(x) (bilinear, edges repeated), so warp(b, flow(a, b)) ~ a. `tween(a, b, t)` is
the flow-warping baseline a user would otherwise reach for: the flows from the frame at time t back
to each end are estimated as t-weighted blends of the forward and backward end-to-end flows (points
assumed to move on straight lines at constant speed), each end is warped along its flow, and the
two warped ends are blended (1 - t) : t.

Two estimators: Farneback's polynomial expansion (the baseline, what a user would reach for) and
DIS, dense inverse search (Kroeger et al. 2016, OpenCV's DISOpticalFlow, "medium" preset), which
detail transfer uses: about 4x faster on 64 px frames and, measured on the truth sets of the lamp
and photo scenes, as good or better (bench/RESULTS.md).

Images are float (H, W, C) in [0, 1]; flow is estimated on their 8-bit luma (ITU-R BT.601
weights for colour, common practice).
"""
from __future__ import annotations

import functools

import cv2
import numpy as np

# Farneback settings for 64-256 px frames: a 4-level pyramid, a 13 px window and the wider (7 px)
# polynomial fit follow motions up to about a sixth of a 64 px frame (chosen on textured crops of
# a photograph shifted 2-10 px: 46.3 dB mean at the midpoint against 39.3 dB for 3 levels / 9 px).
FARNEBACK = dict(pyr_scale=0.5, levels=4, winsize=13, iterations=5, poly_n=7, poly_sigma=1.5, flags=0)
_LUMA = np.array([0.299, 0.587, 0.114], dtype=np.float32)


def luma8(img: np.ndarray) -> np.ndarray:
    """(H, W) uint8 luma of a float (H, W, C) or (H, W) image in [0, 1]."""
    img = np.asarray(img, dtype=np.float32)
    if img.ndim == 3:
        img = img[..., 0] if img.shape[2] == 1 else img[..., :3] @ _LUMA
    return np.round(np.clip(img, 0.0, 1.0) * 255.0).astype(np.uint8)


METHODS = ("farneback", "dis", "dis-fine")
# "dis-fine": DIS with 4 px patches every 2 px down to half resolution (the preset: 8 px every 4), for
# frames made from two captures, where every pixel's motion counts. Measured on the turntable and the
# camera-move scenes at 64 px (16 frames each between captures 15 deg of yaw or roll apart, or 10 deg
# of camera height, blended by models.pairs): SSIM 0.897 / 0.933 against 0.858 / 0.853 with the
# preset, at 0.9 ms a flow against 0.45; going on to full resolution gained 0.010 / 0.012 more at
# 2.4 ms a flow, which a 16-frame answer (up to 32 flows) cannot pay for
FINE_DIS = dict(finest_scale=1, patch_size=4, patch_stride=2)


def _dis(kind: str = "dis") -> "cv2.DISOpticalFlow":
    """A new DIS estimator per flow: one object reused on pictures of other sizes gave another flow
    for the same pair afterwards (measured: the error left by the flow of one lamp-tile pair moved by 16%),
    and one object must not be shared between threads (two threads calling one corrupted the heap).
    Making one costs about 10 us, 5% of a 64 px flow."""
    estimator = cv2.DISOpticalFlow_create(cv2.DISOPTICAL_FLOW_PRESET_MEDIUM)
    if kind == "dis-fine":
        estimator.setFinestScale(FINE_DIS["finest_scale"])
        estimator.setPatchSize(FINE_DIS["patch_size"])
        estimator.setPatchStride(FINE_DIS["patch_stride"])
    return estimator


def flow(a: np.ndarray, b: np.ndarray, settings: dict | None = None, method: str = "farneback") -> np.ndarray:
    """(H, W, 2) float32 displacement (dx, dy) in pixels with a(x) ~ b(x + f(x)); `settings` are
    Farneback's (default FARNEBACK); method "dis" uses dense inverse search instead, "dis-fine" the
    same with smaller, denser patches (FINE_DIS)."""
    if method in ("dis", "dis-fine"):
        return _dis(method).calc(luma8(a), luma8(b), None)
    if method != "farneback":
        raise ValueError(f"flow method: {method!r} is not allowed; expected one of {list(METHODS)}")
    return cv2.calcOpticalFlowFarneback(luma8(a), luma8(b), None, **(settings or FARNEBACK))


@functools.lru_cache(maxsize=8)
def _grid(h: int, w: int) -> tuple[np.ndarray, np.ndarray]:
    """Pixel coordinates (x, y) of an h x w image, float32, shared read-only between calls."""
    gx, gy = np.meshgrid(np.arange(w, dtype=np.float32), np.arange(h, dtype=np.float32))
    gx.setflags(write=False)
    gy.setflags(write=False)
    return gx, gy


def warp(img: np.ndarray, f: np.ndarray) -> np.ndarray:
    """img sampled at x + f(x): (H, W, C) float32, bilinear, edge pixels repeated outside."""
    img = np.asarray(img, dtype=np.float32)
    gx, gy = _grid(*f.shape[:2])
    out = cv2.remap(img, gx + f[..., 0], gy + f[..., 1], interpolation=cv2.INTER_LINEAR,
                    borderMode=cv2.BORDER_REPLICATE)
    return out.reshape(img.shape)


def tween(a: np.ndarray, b: np.ndarray, t) -> np.ndarray:
    """(len(t), H, W, C) frames between a and b at fractions t by flow warping both ends."""
    t = np.atleast_1d(np.asarray(t, dtype=np.float32))
    f01, f10 = flow(a, b), flow(b, a)
    out = []
    for s in t:
        to_a = -(1 - s) * s * f01 + s * s * f10  # flow from the frame at s back to a
        to_b = (1 - s) ** 2 * f01 - s * (1 - s) * f10  # and on to b
        out.append((1 - s) * warp(a, to_a) + s * warp(b, to_b))
    return np.clip(np.stack(out), 0.0, 1.0).astype(np.float32)
