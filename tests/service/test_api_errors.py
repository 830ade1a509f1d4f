"""HTTP service through FastAPI's TestClient, what it refuses: the error battery (one error shape
for every bad input, the registry left alone), writes without keys, unexpected errors, and
settings that are unsafe."""
import logging
import struct
import zlib

import numpy as np
import pytest
from api_helpers import KEY, P, b64, between_body, metric, png
from fastapi.testclient import TestClient
from pydantic import ValidationError

from geotween.service.api import create_app
from geotween.service.settings import Settings


def claimed_png(width: int, height: int) -> bytes:
    """A PNG whose header claims width x height gray pixels but whose data holds one row: reading
    the header costs nothing, decoding it would fail (PNG layout per the PNG spec, RFC 2083)."""
    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(b"\x00" * (width + 1)))
            + chunk(b"IEND", b""))


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
    ("version beyond the index", "delete", "/v1/models/tile/" + "9" * 28, dict(headers={"X-API-Key": KEY}), 422,
     "invalid", "version"),
    ("1x1 image", "post", "/v1/models/tile/between",
     dict(json=between_body(start={"image": b64(png(np.zeros((1, 1), np.uint8)))})), 422, "image_too_small",
     "start.image"),
    ("7 px on one side", "post", "/v1/models/tile/between",
     dict(json=between_body(end={"image": b64(png(np.zeros((7, 40), np.uint8)))})), 422, "image_too_small",
     "end.image"),
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


def test_an_image_too_small_is_refused_naming_its_size_and_the_smallest_allowed(client):
    r = client.post("/v1/models/tile/between", json=between_body(start={"image": b64(png(np.zeros((7, 12), np.uint8)))}))
    assert r.status_code == 422 and "12x7" in r.json()["error"]["message"] and "8" in r.json()["error"]["message"]
    # 8 px on a side is enough: resized to the model's size like any other end
    r = client.post("/v1/models/tile/between", json=between_body(start={"image": b64(png(np.zeros((8, 8), np.uint8)))}))
    assert r.status_code == 200, r.text


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

