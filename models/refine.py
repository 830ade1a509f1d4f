"""Detail transfer: real texture from the nearest bank images onto a decoded frame.

The decoded frame gives structure (where things are, how they are lit); the bank's real images
give detail the small decoder blurs away. For each frame, its `k` nearest bank images (by code, default 1)
are warped onto it with dense optical flow (`models.flow`), and each is trusted per pixel only
where, blurred to the decoded frame's own sharpness, it agrees with the decoded frame. Only their
fine detail is carried over; the coarse picture (the lighting, the layout) stays the decoded one:

    a_j(x) = exp(-(e_j(x) / tol)^2),   e_j = spread(|match(W_j) - D|)   (mean over channels)
    H(I)   = I - split(I)                                              (fine detail of I)
    out    = split(D) + b * sum_j a_j H(W_j) / sum_j a_j + (1 - b) * H(D),   b = max_j a_j

with match, spread and split Gaussian blurs. Keeping the decoded frame's coarse picture matters
where the light moves: a neighbour lit from a few degrees away agrees within tolerance but is a
little brighter or darker everywhere (measured on the lamp scene at 64 px: swapping whole pixels
lost up to 0.4 dB on single held-out frames, swapping detail only at most 0.14 dB). Comparing against the decoded frame itself, not a blurred
copy, matters: flow can bend a neighbour lit from elsewhere until its blurred version looks like
a blurred decoded frame, and then wrong shadows pass (measured on the lamp scene: the blurred-both
test lost up to 6 dB on single frames, this one at most 0.1 dB, see bench/RESULTS.md).

so where the lighting changed, or a view was never seen (disocclusions), the warped images
disagree and the frame falls back to the decoded pixels. Whether a model refines at all is
chosen at training time on its held-out share (`models.calibrate.choose_refine`): it is on only
where it wins, and the confidence is then fitted on refined frames.
"""
from __future__ import annotations

from concurrent.futures import Executor
from dataclasses import asdict, dataclass
from typing import Mapping

import numpy as np
from scipy.ndimage import gaussian_filter

from . import flow as lflow


@dataclass(frozen=True)
class RefineConfig:
    neighbours: int = 1      # bank images warped onto each frame (2 measured no better, at twice the cost)
    match: float = 1.0       # px, Gaussian sigma that blurs a warped image to a decoded frame's sharpness
    spread: float = 1.5      # px, Gaussian sigma over which a pixel's disagreement is pooled
    split: float = 1.5       # px, Gaussian sigma that separates fine detail from the coarse picture
    tolerance: float = 0.05  # disagreement (in [0, 1] intensity) at which trust falls to 1/e

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, d: dict | None) -> "RefineConfig":
        names = cls.__dataclass_fields__
        return cls(**{k: v for k, v in (d or {}).items() if k in names})


def choice(manifest: Mapping) -> dict:
    """A bundle manifest's detail-transfer choice, read the one way the engine, the API and the
    CLI use: {"on", "chosen", "config", "holdout"}. "chosen" is False for a bundle trained without a
    choice (it never refines); "holdout" is {"decoded": {psnr, ssim}, "refined": {psnr, ssim,
    detail}}, the held-out figures behind the choice, or None."""
    entry = manifest.get("refine")
    if not isinstance(entry, Mapping) or not entry:
        return {"on": False, "chosen": False, "config": None, "holdout": None}
    held = entry.get("holdout") or {}
    scores = None
    if held.get("decoded") and held.get("refined"):
        dec, ref = held["decoded"], held["refined"]
        scores = {"decoded": {"psnr": dec.get("psnr"), "ssim": dec.get("ssim")},
                  "refined": {"psnr": ref.get("psnr"), "ssim": ref.get("ssim"), "detail": ref.get("detail")}}
    config = entry.get("config")
    return {"on": bool(entry.get("on", False)), "chosen": True,
            "config": dict(config) if isinstance(config, Mapping) else None, "holdout": scores}


def _blur(img: np.ndarray, sigma: float) -> np.ndarray:
    return gaussian_filter(img, sigma=(sigma, sigma, 0), mode="nearest")


def refine_frame(decoded: np.ndarray, refs: np.ndarray, cfg: RefineConfig = RefineConfig()
                 ) -> tuple[np.ndarray, float]:
    """(refined (H, W, C) float32, share of pixels taken from real images) for one decoded frame
    and its (k, H, W, C) reference images."""
    decoded = np.asarray(decoded, dtype=np.float32)
    num = np.zeros_like(decoded)
    den = np.zeros(decoded.shape[:2] + (1,), dtype=np.float32)
    best = np.zeros_like(den)
    for ref in refs:
        warped = lflow.warp(ref, lflow.flow(decoded, ref))
        err = np.abs(_blur(warped, cfg.match) - decoded).mean(axis=2, keepdims=True)
        trust = np.exp(-(_blur(err, cfg.spread) / cfg.tolerance) ** 2)
        num += trust * (warped - _blur(warped, cfg.split))
        den += trust
        best = np.maximum(best, trust)
    coarse = _blur(decoded, cfg.split)
    out = coarse + best * num / np.maximum(den, 1e-6) + (1.0 - best) * (decoded - coarse)
    return np.clip(out, 0.0, 1.0).astype(np.float32), float(best.mean())


def refine(decoded: np.ndarray, refs: np.ndarray, cfg: RefineConfig = RefineConfig(), *,
           pool: Executor | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(N, H, W, C) decoded frames and (N, k, H, W, C) references -> refined frames and, per
    frame, the share of pixels taken from real images. With `pool`, frames are refined on its
    threads (OpenCV and scipy's filters release the GIL)."""
    work = [(d, r, cfg) for d, r in zip(decoded, refs)]
    pairs = list(pool.map(lambda w: refine_frame(*w), work)) if pool is not None and len(work) > 1 \
        else [refine_frame(*w) for w in work]
    if not pairs:
        return np.asarray(decoded, dtype=np.float32), np.zeros(0)
    return np.stack([p[0] for p in pairs]), np.array([p[1] for p in pairs])
