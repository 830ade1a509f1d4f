"""Global motion between two captures: one homography for the whole picture.

A camera that turns about its centre, rolls or zooms, or any camera over a flat subject, moves
every pixel of one capture to the other by one projective map H (common practice in image
stitching and stabilisation): a(x) ~ b(H x) in homogeneous pixel coordinates. Where it holds, the
map is known everywhere to a fraction of a pixel from a few hundred matched features, while a dense
flow estimated at the working size and scaled up is off by that error times the scale (8x from 64 to
512 px), which blurs and doubles fine detail.

A place at fraction s between the two captures is reached by the matrix power H^s =
expm(s logm(H)) (H scaled to determinant 1): motion at constant speed along the one-parameter
group through H, exact for a steady roll, zoom or pan. The frame there is a(H^-s y) or
b(H^(1-s) y).

`fit` decides per pair whether the motion is global. Where b unmoved matches a as well as b moved
by the dense flow does (at the working size), nothing moves (a light that turns, say) and the map
is the identity; a dense flow there only follows shading. Otherwise H comes from ORB features
matched both ways and a robust fit (OpenCV; see `homography`), accepted only when b moved by H
matches a as well as b moved by the dense flow does. Otherwise the caller keeps the dense flow.
"""
from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
from scipy.linalg import expm, logm

from . import flow as lflow

FEATURES = 1500       # ORB keypoints per capture
MIN_MATCHES = 40      # fewer matches (after RANSAC) and no global motion is claimed
RANSAC_PX = 1.0       # reprojection tolerance at full size, pixels
PERSPECTIVE_GAIN = 0.75  # a full homography must cut the matches' median error to this share of a similarity's
MATCH_SLACK = 1.05    # the global map may leave at most 5% more error at the working size than the dense flow
# the unmoved pair may leave 20% more error than the dense flow, which follows shading a little even
# where nothing moves: measured between neighbouring captures, the unmoved error is 0.90-1.56 times the
# flow's on the lamp tile (median 1.03), 1.29-3.25 on the turntable and 3.1-7.7 on the camera move
STILL_SLACK = 1.2
EDGE = 0.1            # share of the working-size frame left out at each border when comparing the two


@dataclass(frozen=True)
class GlobalMotion:
    """H maps a capture A's full-size pixel coordinates to B's (A(x) ~ B(H x))."""
    h: np.ndarray                 # (3, 3), determinant 1
    log: np.ndarray               # (3, 3) real logm(h): powers are expm(s * log)
    matches: int                  # RANSAC inliers it rests on
    error: float                  # mean absolute difference at the working size with h (0-1 scale)
    flow_error: float             # the same with the dense flow

    nbytes = 256                  # what a flow cache counts for it

    def at_size(self, src: tuple[int, int], dst: tuple[int, int]) -> "GlobalMotion":
        """The same motion in the pixel coordinates of pictures of (width, height) `dst` instead of
        `src` (a conjugation, under which the logarithm goes along)."""
        return GlobalMotion(h=to_size(self.h, src, dst), log=to_size(self.log, src, dst), matches=self.matches,
                            error=self.error, flow_error=self.flow_error)

    def power(self, s: float) -> np.ndarray:
        return expm(float(s) * self.log)

    def moved(self, a: np.ndarray, b: np.ndarray, s: float) -> tuple[np.ndarray, ...]:
        """Full-size captures a and b moved to the place at fraction s, with where each is seen
        there (1 inside its picture, 0 outside): (W_A, v_A, W_B, v_B) as models.pairs.moved_pair gives."""
        h, w = a.shape[:2]
        out = []
        for img, m in ((a, self.power(s)), (b, self.power(s - 1.0))):
            seen = np.ones((h, w, 1), np.float32)
            if np.array_equal(m, np.eye(3)):  # a still pair, or a capture at its own place: nothing to move
                out += [np.asarray(img, np.float32), seen]
                continue
            both = np.concatenate([np.asarray(img, np.float32), seen], axis=-1)
            # dst(y) = src(m^-1 y): A at H^-s y, B at H^(1-s) y
            moved = cv2.warpPerspective(both, m, (w, h), flags=cv2.INTER_CUBIC, borderMode=cv2.BORDER_CONSTANT)
            moved = moved.reshape(h, w, -1)
            out += [np.clip(moved[..., :-1], 0.0, 1.0), np.clip(moved[..., -1:], 0.0, 1.0)]
        return tuple(out)


def _normalised(h: np.ndarray) -> np.ndarray:
    det = float(np.linalg.det(h))
    if not np.isfinite(det) or det <= 0:
        raise ValueError("the map flips or collapses the picture")
    return h / np.cbrt(det)


def _log(h: np.ndarray) -> np.ndarray:
    log = logm(h)
    if np.iscomplexobj(log):
        if np.abs(log.imag).max() > 1e-6:
            raise ValueError("the map has no real logarithm (a half turn or a reflection)")
        log = log.real
    return np.asarray(log, dtype=np.float64)


def _reprojection(h: np.ndarray, src: np.ndarray, dst: np.ndarray) -> np.ndarray:
    p = np.c_[src, np.ones(len(src))] @ h.T
    return np.linalg.norm(p[:, :2] / p[:, 2:] - dst, axis=1)


