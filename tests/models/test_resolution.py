"""128 px end to end: training, bundle, engine, eval and the HTTP answer."""
import base64
import io
import shutil

import numpy as np
from fastapi.testclient import TestClient
from PIL import Image

from geotween.models.engine import Endpoint, Engine
from geotween.models.evaluate import evaluate
from geotween.models.pipeline import train_bundle
from geotween.models.render import truth_pairs, write_truth
from geotween.models.train import TrainConfig
from tests.conftest import tiny_demo_scene


def test_a_128px_model_trains_serves_and_evaluates(tmp_path):
    scene = tiny_demo_scene(size=128, az_step=120.0, elevations=(20.0, 45.0, 70.0))
    manifest = train_bundle(scene, tmp_path / "bundle", name="tile-128",
                            train_config=TrainConfig(steps=6, batch_triplets=2, extra_images=2), progress=None)
    assert manifest.resolution == 128 and manifest.model_config.resolution == 128
    engine = Engine.load(tmp_path / "bundle")
    ans = engine.between(Endpoint(params={"lamp_azimuth": 0, "lamp_elevation": 20}),
                         Endpoint(params={"lamp_azimuth": 120, "lamp_elevation": 70}), frames=3)
    assert [f.image.shape for f in ans.frames] == [(128, 128, 1)] * 3
    # eval reads a truth set rendered at 128 px
    truth = write_truth(tmp_path / "truth", truth_pairs(2, seed=3), size=128)
    report = evaluate(engine, truth)
    assert report["pairs"] == 2 and np.isfinite(report["methods"]["geodesic"]["psnr"])

    from geotween.service.api import create_app
    from geotween.service.registry import Registry
    from geotween.service.settings import Settings

    root = tmp_path / "registry"
    Registry.open(root).publish("tile-128", lambda f: shutil.copytree(tmp_path / "bundle", f, dirs_exist_ok=True))
    with TestClient(create_app(Settings(registry=root))) as client:
        body = {"start": {"params": {"lamp_azimuth": 0, "lamp_elevation": 20}},
                "end": {"params": {"lamp_azimuth": 120, "lamp_elevation": 70}}, "frames": 2}
        r = client.post("/v1/models/tile-128/between", json=body)
        assert r.status_code == 200, r.text
        png = base64.b64decode(r.json()["frames"][0]["image"])
        assert Image.open(io.BytesIO(png)).size == (128, 128)
