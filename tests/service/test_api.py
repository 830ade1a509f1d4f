"""HTTP service through FastAPI's TestClient: every endpoint, the error shape, limits, logs, metrics."""
import base64
import io
import json
import logging
import shutil
import struct
import time
import zipfile
import zlib
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient
from PIL import Image
from prometheus_client.parser import text_string_to_metric_families
from pydantic import ValidationError

from geotween.models.confidence import fit_confidence
from geotween.models.engine import FITTED_SIGNALS as SIGNALS, Endpoint, Engine, ServingConfig
from geotween.models.render import render_many
from geotween.service.api import create_app
from geotween.service.registry import Registry
from geotween.service.settings import Settings

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


def claimed_png(width: int, height: int) -> bytes:
    """A PNG whose header claims width x height gray pixels but whose data holds one row: reading
    the header costs nothing, decoding it would fail (PNG layout per the PNG spec, RFC 2083)."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\x00" * (width + 1)))
            + chunk(b"IEND", b""))


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


@pytest.fixture(scope="module")
def registry(tmp_path_factory, service_bundle):
    root = tmp_path_factory.mktemp("registry")
    reg = Registry.open(root)
    entry = reg.publish("tile", lambda folder: shutil.copytree(service_bundle, folder, dirs_exist_ok=True))
    reg.publish("tile-cal", lambda folder: with_confidence(entry.path, folder))
    return reg


@pytest.fixture(scope="module")
def client(registry):
    app = create_app(Settings(registry=registry.root, api_keys=[KEY], **LIMITS))
    with TestClient(app) as c:
        yield c


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


# -- operations ---------------------------------------------------------------------------------
def test_health_ready_and_metrics_format(client):
    assert client.get("/healthz").json() == {"status": "ok"}
    ready = client.get("/readyz")
    assert ready.status_code == 200 and ready.json()["status"] == "ready"
    r = client.get("/metrics")
    assert r.headers["content-type"].startswith("text/plain")
    names = {f.name for f in text_string_to_metric_families(r.text)}
    assert {"geotween_requests", "geotween_request_duration_seconds", "geotween_frames_served",
            "geotween_frames_rejected", "geotween_model_cache_size"} <= names


def test_readyz_is_503_until_the_registry_is_readable(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")  # a registry under a plain file can never be created
    app = create_app(Settings(registry=blocker / "registry"))
    with TestClient(app) as c:
        r = c.get("/readyz")
        assert r.status_code == 503 and r.json()["error"]["code"] == "registry_unavailable"
        assert c.get("/healthz").status_code == 200  # alive all the same
        assert c.get("/v1/models").status_code == 503


# -- models -------------------------------------------------------------------------------------
def test_list_and_describe_models(client, registry):
    listing = client.get("/v1/models").json()["models"]
    assert [m["name"] for m in listing] == ["tile", "tile-cal"]
    d = client.get("/v1/models/tile").json()
    assert d["latest_version"] == 1 and [v["version"] for v in d["versions"]] == [1]
    assert [p["name"] for p in d["parameters"]] == ["lamp_azimuth", "lamp_elevation"]
    assert d["parameters"][0]["periodic"] is True and d["resolution"] == 16 and d["channels"] == 1
    assert d["metrics"] == registry.get("tile").metrics
    assert d["calibration"]["fitted"] is False
    # trained without a detail-transfer choice: it never refines
    assert d["refine"] == {"on": False, "chosen": False, "config": None, "holdout": None, "skippable": False}
    cal = client.get("/v1/models/tile-cal").json()["calibration"]
    assert cal["fitted"] is True and cal["tau"] == 0.9 and cal["signals"] == list(SIGNALS)
    assert cal["method"] in ("platt", "isotonic")


def test_between_serves_the_engines_frames(client, registry):
    r = client.post("/v1/models/tile/between", json=between_body(frames=5, route="straight"))
    assert r.status_code == 200, r.text
    d = r.json()
    assert d["model"] == "tile" and d["version"] == 1 and d["route"] == "straight"
    assert d["synthesized"] is True and "not captured" in d["notice"]
    assert [f["index"] for f in d["frames"]] == [1, 2, 3, 4, 5]
    assert [f["t"] for f in d["frames"]] == pytest.approx([i / 6 for i in range(1, 6)])  # DESIGN: t = i/(n+1)
    # uncalibrated model: confidence null and every frame accepted
    assert all(f["confidence"] is None and f["accepted"] for f in d["frames"])
    assert all("detail" in f and f["detail"] is None for f in d["frames"])  # the model does not refine
    assert (d["accepted"], d["rejected"]) == (5, 0)
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
    assert manifest["accepted"] == 4 and manifest["synthesized"] is True
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


# -- the error battery --------------------------------------------------------------------------
def truncated_png() -> bytes:
    data = png((np.arange(256, dtype=np.uint8).reshape(16, 16)))
    return data[: len(data) // 2]


BAD = [
    # (label, method, path, request kwargs, status, error code, field)
    ("invalid json", "post", "/v1/models/tile/between",
     dict(content=b'{"start": ', headers={"content-type": "application/json"}), 400, "invalid_json", None),
    ("wrong type", "post", "/v1/models/tile/between", dict(json=between_body(frames="eight")), 422, "invalid", "frames"),
    ("bool as int", "post", "/v1/models/tile/between", dict(json=between_body(frames=True)), 422, "invalid", "frames"),
    ("unknown key", "post", "/v1/models/tile/between", dict(json=between_body(speed=2)), 422, "invalid", "speed"),
    ("both image and params", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"params": P(1, 30), "image": "aGk="})), 422, "invalid", "start"),
    ("invalid base64", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"image": "@@not base64@@"})), 422, "invalid_base64", "start.image"),
    ("not an image", "post", "/v1/models/tile/between",
     dict(json=between_body(end={"image": b64(b"hello, world")})), 422, "invalid_image", "end.image"),
    ("truncated png", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"image": b64(truncated_png())})), 422, "invalid_image", "start.image"),
    ("over max_image_pixels (header only)", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"image": b64(claimed_png(1200, 1000))})), 413, "image_too_large", "start.image"),
    ("decompression bomb 20000x20000", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"image": b64(claimed_png(20000, 20000))})), 413, "image_too_large", "start.image"),
    ("body over max_body_bytes", "post", "/v1/models/tile/between",
     dict(content=b"{" + b" " * (300 * 1024) + b"}", headers={"content-type": "application/json"}),
     413, "body_too_large", None),
    ("chunked body over max_body_bytes", "post", "/v1/models/tile/between",
     dict(content=iter([b"{" + b" " * 65536] * 5), headers={"content-type": "application/json"}),
     413, "body_too_large", None),
    ("unknown model", "post", "/v1/models/nope/between", dict(json=between_body()), 404, "model_not_found", "name"),
    ("unknown version", "post", "/v1/models/tile/between", dict(json=between_body(version=7)), 404,
     "version_not_found", "version"),
    ("unknown model (get)", "get", "/v1/models/nope", {}, 404, "model_not_found", "name"),
    ("unknown parameter", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"params": {**P(1, 30), "camera_height": 3}})), 422, "invalid_params", "start.params"),
    ("missing parameter", "post", "/v1/models/tile/fill", dict(json={"targets": [P(1, 30), {"lamp_azimuth": 4}]}),
     422, "invalid_params", "targets[1]"),
    ("nan", "post", "/v1/models/tile/between",
     dict(content=b'{"start": {"params": {"lamp_azimuth": NaN, "lamp_elevation": 30}}, "end": {"params": '
                  b'{"lamp_azimuth": 1, "lamp_elevation": 30}}}', headers={"content-type": "application/json"}),
     422, "invalid", "start.params.lamp_azimuth"),
    ("out of range", "post", "/v1/models/tile/between", dict(json=between_body(end={"params": P(10, 95)})),
     422, "invalid_params", "end.params"),
    ("frames 0", "post", "/v1/models/tile/between", dict(json=between_body(frames=0)), 422, "invalid", "frames"),
    ("frames over max_frames", "post", "/v1/models/tile/between", dict(json=between_body(frames=17)), 422,
     "too_many_frames", "frames"),
    ("min_confidence above 1", "post", "/v1/models/tile/between", dict(json=between_body(min_confidence=1.5)),
     422, "invalid", "min_confidence"),
    ("min_confidence below 0", "post", "/v1/models/tile/fill",
     dict(json={"targets": [P(1, 30)], "min_confidence": -0.1}), 422, "invalid", "min_confidence"),
    ("bad route", "post", "/v1/models/tile/between", dict(json=between_body(route="scenic")), 422, "invalid", "route"),
    ("too many targets", "post", "/v1/models/tile/fill", dict(json={"targets": [P(1, 30)] * 65}), 422,
     "too_many_targets", "targets"),
    ("no targets", "post", "/v1/models/tile/fill", dict(json={"targets": []}), 422, "invalid", "targets"),
    ("delete without key", "delete", "/v1/models/tile/1", {}, 401, "missing_api_key", None),
    ("delete with wrong key", "delete", "/v1/models/tile/1", dict(headers={"X-API-Key": "x" * 24}), 401,
     "invalid_api_key", None),
    ("delete bad name without key", "delete", "/v1/models/%2e%2e/1", {}, 401, "missing_api_key", None),
    ("train with wrong bearer", "post", "/v1/trainings",
     dict(json={"scene": "/tmp", "name": "x"}, headers={"Authorization": "Bearer " + "y" * 24}), 401,
     "invalid_api_key", None),
    ("train without key, bad body", "post", "/v1/trainings", dict(json={"oops": 1}), 401, "missing_api_key", None),
    ("train scene not a folder", "post", "/v1/trainings",
     dict(json={"scene": "/definitely/not/here", "name": "x"}, headers={"X-API-Key": KEY}), 422, "invalid_scene",
     "scene"),
    ("train bad name", "post", "/v1/trainings", dict(json={"scene": "/tmp", "name": "../up"}, headers={"X-API-Key": KEY}),
     422, "invalid_name", "name"),
    ("dot-dot name encoded", "get", "/v1/models/%2e%2e", {}, 422, "invalid_name", "name"),
    ("dot-dot name in between", "post", "/v1/models/%2E%2E/between", dict(json=between_body()), 422,
     "invalid_name", "name"),
    ("dot-dot hop", "get", "/v1/models/tile/../../../etc/passwd", {}, 404, "not_found", None),
    ("slash in name", "post", "/v1/models/a%2Fb/between", dict(json=between_body()), 404, "not_found", None),
    ("slashes in name (get)", "get", "/v1/models/tile/1", {}, 405, "method_not_allowed", None),
    ("upper-case name", "get", "/v1/models/TILE", {}, 422, "invalid_name", "name"),
    ("delete bad version", "delete", "/v1/models/tile/zero", dict(headers={"X-API-Key": KEY}), 422, "invalid",
     "version"),
    ("delete unknown version", "delete", "/v1/models/tile/9", dict(headers={"X-API-Key": KEY}), 404,
     "version_not_found", "version"),
    ("unknown job", "get", "/v1/jobs/" + "0" * 32, {}, 404, "job_not_found", "id"),
    ("malformed job id", "get", "/v1/jobs/%2e%2e", {}, 422, "invalid", "job_id"),
    ("slash in job id", "get", "/v1/jobs/..%2Fetc", {}, 404, "not_found", None),
    ("no such endpoint", "get", "/v2/models", {}, 404, "not_found", None),
    ("method not allowed", "put", "/v1/models", {}, 405, "method_not_allowed", None),
]


def test_bad_inputs_get_the_error_shape_and_leave_the_registry_alone(client, registry):
    before = ([m.to_dict() for m in registry.list_models()], registry.generation())
    for label, method, path, kwargs, status, code, field in BAD:
        r = getattr(client, method)(path, **kwargs) if method != "delete" else client.request("DELETE", path, **kwargs)
        assert r.status_code == status, (label, r.status_code, r.text)
        body = r.json()
        assert set(body) == {"error"} and set(body["error"]) == {"code", "message", "field"}, label
        assert (body["error"]["code"], body["error"]["field"]) == (code, field), (label, body)
        assert body["error"]["message"], label
        if status == 401:
            assert r.headers["www-authenticate"].startswith("Bearer"), label
        if status == 405:
            assert r.headers["allow"], label
    assert ([m.to_dict() for m in registry.list_models()], registry.generation()) == before
    assert not any((registry.root / "staging").iterdir())
    assert client.post("/v1/models/tile/between", json=between_body()).status_code == 200  # still serving


def test_writes_are_refused_when_no_keys_are_configured(registry):
    app = create_app(Settings(registry=registry.root))
    with TestClient(app) as c:
        r = c.request("DELETE", "/v1/models/tile/1", headers={"X-API-Key": KEY})
        assert r.status_code == 401 and r.json()["error"]["code"] == "writes_disabled"
    assert registry.get("tile").version == 1


def test_delete_with_key_then_new_version_is_served_without_restart(client, registry):
    entry = registry.publish("doomed", lambda f: shutil.copytree(registry.get("tile").path, f, dirs_exist_ok=True))
    assert client.post("/v1/models/doomed/between", json=between_body()).json()["version"] == entry.version
    second = registry.publish("doomed", lambda f: shutil.copytree(entry.path, f, dirs_exist_ok=True))
    # the next request sees the new version: the cache noticed the registry's generation change
    assert client.post("/v1/models/doomed/between", json=between_body()).json()["version"] == second.version
    r = client.request("DELETE", f"/v1/models/doomed/{second.version}", headers={"Authorization": f"Bearer {KEY}"})
    assert r.status_code == 200 and r.json() == {"model": "doomed", "version": second.version, "deleted": True}
    assert client.post("/v1/models/doomed/between", json=between_body()).json()["version"] == entry.version
    gone = client.post("/v1/models/doomed/between", json=between_body(version=second.version))
    assert gone.status_code == 404 and gone.json()["error"]["code"] == "version_not_found"
    registry.delete("doomed", entry.version)
    assert client.get("/v1/models/doomed").status_code == 404


def test_model_cache_loads_each_version_once(client):
    cache = client.app.state.services.cache
    client.post("/v1/models/tile/between", json=between_body())
    loads = cache.loads
    for _ in range(3):
        assert client.post("/v1/models/tile/between", json=between_body()).status_code == 200
    assert cache.loads == loads
    assert metric(client, "geotween_model_cache_size") == cache.size >= 1


# -- logs, request ids, metrics -----------------------------------------------------------------
def test_access_log_is_one_json_line_per_request(client, caplog):
    with caplog.at_level(logging.INFO, logger="geotween.access"):
        r = client.post("/v1/models/tile/between", json=between_body(frames=2), headers={"X-Request-ID": "abc-123"})
        client.get("/v1/models/nope")
    assert r.headers["x-request-id"] == "abc-123"
    lines = [json.loads(rec.getMessage()) for rec in caplog.records if rec.name == "geotween.access"]
    assert len(lines) == 2
    ok, missing = lines
    assert {"method", "path", "status", "latency_ms", "model", "frames", "rejected", "request_id"} <= set(ok)
    assert (ok["method"], ok["path"], ok["status"], ok["model"], ok["frames"], ok["rejected"], ok["request_id"]) == (
        "POST", "/v1/models/tile/between", 200, "tile", 2, 0, "abc-123")
    assert missing["status"] == 404 and len(missing["request_id"]) == 32  # generated: uuid4 hex


def test_metrics_count_requests_and_frames_per_route(client):
    route = "/v1/models/{name}/between"
    before = metric(client, "geotween_requests_total", route=route, method="POST", status="200")
    frames_before = metric(client, "geotween_frames_served_total", model="tile")
    hist_before = metric(client, "geotween_request_duration_seconds_count", route=route, method="POST")
    for n in (1, 2, 3):
        client.post("/v1/models/tile/between", json=between_body(frames=n))
    client.post("/v1/models/tile/between", json=between_body(frames=0))  # a 422, counted apart
    assert metric(client, "geotween_requests_total", route=route, method="POST", status="200") - before == 3
    assert metric(client, "geotween_requests_total", route=route, method="POST", status="422") >= 1
    assert metric(client, "geotween_frames_served_total", model="tile") - frames_before == 6
    assert metric(client, "geotween_request_duration_seconds_count", route=route, method="POST") - hist_before == 4


def test_two_apps_keep_separate_metrics(registry):
    with TestClient(create_app(Settings(registry=registry.root))) as a, \
            TestClient(create_app(Settings(registry=registry.root))) as b:
        a.get("/healthz")
        a.get("/healthz")
        assert metric(a, "geotween_requests_total", route="/healthz") == 2
        assert metric(b, "geotween_requests_total", route="/healthz") == 0


# -- contract: OpenAPI, settings ----------------------------------------------------------------
OPERATIONS = {"healthz", "readyz", "metrics", "list_models", "get_model", "delete_model_version", "between",
              "between_upload", "fill", "get_job", "get_job_result", "cancel_job", "start_training",
              "latent_map", "place_on_map"}


def test_openapi_ids_examples_errors_and_media_types(client):
    spec = client.get("/openapi.json").json()
    ops = {op["operationId"]: op for path in spec["paths"].values() for op in path.values()}
    assert set(ops) == OPERATIONS
    for op_id, op in ops.items():
        if "requestBody" in op:
            for media_type, content in op["requestBody"]["content"].items():
                schema = content.get("schema", {})
                ref = schema.get("$ref", "").rsplit("/", 1)[-1]
                examples = content.get("example") or content.get("examples") or \
                    spec["components"]["schemas"].get(ref, {}).get("examples")
                assert examples, (op_id, media_type)
        for status, resp in op["responses"].items():
            if status.startswith(("4", "5")):
                assert resp["content"]["application/json"]["schema"]["$ref"].endswith("/ErrorOut"), (op_id, status)
    assert "application/zip" in ops["between"]["responses"]["200"]["content"]
    assert "202" in ops["fill"]["responses"]
    schemas = spec["components"]["schemas"]
    for frame in ("FrameOut", "FillFrameOut"):  # the detail share is documented, and says what it is not
        text = schemas[frame]["properties"]["detail"]["description"]
        assert "real training images" in text and "optical flow" in text and "not captured" in text
        assert "detail" in schemas[frame]["required"]
    assert "refine" in schemas["ModelOut"]["required"] and "not captured" in schemas["RefineOut"]["description"]
    assert "401" in ops["start_training"]["responses"] and "401" in ops["delete_model_version"]["responses"]


def test_settings_from_environment_and_unsafe_values_refused(monkeypatch, tmp_path):
    monkeypatch.setenv("GEOTWEEN_API_KEYS", f"{KEY}, {KEY[::-1]}")
    monkeypatch.setenv("GEOTWEEN_MAX_FRAMES", "12")
    monkeypatch.setenv("GEOTWEEN_REGISTRY", str(tmp_path))
    s = Settings()
    assert s.key_bytes() == [KEY.encode(), KEY[::-1].encode()] and s.max_frames == 12
    assert s.registry_root == tmp_path
    assert KEY not in repr(s)  # keys are secrets: never printed
    monkeypatch.delenv("GEOTWEEN_API_KEYS")
    defaults = Settings()
    assert (defaults.max_body_bytes, defaults.max_image_pixels, defaults.max_frames, defaults.max_fill_sync,
            defaults.max_fill_targets, defaults.inference_workers, defaults.job_queue) == (
        8 * 1024 * 1024, 16_000_000, 12, 32, 4096, 2, 16)
    for bad in (dict(inference_workers=0), dict(job_queue=0), dict(max_body_bytes=10), dict(max_frames=0),
                dict(max_fill_sync=100, max_fill_targets=50), dict(api_keys="short"), dict(job_retention=0)):
        with pytest.raises(ValidationError) as info:
            Settings(**bad)
        assert next(iter(bad)) in str(info.value)
    secret = "leaky key"  # refused: whitespace; the message must not repeat it
    with pytest.raises(ValueError) as info:
        Settings.load(api_keys=secret)
    assert "api_keys[0]" in str(info.value) and secret not in str(info.value)


def test_an_unexpected_error_is_a_500_in_the_error_shape(registry, caplog):
    app = create_app(Settings(registry=registry.root))

    def boom():
        raise RuntimeError("secret detail")

    app.add_api_route("/boom", boom)
    with TestClient(app, raise_server_exceptions=False) as c, caplog.at_level(logging.ERROR, logger="geotween"):
        r = c.get("/boom")
        assert r.status_code == 500 and r.json()["error"]["code"] == "internal"
        assert "secret" not in r.text and r.headers["x-request-id"]
        assert c.get("/healthz").status_code == 200
        assert metric(c, "geotween_requests_total", route="/boom", status="500") == 1
    assert any("secret detail" in (rec.exc_text or "") for rec in caplog.records)


# -- detail transfer ----------------------------------------------------------------------------
def with_refine(src: Path, folder: Path, *, on: bool) -> dict:
    """Copy a bundle with its detail-transfer choice made on its own held-out share
    (models.calibrate.choose_refine), then `on` forced either way; returns the manifest entry."""
    from geotween.models.calibrate import choose_refine

    shutil.copytree(src, folder, dirs_exist_ok=True)
    engine = Engine.load(src, ServingConfig(refine=False))
    holdout = engine.bundle.pixels("holdout_images").astype(np.float32) / 255.0
    chosen = choose_refine(engine, engine.bundle.arrays["holdout_params"], holdout)
    # a 10-step model's frames are far from any real image: a wide tolerance lets them take real pixels
    chosen = replace(chosen, on=on, config=replace(chosen.config, tolerance=0.3) if on else chosen.config)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["refine"] = entry = chosen.to_dict()
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return entry


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
    engine = Engine.load(small_bundle, ServingConfig(refine=True))
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