def homography(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, int] | None:
    """(H, inliers) with A(x) ~ B(H x), from ORB features of the two float (H, W, C) images matched
    both ways (Hamming distance, cross-checked); None when too few features match. Two models are
    fitted robustly: a similarity (turn, zoom and shift: 4 numbers, RANSAC) and a full homography
    (8 numbers, MAGSAC++). The homography is taken only where it places the matches clearly better
    (median error below PERSPECTIVE_GAIN of the similarity's): its perspective terms rest on the
    far corners and, where the motion has none, only add their own error there."""
    orb = cv2.ORB_create(FEATURES)
    ka, da = orb.detectAndCompute(lflow.luma8(a), None)
    kb, db = orb.detectAndCompute(lflow.luma8(b), None)
    if da is None or db is None or len(ka) < MIN_MATCHES or len(kb) < MIN_MATCHES:
        return None
    matches = cv2.BFMatcher(cv2.NORM_HAMMING, crossCheck=True).match(da, db)
    if len(matches) < MIN_MATCHES:
        return None
    src = np.float32([ka[m.queryIdx].pt for m in matches])
    dst = np.float32([kb[m.trainIdx].pt for m in matches])
    sim, inliers = cv2.estimateAffinePartial2D(src, dst, method=cv2.RANSAC, ransacReprojThreshold=RANSAC_PX)
    full, full_inliers = cv2.findHomography(src, dst, cv2.USAC_MAGSAC, RANSAC_PX)
    best = None
    if sim is not None and int(inliers.sum()) >= MIN_MATCHES:
        best = (np.vstack([sim, [0.0, 0.0, 1.0]]), inliers.ravel().astype(bool))
    if full is not None and int(full_inliers.sum()) >= MIN_MATCHES:
        keep = full_inliers.ravel().astype(bool)
        if best is None or (np.median(_reprojection(full, src[keep], dst[keep]))
                            < PERSPECTIVE_GAIN * np.median(_reprojection(best[0], src[keep], dst[keep]))):
            best = (full, keep)
    if best is None:
        return None
    return best[0], int(best[1].sum())


def to_size(h: np.ndarray, src: tuple[int, int], dst: tuple[int, int]) -> np.ndarray:
    """H in the pixel coordinates of a picture of (width, height) `src` rewritten for `dst` (pixel
    centres kept: x_dst = k (x_src + 1/2) - 1/2)."""
    kx, ky = dst[0] / src[0], dst[1] / src[1]
    t = np.array([[kx, 0.0, 0.5 * kx - 0.5], [0.0, ky, 0.5 * ky - 0.5], [0.0, 0.0, 1.0]])
    return t @ h @ np.linalg.inv(t)


def _mismatch(a: np.ndarray, moved: np.ndarray, seen: np.ndarray) -> float:
    h, w = a.shape[:2]
    ey, ex = int(EDGE * h), int(EDGE * w)
    inner = np.zeros((h, w), bool)
    inner[ey:h - ey, ex:w - ex] = True
    inner &= seen[..., 0] > 0.99
    if not inner.any():
        return float("inf")
    return float(np.abs(a - moved).mean(axis=-1)[inner].mean())


def fit(a_full: np.ndarray, b_full: np.ndarray, a: np.ndarray, b: np.ndarray,
        flow_ab: np.ndarray) -> GlobalMotion | None:
    """The global motion from capture A to B (full-size images a_full, b_full; working-size a, b
    and the dense flow a -> b there), or None when the pair moves otherwise: too few features
    match, the map cannot be followed in steps, or at the working size it leaves more than
    MATCH_SLACK times the dense flow's error."""
    h, w = a.shape[:2]
    ones = np.ones((h, w, 1), np.float32)
    flow_error = _mismatch(a, lflow.warp(b, flow_ab), ones)
    still = _mismatch(a, np.asarray(b, np.float32), ones)
    if still <= STILL_SLACK * flow_error + 1e-3:  # nothing moves (light alone changes): nothing is moved
        return GlobalMotion(h=np.eye(3), log=np.zeros((3, 3)), matches=0, error=still, flow_error=flow_error)
    found = homography(a_full, b_full)
    if found is None:
        return None
    full_h, inliers = found
    try:
        full_h = _normalised(full_h)
        log = _log(full_h)
    except ValueError:
        return None
    size_full, size = a_full.shape[1::-1], a.shape[1::-1]
    small_h = to_size(full_h, size_full, size)
    # B at H y, and where that lies inside B
    both = cv2.warpPerspective(np.concatenate([np.asarray(b, np.float32), ones], axis=-1), small_h, (w, h),
                               flags=cv2.INTER_LINEAR | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_CONSTANT)
    both = both.reshape(h, w, -1)
    error = _mismatch(a, both[..., :-1], both[..., -1:])
    flow_error = _mismatch(a, lflow.warp(b, flow_ab), both[..., -1:])  # on the same pixels
    if not error <= MATCH_SLACK * flow_error + 1e-3:
        return None
    return GlobalMotion(h=full_h, log=log, matches=inliers, error=error, flow_error=flow_error)
