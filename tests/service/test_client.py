"""The HTTP client against httpx.MockTransport (the live server is exercised in test_live.py)."""
import base64
import io
import json

import httpx
import numpy as np
import pytest
from PIL import Image

from geotween.service import client as client_module
from geotween.service import schemas
from geotween.service.client import Client, ClientError


def png_b64(arr: np.ndarray) -> str:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return base64.b64encode(buf.getvalue()).decode()


GRAY = (np.arange(64, dtype=np.uint8).reshape(8, 8) * 4)
PARAMETERS = [{"name": "lamp_azimuth", "unit": "deg", "min": 0.0, "max": 360.0, "periodic": True},
              {"name": "lamp_elevation", "unit": "deg", "min": 20.0, "max": 70.0, "periodic": False}]
CALIBRATION = {"fitted": False, "tau": None, "method": None, "signals": [], "ece": None, "auroc": None,
               "status": "not calibrated"}
MODEL = {"name": "tile", "latest_version": 2, "version": 2, "versions": [], "parameters": PARAMETERS,
         "resolution": 16, "channels": 1, "metrics": {}, "calibration": CALIBRATION}
REFINE = {"on": True, "chosen": True, "config": {"neighbours": 2, "tolerance": 0.05},
          "holdout": {"decoded": {"psnr": 21.5, "ssim": 0.71}, "refined": {"psnr": 22.25, "ssim": 0.74, "detail": 0.6}},
          "skippable": True}
BANK = [{"index": 1, "x": 0.5, "y": -0.25, "params": {"lamp_azimuth": 0.0, "lamp_elevation": 20.0}},
        {"index": 2, "x": -0.5, "y": 0.25, "params": {"lamp_azimuth": 90.0, "lamp_elevation": 45.0}}]
JOB_ID = "a" * 32


def frame_json(i, **kw):
    # odd frames carry a detail share, even ones null, as a refining and a plain model would send
    return {"index": i, "image": png_b64(GRAY), "confidence": 0.8, "accepted": True,
            "params": {"lamp_azimuth": 10.0 * i, "lamp_elevation": 40.0}, "detail": 0.125 * i if i % 2 else None,
            **kw}


class FakeService:
    """Records requests; answers like the service would (shapes per service/schemas.py)."""

    def __init__(self):
        self.requests: list[httpx.Request] = []
        self.polls = 0

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.requests.append(request)
        path = request.url.raw_path.decode().split("?")[0]
        if path == "/v1/models":
            return httpx.Response(200, json={"models": [{"name": "tile", "latest_version": 2, "versions": 2,
                                                         "latest_created": "2026-01-01T00:00:00.000Z"}]})
        if path == "/v1/models/tile":
            return httpx.Response(200, json={**MODEL, "refine": REFINE})
        if path == "/v1/models/old":  # a server from before detail transfer sends no refine block
            return httpx.Response(200, json={**MODEL, "name": "old"})
        if path == "/v1/models/newer":  # a newer server may send keys this client does not know
            return httpx.Response(200, json={**MODEL, "name": "newer", "refine": {**REFINE, "speed": 2.0},
                                             "licence": "ours"})
        if path == "/v1/models/tile/2" and request.method == "DELETE":
            return httpx.Response(200, json={"model": "tile", "version": 2, "deleted": True})
        if path.endswith("/between"):
            body = json.loads(request.content)
            return httpx.Response(200, json=self.between_result(body["frames"], body["route"]))
        if path.endswith("/between/upload"):
            return httpx.Response(200, json=self.between_result(2, "geodesic"))
        if path.endswith("/fill"):
            body = json.loads(request.content)
            if len(body["targets"]) > 2 or body["as_job"]:
                return httpx.Response(202, json=self.job("queued", 0))
            return httpx.Response(200, json=self.fill_result(body["targets"]))
        if path == "/v1/models/tile/map":
            if request.method == "GET":
                return httpx.Response(200, json={"model": "tile", "version": 2, "latent_dim": 3,
                                                 "explained": [0.75, 0.25], "bank": BANK, "method": "pca"})
            codes = json.loads(request.content)["codes"]
            return httpx.Response(200, json={"model": "tile", "version": 2,
                                             "points": [{"x": c[0], "y": c[1]} for c in codes]})
        if path == "/metrics":
            return httpx.Response(200, text="# TYPE geotween_requests counter\ngeotween_requests_total 3.0\n",
                                  headers={"content-type": "text/plain; version=0.0.4"})
        if path == "/v1/jobs/" + JOB_ID:
            if request.method == "DELETE":
                return httpx.Response(200, json=self.job("cancelled", 1))
            self.polls += 1
            return httpx.Response(200, json=self.job("running" if self.polls < 3 else "done", min(self.polls, 3)))
        if path == "/v1/jobs/" + JOB_ID + "/result":
            return httpx.Response(200, json=self.fill_result([{"lamp_azimuth": 1.0, "lamp_elevation": 30.0}] * 3))
        return httpx.Response(404, json={"error": {"code": "model_not_found", "message": "no model named 'nope'",
                                                   "field": "name"}})

    @staticmethod
    def between_result(n, route):
        return {"model": "tile", "version": 2, "route": route,
                "frames": [frame_json(i, t=i / (n + 1), code=[0.1 * i, -0.2, 0.3]) for i in range(1, n + 1)],
                "accepted": n, "rejected": 0, "start_params": {}, "end_params": {}, "start_code": [0.0, -0.2, 0.3],
                "end_code": [0.1 * (n + 1), -0.2, 0.3], "synthesized": True, "notice": "synthesized"}

    @staticmethod
    def job(state, done):
        return {"id": JOB_ID, "kind": "fill", "state": state, "progress": {"done": done, "total": 3},
                "created": "x", "started": None, "finished": None, "error": None, "model": "tile", "version": 2,
                "result": None}

    @staticmethod
    def fill_result(targets):
        return {"model": "tile", "version": 2, "accepted": len(targets), "rejected": 0, "synthesized": True,
                "notice": "synthesized", "frames": [frame_json(i + 1, target=t) for i, t in enumerate(targets)]}


