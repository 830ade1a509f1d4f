"""Scene to bundle: train, encode the bank, calibrate confidence, write the bundle folder."""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Callable, TextIO

import numpy as np

from .bundle import save_bundle
from .manifest import Manifest, Metrics
from .nets import ModelConfig
from .scene import Scene
from .train import Checkpoint, TrainConfig, TrainResult, encode, train


def bank_arrays(result: TrainResult, scene: Scene) -> dict[str, np.ndarray]:
    """Codes, settings and images of the training samples (the bank) and of the held-out share."""
    out = {}
    for prefix, idx in (("", result.train_idx), ("holdout_", result.holdout_idx)):
        # the bank keeps 8-bit images; encode exactly what it keeps so codes and images agree
        images = np.round(np.clip(scene.images[idx], 0.0, 1.0) * 255.0).astype(np.float32) / 255.0
        out[prefix + "codes"] = encode(result.model, images)
        out[prefix + "params"] = scene.params[idx]
        out[prefix + "images"] = images
        if scene.full is not None:  # the captures at their own size, for frames at full size
            out[prefix + "full_images"] = scene.full[idx]
    return out


def train_bundle(scene: Scene, out: str | Path, *, name: str, model_config: ModelConfig | None = None,
                 train_config: TrainConfig | None = None, progress: TextIO | None = sys.stderr,
                 on_step: Callable[[int, int], None] | None = None, calibrate: bool = True,
                 checkpoint: Checkpoint | None = None) -> Manifest:
    """Train on `scene`; on the held-out share choose the route's tube and detail transfer and
    calibrate confidence; write a complete bundle to `out`; returns its manifest."""
    result = train(scene, model_config, train_config, progress=progress, on_step=on_step,
                   checkpoint=checkpoint)
    arrays = bank_arrays(result, scene)
    manifest = Manifest(name=name, model_config=result.model_config, train_config=result.train_config,
                        space=scene.space, scale=tuple(float(s) for s in result.scale),
                        bank_size=len(arrays["codes"]), holdout_size=len(arrays["holdout_codes"]),
                        metrics=Metrics(fit=dict(result.metrics)), scene=scene.name)
    if calibrate:
        from .calibrate import fit_serving
        manifest = fit_serving(manifest, result.model, arrays)
    return save_bundle(out, manifest, result.model, arrays)
