"""HTTP service through FastAPI's TestClient, the frames: between (settings, images, upload, ZIP),
confidence and the accepted/rejected counts, fill (answered or run as a job), and detail transfer.
Operations, models and metrics are in test_api_ops.py; errors, limits and settings in test_api_errors.py."""
import io
import json
import shutil
import time
import zipfile

import numpy as np
import pytest
from api_helpers import (
    LIMITS,
    P,
    b64,
    between_body,
    decode_frame,
    metric,
    png,
    with_confidence,  # noqa: F401  (test_contract imports it from here)
    with_refine,
)
from fastapi.testclient import TestClient
from PIL import Image

from geotween.models.engine import Endpoint, Engine, ServingConfig
from geotween.models.render import render_many
from geotween.service.api import create_app
from geotween.service.registry import Registry
from geotween.service.settings import Settings


# -- between and fill ---------------------------------------------------------------------------
def test_between_serves_the_engines_frames(client, registry):
    r = client.post("/v1/models/tile/between", json=between_body(frames=5, route="straight"))
    assert r.status_code == 200, r.text
    d = r.json()
    assert d["model"] == "tile" and d["version"] == 1 and d["route"] == "straight"
    assert d["synthesized"] is True and "not captured" in d["notice"]
    assert [f["index"] for f in d["frames"]] == [1, 2, 3, 4, 5]
    assert [f["t"] for f in d["frames"]] == pytest.approx([i / 6 for i in range(1, 6)])  # DESIGN: t = i/(n+1)
    # uncalibrated model: confidence null, so every frame is rejected (never let through unjudged)
    assert all(f["confidence"] is None and not f["accepted"] for f in d["frames"])
    assert all("detail" in f and f["detail"] is None for f in d["frames"])  # the model does not refine
    assert (d["accepted"], d["rejected"]) == (0, 5)
    engine = Engine.load(registry.get("tile").path)
    want = engine.between(Endpoint(params=P(10, 30)), Endpoint(params=P(100, 60)), frames=5, route="straight")
    for got, ref in zip(d["frames"], want.frames):
        img = decode_frame(got["image"]).astype(int)  # decoded by PIL, not by the service
        assert img.shape == (16, 16)
        assert np.abs(img - np.round(ref.image[..., 0] * 255)).max() <= 1
        assert got["params"] == pytest.approx(ref.params)


def test_between_with_images_png_and_jpeg(client):
    truth = (render_many(np.array([[30.0, 40.0], [120.0, 60.0]]), 48)[..., 0] * 255).astype(np.uint8)
    rgb = np.repeat(truth[1][..., None], 3, axis=-1)  # RGB and 48 px: the service converts and resizes
    body = {"start": {"image": b64(png(truth[0]))}, "end": {"image": "data:image/jpeg;base64," + b64(png(rgb, "JPEG"))},
            "frames": 2}
    r = client.post("/v1/models/tile/between", json=body)
    assert r.status_code == 200, r.text
    assert len(r.json()["frames"]) == 2


def test_between_upload_form(client):
    frames = (render_many(np.array([[30.0, 40.0], [120.0, 60.0]]), 16)[..., 0] * 255).astype(np.uint8)
    files = {"start": ("a.png", png(frames[0]), "image/png"), "end": ("b.png", png(frames[1]), "image/png")}
    r = client.post("/v1/models/tile/between/upload", files=files, data={"frames": "3", "route": "straight"})
    assert r.status_code == 200, r.text
    assert r.json()["route"] == "straight" and len(r.json()["frames"]) == 3
    bad = client.post("/v1/models/tile/between/upload", files=files, data={"frames": "99"})
    assert bad.status_code == 422 and bad.json()["error"]["field"] == "frames"
    junk = {**files, "end": ("b.png", b"not an image", "image/png")}
    r = client.post("/v1/models/tile/between/upload", files=junk)
    assert r.status_code == 422 and r.json()["error"] == {
        "code": "invalid_image", "field": "end", "message": r.json()["error"]["message"]}


