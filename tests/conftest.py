"""Shared fixtures: tiny scenes and tiny models, so the suite stays fast on 2 cores."""
from pathlib import Path

import numpy as np
import pytest
import torch

from models.render import DEMO_SPACE, render_many
from models.scene import Scene

torch.set_num_threads(2)  # once, for the whole test session


def tiny_demo_scene(size: int = 16, az_step: float = 45.0, elevations=(20.0, 45.0, 70.0)) -> Scene:
    """The demo relief tile on a coarse grid at a tiny resolution."""
    az, el = np.meshgrid(np.arange(0.0, 360.0, az_step), np.asarray(elevations), indexing="ij")
    params = np.stack([az.ravel(), el.ravel()], axis=-1)
    return Scene(name="tiny-tile", space=DEMO_SPACE, images=render_many(params, size), params=params,
                 files=[f"{i:04d}.png" for i in range(len(params))], root=Path("."))


@pytest.fixture(scope="session")
def tiny_scene() -> Scene:
    return tiny_demo_scene()
