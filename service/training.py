"""Train-and-register: a scene folder in, a published model version out. The one recipe the
`train` command and the trainings route both call."""
from __future__ import annotations

import sys
from pathlib import Path
from typing import Callable

from ..models.bundle import read_manifest
from ..models.calibrate import DEFAULT_TAU
from ..models.pipeline import train_bundle
from ..models.scene import load_scene
from ..models.train import Checkpoint, TrainConfig, default_model_config
from .registry import ModelVersion, Registry, check_name


def _check(name: str, tau: float) -> None:
    check_name(name)
    if isinstance(tau, bool) or not isinstance(tau, (int, float)) or not 0.0 < tau < 1.0:
        raise ValueError(f"tau: {tau!r} is out of range; allowed 0 < tau < 1 (an SSIM threshold)")


def build_bundle(scene_dir: str | Path, folder: Path, name: str, *, resolution: int = 64,
                 latent_dim: int | None = None, steps: int | None = None, budget: float | None = None,
                 seed: int = 0, tau: float = DEFAULT_TAU, quiet: bool = False,
                 on_step: Callable[[int, int], None] | None = None, checkpoint: Checkpoint | None = None,
                 max_size: int | None = 1024) -> None:
    """Load a scene folder, train (resolution in pixels per side, budget in wall-clock seconds) and
    write the bundle of model `name` into `folder`. `tau` is the SSIM against the true view that the
    model's confidence will speak about; with a `checkpoint` the training resumes from its last
    saved state. Captures larger than the model are kept at their own size, the long side capped at
    `max_size` (None: not kept), for frames at full size. Progress goes to stderr unless `quiet`."""
    _check(name, tau)
    scene = load_scene(Path(scene_dir), resolution=resolution, max_size=max_size)
    tcfg = TrainConfig(seed=seed, budget_seconds=budget, confidence_tau=float(tau))
    if steps is not None:
        tcfg.steps = steps
    mcfg = default_model_config(scene, latent_dim=latent_dim)
    train_bundle(scene, folder, name=name, model_config=mcfg, train_config=tcfg,
                 progress=None if quiet else sys.stderr, on_step=on_step, checkpoint=checkpoint)


def train_into_registry(scene_dir: str | Path, name: str, registry: Registry, *, resolution: int = 64,
                        latent_dim: int | None = None, steps: int | None = None, budget: float | None = None,
                        seed: int = 0, tau: float = DEFAULT_TAU, quiet: bool = False,
                        on_step: Callable[[int, int], None] | None = None, max_size: int | None = 1024) -> ModelVersion:
    """`build_bundle` straight into the next version of `name`; returns the new ModelVersion. The
    name and tau are checked before minutes of training, not after."""
    _check(name, tau)
    return registry.publish(name, lambda folder: build_bundle(
        scene_dir, folder, name, resolution=resolution, latent_dim=latent_dim, steps=steps, budget=budget,
        seed=seed, tau=tau, quiet=quiet, on_step=on_step, max_size=max_size))


def calibration_warning(entry: ModelVersion) -> str | None:
    """Plain words when the model's frames will be rejected whatever they look like (no confidence,
    or one conservative rate because too few held-out frames reached tau); None otherwise."""
    return read_manifest(entry.path).calibration_summary()["warning"]