def test_between_zip_answer(client):
    r = client.post("/v1/models/tile/between", json=between_body(frames=4),
                    headers={"Accept": "application/zip"})
    assert r.status_code == 200 and r.headers["content-type"] == "application/zip"
    with zipfile.ZipFile(io.BytesIO(r.content)) as zf:  # read back with the standard library
        manifest = json.loads(zf.read("manifest.json"))
        assert sorted(zf.namelist()) == ["frame_0001.png", "frame_0002.png", "frame_0003.png", "frame_0004.png",
                                         "manifest.json"]
        for f in manifest["frames"]:
            assert np.asarray(Image.open(io.BytesIO(zf.read(f["file"])))).shape == (16, 16)
    # every frame is written, the rejected ones too: the manifest says which (here all: no confidence)
    assert (manifest["accepted"], manifest["rejected"]) == (0, 4) and manifest["synthesized"] is True
    # JSON stays the default when JSON is preferred
    r = client.post("/v1/models/tile/between", json=between_body(),
                    headers={"Accept": "application/json, application/zip;q=0.5"})
    assert r.headers["content-type"] == "application/json"


def test_confidence_decides_accepted_and_counts_rejected(client):
    d = client.post("/v1/models/tile-cal/between", json=between_body(frames=8, min_confidence=0.0)).json()
    conf = [f["confidence"] for f in d["frames"]]
    assert all(0.0 <= c <= 1.0 for c in conf) and d["rejected"] == 0
    cut = float(np.median(conf))
    before = metric(client, "geotween_frames_rejected_total", model="tile-cal")
    d = client.post("/v1/models/tile-cal/between", json=between_body(frames=8, min_confidence=cut)).json()
    assert [f["accepted"] for f in d["frames"]] == [f["confidence"] >= cut for f in d["frames"]]
    assert d["rejected"] == sum(f["confidence"] < cut for f in d["frames"])
    assert metric(client, "geotween_frames_rejected_total", model="tile-cal") - before == d["rejected"]


def test_fill_sync_answers_each_target(client):
    targets = [P(0, 20), P(90, 45), P(359.5, 70)]
    r = client.post("/v1/models/tile-cal/fill", json={"targets": targets, "min_confidence": 0.3})
    assert r.status_code == 200, r.text
    d = r.json()
    assert [f["index"] for f in d["frames"]] == [1, 2, 3]
    assert [f["target"] for f in d["frames"]] == targets
    assert all(f["accepted"] == (f["confidence"] >= 0.3) for f in d["frames"])
    assert d["accepted"] + d["rejected"] == 3 and d["synthesized"] is True


def test_fill_above_the_sync_limit_is_a_job(client):
    targets = [P(a, 45) for a in range(0, 360, 36)]  # 10 > max_fill_sync = 4
    r = client.post("/v1/models/tile/fill", json={"targets": targets})
    assert r.status_code == 202 and r.headers["location"] == f"/v1/jobs/{r.json()['id']}"
    assert r.json()["kind"] == "fill" and r.json()["progress"]["total"] == 10
    forced = client.post("/v1/models/tile/fill", json={"targets": targets[:2], "as_job": True})
    assert forced.status_code == 202


# -- detail transfer ----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def refine_registry(tmp_path_factory, service_bundle):
    reg = Registry.open(tmp_path_factory.mktemp("refine-registry"))
    reg.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    entries = {}
    for name, on in (("tile-off", False), ("tile-fine", True)):
        reg.publish(name, lambda f, on=on, name=name: entries.update({name: with_refine(service_bundle, f, on=on)}))
    return reg, entries


@pytest.fixture(scope="module")
def refine_client(refine_registry):
    app = create_app(Settings(registry=refine_registry[0].root, **LIMITS))
    with TestClient(app) as c:
        yield c


