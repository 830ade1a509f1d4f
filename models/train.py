"""CPU training of the manifold-shaped autoencoder on one scene.

Each step draws a batch of collinear triplets, encodes and decodes the images they touch, and
minimises reconstruction + collinearity + isometry + the two heads' regression losses.
A share of the scene is held out (never trained on, never in the bank) for validation and for
calibrating confidence.
"""
from __future__ import annotations

import math
import os
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, TextIO

import numpy as np
import torch

from . import losses
from .config import Stored
from .metrics import psnr_batch, ssim_batch
from .nets import Autoencoder, ModelConfig
from .params import ParamSpace
from .scene import Scene
from .spacing import balanced_spacing
from .triplets import Triplets, mine_triplets


@dataclass
class TrainConfig(Stored):
    steps: int = 2400
    batch_triplets: int = 8
    extra_images: int = 8          # random images added to every batch beside the triplets'
    lr: float = 3e-3
    warmup: float = 0.03           # share of steps with a linear warm-up
    final_lr_share: float = 0.02   # cosine decay ends at this share of lr
    w_collinear: float = 1.0
    w_isometry: float = 0.05
    w_heads: float = 0.05
    w_ssim: float = 0.0            # weight of (1 - SSIM) beside the pixel loss
    triplet_span: float = 3.0      # spacing units
    triplet_tolerance: float = 0.15
    holdout: float = 0.15
    seed: int = 0
    budget_seconds: float | None = None  # wall-clock cap; the schedule is compressed to fit it
    confidence_tau: float = 0.90   # a frame is faithful when its SSIM against the truth is >= tau



@dataclass
class TrainResult:
    model: Autoencoder
    model_config: ModelConfig
    train_config: TrainConfig
    train_idx: np.ndarray
    holdout_idx: np.ndarray
    scale: np.ndarray              # settings spacing per axis
    metrics: dict
    history: list[dict] = field(default_factory=list)


