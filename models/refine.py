"""Detail transfer: real texture from the nearest bank images onto a decoded frame.

The decoded frame gives structure (where things are, how they are lit); the bank's real images
give detail the small decoder blurs away. For each frame, its `k` nearest bank images (by code,
default 1) are warped onto it with dense optical flow (`models.flow`), or taken where they stand
when the model's flow setting is "none" (a fixed camera and subject, only the light moving: there
is no motion to follow, and estimating it costs most of the step), and each is trusted per
pixel only where, blurred to the decoded frame's own sharpness, it agrees with the decoded frame,
so where the lighting changed, or a view was never seen (disocclusions), the warped images
disagree and the frame falls back to the decoded pixels. Only their fine detail is carried over;
the coarse picture (the lighting, the layout) stays the decoded one:

    a_j(x) = exp(-(e_j(x) / tol)^2),   e_j = spread(|match(W_j) - D|)   (mean over channels)
    H(I)   = I - split(I)                                              (fine detail of I)
    out    = split(D) + b * sum_j a_j H(W_j) / sum_j a_j + (1 - b) * H(D),   b = max_j a_j

with match, spread and split Gaussian blurs. Keeping the decoded frame's coarse picture matters
where the light moves: a neighbour lit from a few degrees away agrees within tolerance but is a
little brighter or darker everywhere (measured on the lamp scene at 64 px: swapping whole pixels
lost up to 0.4 dB on single held-out frames, swapping detail only at most 0.14 dB). Comparing
against the decoded frame itself, not a blurred copy, matters: flow can bend a neighbour lit from
elsewhere until its blurred version looks like a blurred decoded frame, and then wrong shadows
pass (measured on the lamp scene: the blurred-both test lost up to 6 dB on single frames, this
one at most 0.1 dB, see bench/RESULTS.md).

Whether a model refines at all, and with which flow and tolerance, is chosen at training time on
its held-out share (`models.calibrate.choose_refine`): it is on only where it wins, the flow is the
cheapest that does as well as the best, and the confidence is then
fitted on refined frames (with a second one on the decoded frames, for requests that skip it).
"""
from __future__ import annotations

from concurrent.futures import Executor
from dataclasses import asdict, dataclass

import cv2
import numpy as np

from . import flow as lflow

FLOWS = lflow.METHODS + ("none",)  # "none": each bank image is used where it stands, not warped
# "detail": detail from the nearest bank images onto the decoded frame (this module); "pair": the
# frame made from the two captures that bracket it, the decoded frame arbitrating (models.pairs)
MODES = ("detail", "pair")


@dataclass(frozen=True)
class RefineConfig:
    neighbours: int = 1      # bank images warped onto each frame (2 measured no better, at twice the cost)
    match: float = 1.0       # px, Gaussian sigma that blurs a warped image to a decoded frame's sharpness
    spread: float = 1.5      # px, Gaussian sigma over which a pixel's disagreement is pooled
    split: float = 1.5       # px, Gaussian sigma that separates fine detail from the coarse picture
    tolerance: float = 0.05  # disagreement (in [0, 1] intensity) at which trust falls to 1/e
    flow: str = "dis"        # flow estimator (FLOWS): DIS measured as good as Farneback, 4x faster
    mode: str = "detail"     # MODES; "pair" uses `flow` (not "none") and `tolerance` (agreement of the two captures)

    def __post_init__(self):
        if self.mode not in MODES:
            raise ValueError(f"refine mode: {self.mode!r} is not allowed; expected one of {list(MODES)}")
        allowed = lflow.METHODS if self.mode == "pair" else FLOWS
        if self.flow not in allowed:
            raise ValueError(f"refine flow: {self.flow!r} is not allowed with mode {self.mode!r}; "
                             f"expected one of {list(allowed)}")

    def to_dict(self) -> dict:
        """The stored config; `mode` only when it is not "detail" (what a config without one means),
        so bundles written before the mode existed read back to the same manifest."""
        out = asdict(self)
        if out["mode"] == "detail":
            del out["mode"]
        return out

    @classmethod
    def from_dict(cls, d: dict | None) -> "RefineConfig":
        """A stored config; one written before the flow choice existed was chosen and calibrated
        with Farneback flow, and keeps it."""
        names = cls.__dataclass_fields__
        kept = {k: v for k, v in (d or {}).items() if k in names}
        kept.setdefault("flow", "farneback")
        kept.setdefault("mode", "detail")  # written before frames could be made from bracketing captures
        return cls(**kept)