@pytest.fixture
def fake():
    return FakeService()


@pytest.fixture
def client(fake):
    with Client("http://geotween.test", api_key="k" * 20, transport=httpx.MockTransport(fake),
                poll_interval=0.01) as c:
        yield c


def test_models_and_auth_header(client, fake):
    models = client.models()
    assert [(m.name, m.latest_version) for m in models] == [("tile", 2)]
    assert isinstance(models[0], schemas.ModelSummaryOut)
    assert fake.requests[-1].headers["authorization"] == "Bearer " + "k" * 20


def test_between_encodes_every_kind_of_end(client, fake, tmp_path):
    arr = np.linspace(0, 1, 48, dtype=np.float32).reshape(4, 4, 3)
    path = tmp_path / "end.png"
    Image.fromarray(GRAY).save(path)
    for start, end in (({"lamp_azimuth": 5, "lamp_elevation": 30}, path), (arr, Image.fromarray(GRAY))):
        result = client.between("tile", start, end, frames=3, route="straight", min_confidence=0.25)
        assert isinstance(result, schemas.BetweenOut)
        body = json.loads(fake.requests[-1].content)
        assert (body["frames"], body["route"], body["min_confidence"], body["refine"]) == (3, "straight", 0.25, True)
        assert "version" not in body
        for side, given in (("start", start), ("end", end)):
            if isinstance(given, dict):
                assert body[side] == {"params": {k: float(v) for k, v in given.items()}}
                continue
            sent = np.asarray(Image.open(io.BytesIO(base64.b64decode(body[side]["image"]))))
            want = np.round(arr * 255).astype(np.uint8) if isinstance(given, np.ndarray) else GRAY
            assert np.array_equal(sent, want)
        assert [f.t for f in result.frames] == pytest.approx([0.25, 0.5, 0.75])
        f = result.frames[0]
        image = f.array()
        assert image.dtype == np.float32 and image.shape == (8, 8, 1)
        assert np.allclose(image[..., 0], GRAY / 255.0)
        assert np.array_equal(np.asarray(f.pil()), GRAY)
        assert f.png() == base64.b64decode(f.image)
        assert (f.confidence, f.accepted, f.params["lamp_azimuth"]) == (0.8, True, 10.0)
        assert [g.detail for g in result.frames] == [0.125, None, 0.375]
        assert f.code == [0.1, -0.2, 0.3] and result.end_code == [0.4, -0.2, 0.3]
    client.between("tile", {"lamp_azimuth": 5, "lamp_elevation": 30}, path, refine=False)
    assert json.loads(fake.requests[-1].content)["refine"] is False