def test_describe_shows_whether_a_model_refines_and_its_held_out_figures(refine_client, refine_registry):
    _, entries = refine_registry
    none = refine_client.get("/v1/models/tile").json()["refine"]
    assert none == {"on": False, "chosen": False, "config": None, "holdout": None, "skippable": False}
    for name, on in (("tile-off", False), ("tile-fine", True)):
        got = refine_client.get(f"/v1/models/{name}").json()["refine"]
        want = entries[name]
        assert (got["on"], got["chosen"]) == (on, True) and got["config"] == want["config"]
        dec, ref = want["holdout"]["decoded"], want["holdout"]["refined"]
        assert got["holdout"] == {"decoded": {"psnr": dec["psnr"], "ssim": dec["ssim"]},
                                  "refined": {"psnr": ref["psnr"], "ssim": ref["ssim"], "detail": ref["detail"]}}


def test_a_refining_model_gives_every_frame_its_detail_share(refine_client, refine_registry):
    reg, _ = refine_registry
    body = between_body(frames=4, route="straight")
    d = refine_client.post("/v1/models/tile-fine/between", json=body).json()
    shares = [f["detail"] for f in d["frames"]]
    assert len(shares) == 4 and all(isinstance(v, float) and 0.0 <= v <= 1.0 for v in shares), shares
    path = reg.get("tile-fine").path
    ends = Endpoint(params=body["start"]["params"]), Endpoint(params=body["end"]["params"])
    served = Engine.load(path).between(*ends, frames=4, route="straight")            # as the bundle chose
    decoded = Engine.load(path, ServingConfig(refine=False)).between(*ends, frames=4, route="straight")
    assert shares == pytest.approx([f.detail for f in served.frames], abs=1e-9)
    for got, ref, plain in zip(d["frames"], served.frames, decoded.frames):
        img = decode_frame(got["image"]).astype(int)
        assert np.abs(img - np.round(ref.image[..., 0] * 255)).max() <= 1  # the refined image is what is sent
        if got["detail"] > 0.01:  # real pixels were carried over: the frame is not the decoded one
            assert np.abs(img - np.round(plain.image[..., 0] * 255)).max() > 1
    assert any(v > 0.01 for v in shares), shares  # else the comparison above checked nothing

    # the ZIP's manifest carries the same shares; fill frames carry theirs
    r = refine_client.post("/v1/models/tile-fine/between", json=body, headers={"Accept": "application/zip"})
    with zipfile.ZipFile(io.BytesIO(r.content)) as zf:
        assert [f["detail"] for f in json.loads(zf.read("manifest.json"))["frames"]] == shares
    fill = refine_client.post("/v1/models/tile-fine/fill", json={"targets": [P(0, 20), P(95, 50)]}).json()
    want = Engine.load(path).fill([P(0, 20), P(95, 50)])
    assert [f["detail"] for f in fill["frames"]] == pytest.approx([f.detail for f in want], abs=1e-9)


@pytest.mark.parametrize("name", ["tile", "tile-off"])
def test_a_model_that_does_not_refine_gives_null_detail(refine_client, name):
    d = refine_client.post(f"/v1/models/{name}/between", json=between_body(frames=3)).json()
    assert [f["detail"] for f in d["frames"]] == [None, None, None]
    fill = refine_client.post(f"/v1/models/{name}/fill", json={"targets": [P(0, 20)]}).json()
    assert fill["frames"][0]["detail"] is None
    r = refine_client.post(f"/v1/models/{name}/between", json=between_body(frames=2),
                           headers={"Accept": "application/zip"})
    with zipfile.ZipFile(io.BytesIO(r.content)) as zf:
        assert [f["detail"] for f in json.loads(zf.read("manifest.json"))["frames"]] == [None, None]


