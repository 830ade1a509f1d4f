"""Helpers shared by the HTTP service tests (test_api*.py and conftest.py): the limits and key the
test apps run with, request bodies, and bundles given a confidence or a detail-transfer choice."""
import base64
import io
import json
import shutil
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
from PIL import Image
from prometheus_client.parser import text_string_to_metric_families

from geotween.models.confidence import fit_confidence
from geotween.models.engine import FITTED_SIGNALS as SIGNALS
from geotween.models.engine import Engine, ServingConfig

KEY = "test-key-0123456789abcdef"
LIMITS = dict(max_body_bytes=256 * 1024, max_image_pixels=1_000_000, max_frames=16, max_fill_sync=4,
              max_fill_targets=64)


def P(az, el):
    return {"lamp_azimuth": az, "lamp_elevation": el}


def png(arr: np.ndarray, fmt: str = "PNG") -> bytes:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format=fmt)
    return buf.getvalue()


def b64(data: bytes) -> str:
    return base64.b64encode(data).decode()


def with_confidence(src: Path, folder: Path) -> None:
    """Copy a bundle and give it a fitted confidence model (outcome: the frame's summed
    off-manifold signals below their median), so accepted/rejected both occur."""
    shutil.copytree(src, folder, dirs_exist_ok=True)
    engine = Engine.load(src)
    az, el = np.meshgrid(np.arange(5.0, 360.0, 30.0), [25.0, 45.0, 65.0], indexing="ij")
    frames = engine.fill([P(a, e) for a, e in zip(az.ravel(), el.ravel())], min_confidence=0.5)
    sig = np.array([[f.signals[k] for k in SIGNALS] for f in frames])
    outcome = (sig.sum(1) < np.median(sig.sum(1))).astype(float)
    model, report = fit_confidence(sig, outcome, names=list(SIGNALS), seed=0)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["confidence"] = {"tau": 0.9, "signals": list(SIGNALS), "model": model.to_dict()}
    manifest["metrics"]["confidence"] = {"status": "fitted", "tau": 0.9, "ece": report["ece"],
                                         "auroc": report["auroc"], "method": report["method"]}
    (folder / "manifest.json").write_text(json.dumps(manifest))



def between_body(**kw):
    return {"start": {"params": P(10, 30)}, "end": {"params": P(100, 60)}, "frames": 3, **kw}


def decode_frame(text: str) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(base64.b64decode(text))))


def metric(c, name: str, **labels) -> float:
    text = c.get("/metrics").text
    total = 0.0
    for family in text_string_to_metric_families(text):  # the reference parser of prometheus_client
        for s in family.samples:
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items()):
                total += s.value
    return total



def with_refine(src: Path, folder: Path, *, on: bool) -> dict:
    """Copy a bundle with its detail-transfer choice made on its own held-out share
    (models.calibrate.choose_refine), then `on` forced either way; returns the manifest entry."""
    from geotween.models.calibrate import choose_refine

    shutil.copytree(src, folder, dirs_exist_ok=True)
    engine = Engine.load(src, ServingConfig(refine=False, holdout_captures=False))
    holdout = engine.bundle.pixels("holdout_images").astype(np.float32) / 255.0
    chosen = choose_refine(engine, engine.bundle.arrays["holdout_params"], holdout)
    # a 10-step model's frames are far from any real image: a wide tolerance lets them take real pixels
    chosen = replace(chosen, on=on, config=replace(chosen.config, tolerance=0.3) if on else chosen.config)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["refine"] = entry = chosen.to_dict()
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return entry


def wait_for(predicate, timeout: float = 20.0, step: float = 0.02):
    """predicate()'s first truthy value, polled every `step` seconds; AssertionError after `timeout`."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(step)
    raise AssertionError(f"condition not met within {timeout} s")