def test_between_upload_sends_files_in_a_form(client, fake, tmp_path):
    jpeg = io.BytesIO()
    Image.fromarray(GRAY).save(jpeg, format="JPEG")
    path = tmp_path / "end.jpg"
    path.write_bytes(jpeg.getvalue())
    result = client.between_upload("tile", Image.fromarray(GRAY), path, frames=2, min_confidence=0.25, version=2,
                                   refine=False)
    assert isinstance(result, schemas.BetweenOut) and len(result.frames) == 2
    sent = fake.requests[-1]
    assert sent.url.path == "/v1/models/tile/between/upload"
    assert sent.headers["content-type"].startswith("multipart/form-data")
    content = sent.read()
    assert content.count(b"\x89PNG") == 1 and jpeg.getvalue() in content  # files as they are, not base64
    for name, value in (("frames", b"2"), ("min_confidence", b"0.25"), ("version", b"2"), ("refine", b"false")):
        assert b'name="' + name.encode() + b'"\r\n\r\n' + value + b"\r\n" in content
    assert b'filename="end.jpeg"' in content and b"Content-Type: image/jpeg" in content
    with pytest.raises(TypeError, match="settings"):
        client.between_upload("tile", {"lamp_azimuth": 5.0, "lamp_elevation": 30.0}, path)


def test_model_exposes_the_refine_choice(client):
    tile = client.model("tile")
    assert isinstance(tile, schemas.ModelOut)
    assert tile.refine.model_dump() == REFINE and tile.refine.on is True
    assert [p.name for p in tile.parameters] == ["lamp_azimuth", "lamp_elevation"]


def test_keys_a_newer_server_adds_are_ignored(client):
    newer = client.model("newer")
    assert newer.name == "newer" and newer.refine.model_dump() == REFINE


def test_an_answer_that_breaks_the_contract_raises(client, fake):
    with pytest.raises(ClientError) as info:
        client.model("old")  # no refine block
    assert (info.value.status, info.value.code) == (200, "invalid_answer")
    assert "ModelOut" in info.value.message and "refine" in info.value.message

    def broken(request):
        answer = FakeService.between_result(2, "geodesic")
        answer["frames"][1]["confidence"] = 1.5  # a probability above 1
        return httpx.Response(200, json=answer)

    with Client("http://geotween.test", transport=httpx.MockTransport(broken)) as c:
        with pytest.raises(ClientError) as info:
            c.between("tile", {"lamp_azimuth": 5}, {"lamp_azimuth": 50})
    assert info.value.code == "invalid_answer" and "frames.1.confidence" in info.value.message


def test_fill_at_once_and_as_a_polled_job(client, fake):
    seen = []
    small = client.fill("tile", [{"lamp_azimuth": 1, "lamp_elevation": 30}], progress=lambda d, t: seen.append((d, t)))
    assert isinstance(small, schemas.FillOut) and len(small.frames) == 1 and seen == [(1, 1)]
    seen.clear()
    big = client.fill("tile", [{"lamp_azimuth": 1, "lamp_elevation": 30}] * 3, progress=lambda d, t: seen.append((d, t)))
    assert len(big.frames) == 3 and big.frames[2].target == {"lamp_azimuth": 1.0, "lamp_elevation": 30.0}
    assert fake.requests[-1].url.path == f"/v1/jobs/{JOB_ID}/result"
    assert seen[-1] == (3, 3) and [d for d, _ in seen] == sorted(d for d, _ in seen)
    assert [f.detail for f in big.frames] == [0.125, None, 0.375] and small.frames[0].detail == 0.125
    assert client.cancel(JOB_ID).state == "cancelled"


def test_start_fill_returns_the_job(client, fake):
    job = client.start_fill("tile", [{"lamp_azimuth": 1, "lamp_elevation": 30}], version=2)
    assert isinstance(job, schemas.JobOut) and (job.id, job.kind, job.state) == (JOB_ID, "fill", "queued")
    assert json.loads(fake.requests[-1].content)["as_job"] is True
    done = client.wait(job.id)
    assert done.state == "done" and (done.progress.done, done.progress.total) == (3, 3)
    result = client.result(job.id)
    assert isinstance(result, schemas.FillOut) and [f.index for f in result.frames] == [1, 2, 3]