@pytest.fixture(scope="module")
def skip_client(tmp_path_factory, small_bundle):
    """The calibrated small model published twice with detail transfer forced on: "cal" without a
    confidence for decoded frames (bundles trained before it), "cal-fast" with one."""
    from geotween.models.calibrate import calibrate_decoded

    reg = Registry.open(tmp_path_factory.mktemp("skip-registry"))
    engine = Engine.load(small_bundle, ServingConfig(refine=True, holdout_captures=False))
    held = engine.bundle.pixels("holdout_images").astype(np.float32) / 255.0
    decoded, _ = calibrate_decoded(engine, engine.bundle.arrays["holdout_params"], held, tau=0.85)
    assert decoded is not None

    def publish(folder, extra):
        shutil.copytree(small_bundle, folder, dirs_exist_ok=True)
        manifest = json.loads((folder / "manifest.json").read_text())
        manifest["refine"] = {**manifest["refine"], "on": True, "decoded_confidence": None, **extra}
        (folder / "manifest.json").write_text(json.dumps(manifest))

    reg.publish("cal", lambda f: publish(f, {}))
    reg.publish("cal-fast", lambda f: publish(f, {"decoded_confidence": decoded.to_dict()}))
    with TestClient(create_app(Settings(registry=reg.root, **LIMITS))) as c:
        yield c, reg


def test_refine_false_answers_decoded_frames_with_their_own_confidence(skip_client):
    client, reg = skip_client
    assert client.get("/v1/models/cal-fast").json()["refine"]["skippable"] is True
    assert client.get("/v1/models/cal").json()["refine"]["skippable"] is False
    body = between_body(frames=4)
    fast = client.post("/v1/models/cal-fast/between", json={**body, "refine": False})
    assert fast.status_code == 200, fast.text
    full = client.post("/v1/models/cal-fast/between", json=body).json()
    plain = Engine.load(reg.get("cal-fast").path, ServingConfig(refine=False))
    ends = Endpoint(params=body["start"]["params"]), Endpoint(params=body["end"]["params"])
    want = Engine.load(reg.get("cal-fast").path).between(*ends, frames=4, refine=False)
    for got, ref, dec in zip(fast.json()["frames"], want.frames, plain.between(*ends, frames=4).frames):
        assert got["detail"] is None and got["confidence"] == pytest.approx(ref.confidence, abs=1e-9)
        assert np.abs(decode_frame(got["image"]).astype(int) - np.round(dec.image[..., 0] * 255)).max() <= 1
    assert all(f["detail"] is not None for f in full["frames"])  # the default still refines
    targets = {"targets": [{"lamp_azimuth": 100.0, "lamp_elevation": 40.0}], "refine": False}
    filled = client.post("/v1/models/cal-fast/fill", json=targets).json()
    assert filled["frames"][0]["detail"] is None and filled["frames"][0]["confidence"] is not None
    # a fill large enough to run as a job skips refinement too
    many = {"targets": [{"lamp_azimuth": float(a), "lamp_elevation": 40.0} for a in range(0, 360, 60)],
            "refine": False}
    job = client.post("/v1/models/cal-fast/fill", json=many)
    assert job.status_code == 202
    for _ in range(600):
        state = client.get(f"/v1/jobs/{job.json()['id']}").json()["state"]
        if state not in ("queued", "running"):
            break
        time.sleep(0.05)
    assert state == "done"
    frames = client.get(f"/v1/jobs/{job.json()['id']}/result").json()["frames"]
    assert len(frames) == 6 and all(f["detail"] is None and f["confidence"] is not None for f in frames)


def test_refine_false_without_a_decoded_frame_confidence_is_a_422(skip_client):
    client, reg = skip_client
    before = reg.generation()
    r = client.post("/v1/models/cal/between", json={**between_body(frames=2), "refine": False})
    assert r.status_code == 422
    assert "no confidence fitted on frames without detail transfer" in r.json()["error"]["message"]
    assert client.post("/v1/models/cal/between", json=between_body(frames=2)).status_code == 200
    r = client.post("/v1/models/cal/between", json={**between_body(frames=2), "refine": "sometimes"})
    assert r.status_code == 422 and r.json()["error"]["field"] == "refine"
    assert reg.generation() == before