_CHANNELS = 128  # channels per OpenCV call (OpenCV 5 takes at most 128; 4.x, 512)


def blur(x: np.ndarray, sigma: float) -> np.ndarray:
    """Gaussian blur over H and W of (..., H, W, C) float32 images, edges repeated. The images go
    through OpenCV as one many-channel image (up to 128 channels a call): OpenCV's kernel reaches
    4 sigma like scipy.ndimage.gaussian_filter's default and matches it to 1e-6, in a fifth of
    its time on 64 px frames, and one call for a batch spares the per-frame overhead."""
    h, w = x.shape[-3:-1]
    planes = np.moveaxis(x.reshape(-1, h, w, x.shape[-1]), 0, 2).reshape(h, w, -1)
    out = np.concatenate([cv2.GaussianBlur(np.ascontiguousarray(planes[..., c:c + _CHANNELS]), (0, 0), sigma,
                                           borderType=cv2.BORDER_REPLICATE).reshape(h, w, -1)
                          for c in range(0, planes.shape[-1], _CHANNELS)], axis=2)
    return np.moveaxis(out.reshape(h, w, -1, x.shape[-1]), 2, 0).reshape(x.shape)


def refine_frame(decoded: np.ndarray, refs: np.ndarray, cfg: RefineConfig = RefineConfig()
                 ) -> tuple[np.ndarray, float]:
    """(refined (H, W, C) float32, share of pixels taken from real images) for one decoded frame
    and its (k, H, W, C) reference images."""
    out, detail = refine(np.asarray(decoded)[None], np.asarray(refs)[None], cfg)
    return out[0], float(detail[0])


def refine(decoded: np.ndarray, refs: np.ndarray, cfg: RefineConfig = RefineConfig(), *,
           pool: Executor | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(N, H, W, C) decoded frames and (N, k, H, W, C) references -> refined frames and, per
    frame, the share of pixels taken from real images. With `pool`, the flows are estimated and
    the references warped on its threads (OpenCV releases the GIL); the rest is whole-batch array
    work. With cfg.flow "none" the references are compared and blended where they stand."""
    decoded = np.asarray(decoded, dtype=np.float32)
    refs = np.asarray(refs, dtype=np.float32)
    if len(decoded) == 0:
        return decoded, np.zeros(0)
    n, k = refs.shape[:2]

    def warped(ij: tuple[int, int]) -> np.ndarray:
        ref = refs[ij]
        return lflow.warp(ref, lflow.flow(decoded[ij[0]], ref, method=cfg.flow))

    if cfg.flow == "none":
        warp = refs
    else:
        jobs = [(i, j) for i in range(n) for j in range(k)]
        done = pool.map(warped, jobs) if pool is not None and len(jobs) > 1 else map(warped, jobs)
        warp = np.stack(list(done)).reshape(refs.shape)                              # (N, k, H, W, C)
    err = np.abs(blur(warp, cfg.match) - decoded[:, None]).mean(axis=-1, keepdims=True)
    trust = np.exp(-(blur(err, cfg.spread) / cfg.tolerance) ** 2)                   # (N, k, H, W, 1)
    best = trust.max(axis=1)
    detail = (trust * (warp - blur(warp, cfg.split))).sum(axis=1) / np.maximum(trust.sum(axis=1), 1e-6)
    coarse = blur(decoded, cfg.split)
    out = coarse + best * detail + (1.0 - best) * (decoded - coarse)
    return np.clip(out, 0.0, 1.0).astype(np.float32), best.reshape(n, -1).mean(axis=1).astype(np.float64)
