"""Shared fixtures: tiny scenes and tiny models, so the suite stays fast on 2 cores."""
from pathlib import Path

import pytest
import torch
from tiny_scenes import SMALL_TRAIN, tiny_demo_scene

from geotween.models.scene import Scene

torch.set_num_threads(2)  # once, for the whole test session


@pytest.fixture(scope="session")
def tiny_scene() -> Scene:
    return tiny_demo_scene()


@pytest.fixture(scope="session")
def small_scene() -> Scene:
    """16 px demo tile, azimuth every 30 deg x elevation every 10 deg (72 images)."""
    return tiny_demo_scene(size=16, az_step=30.0, elevations=(20.0, 30.0, 40.0, 50.0, 60.0, 70.0))


@pytest.fixture(scope="session")
def small_bundle(small_scene, tmp_path_factory) -> Path:
    """A bundle trained for a few seconds, with its confidence calibrated (tau 0.85)."""
    from geotween.models.pipeline import train_bundle
    from geotween.models.train import TrainConfig

    out = tmp_path_factory.mktemp("small-bundle")
    train_bundle(small_scene, out, name="small-tile", train_config=TrainConfig(**SMALL_TRAIN), progress=None)
    return out


@pytest.fixture(scope="session")
def small_engine(small_bundle):
    from geotween.models.engine import Engine

    return Engine.load(small_bundle)


@pytest.fixture(scope="session")
def service_bundle(tmp_path_factory) -> Path:
    """One tiny uncalibrated bundle (16 px, 10 steps) for the service tests; registries copy it."""
    from geotween.models.pipeline import train_bundle
    from geotween.models.train import TrainConfig

    out = tmp_path_factory.mktemp("service-tiny-bundle")
    train_bundle(tiny_demo_scene(), out, name="tile", progress=None, calibrate=False,
                 train_config=TrainConfig(steps=10, batch_triplets=6, extra_images=4))
    return out
