"""Tiny scenes and training settings shared by the fixtures and the tests (import from here, not
from a conftest: each test folder has its own conftest module)."""
from pathlib import Path

import numpy as np

from geotween.models.render import DEMO_SPACE, render_many
from geotween.models.scene import Scene

SMALL_TRAIN = dict(steps=400, batch_triplets=8, extra_images=6, lr=3e-3, confidence_tau=0.85)


def tiny_demo_scene(size: int = 16, az_step: float = 45.0, elevations=(20.0, 45.0, 70.0)) -> Scene:
    """The demo relief tile on a coarse grid at a tiny resolution."""
    az, el = np.meshgrid(np.arange(0.0, 360.0, az_step), np.asarray(elevations), indexing="ij")
    params = np.stack([az.ravel(), el.ravel()], axis=-1)
    return Scene(name="tiny-tile", space=DEMO_SPACE, images=render_many(params, size), params=params,
                 files=[f"{i:04d}.png" for i in range(len(params))], root=Path("."))
