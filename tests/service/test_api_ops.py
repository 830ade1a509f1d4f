"""HTTP service through FastAPI's TestClient, running it: health and readiness, the model list and
description, deleting and publishing without a restart, the model cache, the access log, metrics
and the OpenAPI document."""
import json
import logging
import shutil

from api_helpers import KEY, SIGNALS, between_body, metric
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from geotween.service.api import create_app
from geotween.service.settings import Settings


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
    assert cal["straight"] is None  # stored without a curve of the straight route's own: one curve for all



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
        "POST", "/v1/models/tile/between", 200, "tile", 2, 2, "abc-123")  # no confidence: both rejected
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