def split_holdout(n: int, share: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Random held-out share (at least one sample when share > 0); both index arrays sorted."""
    if not 0.0 <= share < 0.9:
        raise ValueError(f"holdout share must be in [0, 0.9), got {share}")
    n_hold = int(round(n * share)) if share > 0 else 0
    n_hold = max(n_hold, 1) if share > 0 else 0
    perm = np.random.default_rng(seed).permutation(n)
    return np.sort(perm[n_hold:]), np.sort(perm[:n_hold])


def to_tensor(images: np.ndarray) -> torch.Tensor:
    """(N, H, W, C) numpy in [0, 1] to (N, C, H, W) float32 tensor."""
    return torch.from_numpy(np.ascontiguousarray(np.transpose(images, (0, 3, 1, 2)), dtype=np.float32))


def to_images(x: torch.Tensor) -> np.ndarray:
    """(N, C, H, W) tensor to (N, H, W, C) float32 numpy."""
    return np.transpose(x.detach().cpu().numpy(), (0, 2, 3, 1)).astype(np.float32)


class Progress:
    """A one-line progress bar on a stream: step, losses, ETA. Redraws at most every `every` s."""

    def __init__(self, stream: TextIO | None = sys.stderr, every: float = 0.5):
        self.stream, self.every = stream, every
        self.start = time.perf_counter()
        self.last = -math.inf

    def update(self, step: int, done: float, logs: dict, force: bool = False) -> None:
        """`done` in [0, 1]: the share of training finished (by steps or by budget)."""
        now = time.perf_counter()
        if self.stream is None or (not force and now - self.last < self.every):
            return
        self.last = now
        done = min(max(done, 0.0), 1.0)
        eta = (now - self.start) * (1 - done) / max(done, 1e-9)
        bar = "#" * int(24 * done)
        text = " ".join(f"{k} {v:.4g}" for k, v in logs.items())
        self.stream.write(f"\rtrain [{bar:<24}] step {step} {text} eta {eta:4.0f}s ")
        if force:
            self.stream.write("\n")
        self.stream.flush()


def _lr_at(done: float, cfg: TrainConfig) -> float:
    """Learning rate at `done` in [0, 1] of training: linear warm-up, then cosine decay."""
    if done < cfg.warmup:
        return cfg.lr * max(done, 1e-3) / cfg.warmup
    u = min(1.0, (done - cfg.warmup) / max(1e-9, 1.0 - cfg.warmup))
    low = cfg.lr * cfg.final_lr_share
    return low + 0.5 * (cfg.lr - low) * (1 + math.cos(math.pi * u))


def default_model_config(scene: Scene, **overrides) -> ModelConfig:
    """Latent dimension = number of parameters + one per periodic parameter, unless overridden."""
    kw = dict(resolution=scene.resolution, channels=scene.channels,
              latent_dim=scene.space.feature_dim, feature_dim=scene.space.feature_dim)
    kw.update({k: v for k, v in overrides.items() if v is not None})
    return ModelConfig(**kw)


@dataclass(frozen=True)
class Checkpoint:
    """Where a training saves its state every `every` steps, and resumes from when the file exists:
    weights, optimiser, step, elapsed seconds and both random generators, so a resumed training
    takes the same steps as one that was never stopped."""
    path: Path
    every: int = 200

    def load(self) -> dict | None:
        if not self.path.is_file():
            return None
        return torch.load(self.path, weights_only=False)  # our own file, written by save() below

    def save(self, state: dict) -> None:
        tmp = self.path.with_name(self.path.name + ".tmp")
        torch.save(state, tmp)
        os.replace(tmp, self.path)  # a kill mid-write leaves the previous checkpoint whole


def train(scene: Scene, model_config: ModelConfig | None = None, train_config: TrainConfig | None = None,
          *, progress: TextIO | None = sys.stderr, on_step: Callable[[int, int], None] | None = None,
          checkpoint: Checkpoint | None = None) -> TrainResult:
    """Train on `scene`; `on_step(done, total)` lets a job report progress (and cancel by raising);
    with a `checkpoint` the training resumes where its last saved state left it."""
    cfg = train_config or TrainConfig()
    mcfg = model_config or default_model_config(scene)
    space = scene.space
    torch.manual_seed(cfg.seed)
    rng = np.random.default_rng(cfg.seed)

    train_idx, hold_idx = split_holdout(len(scene.params), cfg.holdout, cfg.seed)
    params = scene.params[train_idx]
    scale = balanced_spacing(space, scene.params, scene.images)
    trip = mine_triplets(params, space, scale=scale, span=cfg.triplet_span, tolerance=cfg.triplet_tolerance)
    x_all = to_tensor(scene.images[train_idx])                           # (N, C, H, W)
    feats = torch.from_numpy(space.features(params).astype(np.float32))  # (N, F)
    n = len(train_idx)

    model = Autoencoder(mcfg)
    opt = torch.optim.Adam(model.parameters(), lr=cfg.lr)
    total = cfg.steps
    bar = Progress(progress)
    history: list[dict] = []
    t0 = time.perf_counter()
    step = 0
    saved = checkpoint.load() if checkpoint is not None else None
    if saved is not None:
        model.load_state_dict(saved["model"])
        opt.load_state_dict(saved["optimiser"])
        rng.bit_generator.state = saved["numpy_rng"]
        torch.set_rng_state(saved["torch_rng"])
        step, history = saved["step"], saved["history"]
        t0 -= saved["elapsed"]
    while step < total:
        # progress is the larger of steps done and budget used, so a wall-clock budget compresses
        # the whole schedule (warm-up and decay) instead of cutting it off
        done = step / total
        if cfg.budget_seconds is not None:
            done = max(done, (time.perf_counter() - t0) / cfg.budget_seconds)
        for group in opt.param_groups:
            group["lr"] = _lr_at(done, cfg)
        logs = _step(model, opt, x_all, feats, params, space, scale, trip, cfg, rng, n)
        step += 1
        if step == 1 or step % 50 == 0 or step == total:
            history.append({"step": step, **logs})
        over = cfg.budget_seconds is not None and time.perf_counter() - t0 > cfg.budget_seconds
        share = 1.0 if over else max(done, step / total)
        bar.update(step, share, logs, force=step == total or over)
        if on_step is not None:
            on_step(round(share * total), total)
        if over:
            break
        if checkpoint is not None and step % checkpoint.every == 0 and step < total:
            checkpoint.save({"model": model.state_dict(), "optimiser": opt.state_dict(), "step": step,
                             "numpy_rng": rng.bit_generator.state, "torch_rng": torch.get_rng_state(),
                             "history": history, "elapsed": time.perf_counter() - t0})
    wall = time.perf_counter() - t0
    model.eval()
    metrics = evaluate_fit(model, scene, train_idx, hold_idx, trip)
    metrics.update({"train_seconds": round(wall, 2), "steps": step, "triplets": len(trip)})
    return TrainResult(model, mcfg, cfg, train_idx, hold_idx, scale, metrics, history)


def _step(model: Autoencoder, opt: torch.optim.Optimizer, x_all: torch.Tensor, feats: torch.Tensor,
          params: np.ndarray, space: ParamSpace, scale: np.ndarray, trip: Triplets, cfg: TrainConfig,
          rng: np.random.Generator, n: int) -> dict:
    model.train()
    if len(trip):
        pick = rng.integers(0, len(trip), size=min(cfg.batch_triplets, len(trip)))
        s, m, t, a = trip.s[pick], trip.m[pick], trip.t[pick], trip.a[pick]
    else:
        s = m = t = np.zeros(0, dtype=int)
        a = np.zeros(0)
    extra = rng.integers(0, n, size=cfg.extra_images)
    idx, inverse = np.unique(np.concatenate([s, m, t, extra]), return_inverse=True)
    k = len(s)
    ps, pm, pt = inverse[:k], inverse[k:2 * k], inverse[2 * k:3 * k]

    x = x_all[idx]
    z, x_hat = model(x)                                     # (B, d), (B, C, H, W)
    loss_rec = losses.reconstruction(x_hat, x)
    loss = loss_rec
    logs = {"rec": float(loss_rec.detach())}
    if cfg.w_ssim:
        loss_ssim = 1.0 - losses.ssim(x_hat, x)
        loss = loss + cfg.w_ssim * loss_ssim
        logs["ssim"] = float(loss_ssim.detach())
    if k:
        a_t = torch.from_numpy(a.astype(np.float32))
        loss_col = losses.collinearity(z[ps], z[pm], z[pt], a_t)
        d_st = space.distance(params[s], params[t], scale)
        d_sm = space.distance(params[s], params[m], scale)
        dist = torch.from_numpy(np.concatenate([d_st, d_sm]).astype(np.float32))
        loss_iso = losses.isometry(torch.cat([z[ps], z[ps]]), torch.cat([z[pt], z[pm]]), dist)
        loss = loss + cfg.w_collinear * loss_col + cfg.w_isometry * loss_iso
        logs.update(col=float(loss_col.detach()), iso=float(loss_iso.detach()))
    f = feats[idx]
    loss_heads = (torch.nn.functional.mse_loss(model.to_code(f), z.detach())
                  + torch.nn.functional.mse_loss(model.to_features(z), f))
    loss = loss + cfg.w_heads * loss_heads
    logs["heads"] = float(loss_heads.detach())
    opt.zero_grad(set_to_none=True)
    loss.backward()
    opt.step()
    return logs


@torch.inference_mode()
def encode(model: Autoencoder, images: np.ndarray, batch: int = 256) -> np.ndarray:
    """(N, H, W, C) images to (N, d) float64 codes."""
    model.eval()
    out = [model.encoder(to_tensor(images[i:i + batch])) for i in range(0, len(images), batch)]
    return torch.cat(out).double().numpy() if out else np.zeros((0, model.cfg.latent_dim))


@torch.inference_mode()
def decode(model: Autoencoder, codes: np.ndarray, batch: int = 256) -> np.ndarray:
    """(N, d) codes to (N, H, W, C) float32 images in [0, 1]."""
    model.eval()
    z = torch.as_tensor(np.asarray(codes), dtype=torch.float32)
    return np.concatenate([to_images(model.decoder(z[i:i + batch])) for i in range(0, len(z), batch)])


def evaluate_fit(model: Autoencoder, scene: Scene, train_idx: np.ndarray, hold_idx: np.ndarray,
                 trip: Triplets) -> dict:
    """Reconstruction PSNR/SSIM (dB, [0, 1]) on training and held-out images; mean triplet loss,
    over all triplets and split by whether the triplet moves along a periodic parameter (a closed
    loop cannot be straight, so those keep a floor the collinearity term cannot remove)."""
    out: dict = {}
    for label, idx in (("train", train_idx), ("holdout", hold_idx)):
        if len(idx) == 0:
            continue
        truth = scene.images[idx]
        recon = decode(model, encode(model, truth))
        out[f"{label}_psnr"] = round(float(np.mean(np.minimum(psnr_batch(recon, truth), 99.0))), 3)
        out[f"{label}_ssim"] = round(float(np.mean(ssim_batch(recon, truth))), 4)
    if len(trip):
        z = torch.from_numpy(encode(model, scene.images[train_idx]).astype(np.float32))
        a = torch.from_numpy(trip.a.astype(np.float32))
        out["collinearity"] = round(float(losses.collinearity(z[trip.s], z[trip.m], z[trip.t], a)), 6)
        params = scene.params[train_idx]
        moves = scene.space.delta(params[trip.t], params[trip.s])[:, scene.space.periodic]
        loop = np.any(np.abs(moves) > 1e-9, axis=1)
        for key, rows in (("collinearity_periodic", loop), ("collinearity_other", ~loop)):
            if rows.any():
                r = np.flatnonzero(rows)
                out[key] = round(float(losses.collinearity(z[trip.s[r]], z[trip.m[r]], z[trip.t[r]], a[r])), 6)
    return out