def test_latent_map_and_placing_codes(client, fake):
    lmap = client.latent_map("tile", version=2)
    assert isinstance(lmap, schemas.LatentMapOut)
    assert (lmap.latent_dim, lmap.explained, lmap.method) == (3, [0.75, 0.25], "pca")
    assert [(p.index, p.x, p.y) for p in lmap.bank] == [(1, 0.5, -0.25), (2, -0.5, 0.25)]
    assert fake.requests[-1].url.params["version"] == "2"
    answer = client.between("tile", {"lamp_azimuth": 5, "lamp_elevation": 30}, {"lamp_azimuth": 50,
                                                                                "lamp_elevation": 30}, frames=2)
    codes = [answer.start_code, *[f.code for f in answer.frames], answer.end_code]
    placed = client.place_on_map("tile", np.array(codes))  # an array of codes is sent as lists of floats
    assert json.loads(fake.requests[-1].content) == {"codes": codes}
    assert isinstance(placed, schemas.MapPointsOut) and [(p.x, p.y) for p in placed.points] == [
        (c[0], c[1]) for c in codes]


def test_delete_and_metrics(client, fake):
    deleted = client.delete("tile", 2)
    assert isinstance(deleted, schemas.DeletedOut) and (deleted.model, deleted.version, deleted.deleted) == (
        "tile", 2, True)
    assert fake.requests[-1].method == "DELETE"
    assert "geotween_requests_total 3.0" in client.metrics()


def test_errors_raise_client_error_with_the_fields(client):
    with pytest.raises(ClientError) as info:
        client.model("nope")
    e = info.value
    assert (e.status, e.code, e.field) == (404, "model_not_found", "name") and "nope" in e.message


def test_names_are_escaped_into_one_path_segment(client, fake):
    for name in ("..", "a/b"):
        with pytest.raises(ClientError):
            client.model(name)
        raw = fake.requests[-1].url.raw_path.decode()
        assert raw.count("/") == 3 and raw.startswith("/v1/models/"), raw


def test_unreachable_and_non_json_errors():
    def refuse(request):
        raise httpx.ConnectError("connection refused", request=request)

    with Client("http://geotween.test", transport=httpx.MockTransport(refuse)) as c:
        with pytest.raises(ClientError) as info:
            c.models()
        assert info.value.status is None and info.value.code == "unreachable"
    with Client("http://geotween.test", transport=httpx.MockTransport(lambda r: httpx.Response(502, text="<html>"))) as c:
        with pytest.raises(ClientError) as info:
            c.health()
        assert (info.value.status, info.value.code) == (502, "http_error")
    with Client("http://geotween.test", transport=httpx.MockTransport(lambda r: httpx.Response(200, text="<html>"))) as c:
        with pytest.raises(ClientError) as info:
            c.health()
        assert (info.value.status, info.value.code) == (200, "invalid_answer")


def test_public_names():
    # the answers are the service's own wire models, not copies kept by the client
    assert set(client_module.__all__) == {
        "BetweenOut", "Client", "ClientError", "DeletedOut", "FillFrameOut", "FillOut", "FrameOut", "JobOut",
        "LatentMapOut", "MapPointsOut", "ModelOut", "ModelSummaryOut", "TrainingOut", "DEFAULT_TIMEOUT", "FINISHED"}
    for name in client_module.__all__:
        if name.endswith("Out"):
            assert getattr(client_module, name) is getattr(schemas, name)


def test_the_client_covers_every_endpoint_of_the_service(tmp_path):
    """Every operation /openapi.json documents (but the viewer's page and files) has a client method."""
    from geotween.service.api import create_app
    from geotween.service.settings import Settings

    covers = {"healthz": "health", "readyz": "ready", "metrics": "metrics", "list_models": "models",
              "get_model": "model", "delete_model_version": "delete", "between": "between",
              "between_upload": "between_upload", "fill": "fill", "latent_map": "latent_map",
              "place_on_map": "place_on_map", "get_job": "job", "cancel_job": "cancel",
              "get_job_result": "result", "start_training": "train"}
    doc = create_app(Settings(registry=tmp_path / "registry")).openapi()
    operations = {op["operationId"] for item in doc["paths"].values() for op in item.values()}
    assert operations == set(covers)
    assert all(callable(getattr(Client, method)) for method in covers.values())
