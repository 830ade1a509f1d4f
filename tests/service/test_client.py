"""The HTTP client against httpx.MockTransport (the live server is exercised in test_live.py)."""
import base64
import io
import json

import httpx
import numpy as np
import pytest
from PIL import Image

from geotween.service import client as client_module
from geotween.service.client import Client, ClientError


def png_b64(arr: np.ndarray) -> str:
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return base64.b64encode(buf.getvalue()).decode()


GRAY = (np.arange(64, dtype=np.uint8).reshape(8, 8) * 4)
MODEL = {"name": "tile", "latest_version": 2, "version": 2, "versions": [], "parameters": [], "resolution": 16,
         "channels": 1, "metrics": {}, "calibration": {"fitted": False}}
REFINE = {"on": True, "chosen": True, "config": {"neighbours": 2, "tolerance": 0.05},
          "holdout": {"decoded": {"psnr": 21.5, "ssim": 0.71}, "refined": {"psnr": 22.25, "ssim": 0.74, "detail": 0.6}}}


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
        path = request.url.raw_path.decode()
        if path == "/v1/models":
            return httpx.Response(200, json={"models": [{"name": "tile", "latest_version": 2, "versions": 2,
                                                         "latest_created": "2026-01-01T00:00:00.000Z"}]})
        if path == "/v1/models/tile":
            return httpx.Response(200, json={**MODEL, "refine": REFINE})
        if path == "/v1/models/old":  # a server from before detail transfer sends no refine block
            return httpx.Response(200, json={**MODEL, "name": "old"})
        if path.endswith("/between"):
            body = json.loads(request.content)
            n = body["frames"]
            return httpx.Response(200, json={
                "model": "tile", "version": 2, "route": body["route"],
                "frames": [frame_json(i, t=i / (n + 1)) for i in range(1, n + 1)], "accepted": n, "rejected": 0,
                "start_params": {}, "end_params": {}, "synthesized": True, "notice": "synthesized"})
        if path.endswith("/fill"):
            body = json.loads(request.content)
            if len(body["targets"]) > 2:
                return httpx.Response(202, json=self.job("queued", 0))
            return httpx.Response(200, json=self.fill_result(body["targets"]))
        if path == "/v1/jobs/" + "a" * 32:
            if request.method == "DELETE":
                return httpx.Response(200, json=self.job("cancelled", 1))
            self.polls += 1
            return httpx.Response(200, json=self.job("running" if self.polls < 3 else "done", min(self.polls, 3)))
        if path == "/v1/jobs/" + "a" * 32 + "/result":
            return httpx.Response(200, json=self.fill_result([{"lamp_azimuth": 1.0, "lamp_elevation": 30.0}] * 3))
        return httpx.Response(404, json={"error": {"code": "model_not_found", "message": "no model named 'nope'",
                                                   "field": "name"}})

    @staticmethod
    def job(state, done):
        return {"id": "a" * 32, "kind": "fill", "state": state, "progress": {"done": done, "total": 3},
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
    assert fake.requests[-1].headers["authorization"] == "Bearer " + "k" * 20


def test_between_encodes_every_kind_of_end(client, fake, tmp_path):
    arr = np.linspace(0, 1, 48, dtype=np.float32).reshape(4, 4, 3)
    path = tmp_path / "end.png"
    Image.fromarray(GRAY).save(path)
    for start, end in (({"lamp_azimuth": 5, "lamp_elevation": 30}, path), (arr, Image.fromarray(GRAY))):
        result = client.between("tile", start, end, frames=3, route="straight", min_confidence=0.25)
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
        assert f.image.dtype == np.float32 and f.image.shape == (8, 8, 1)
        assert np.allclose(f.image[..., 0], GRAY / 255.0)
        assert np.array_equal(np.asarray(f.pil()), GRAY)
        assert (f.confidence, f.accepted, f.params["lamp_azimuth"]) == (0.8, True, 10.0)
        assert [g.detail for g in result.frames] == [0.125, None, 0.375]
    client.between("tile", {"lamp_azimuth": 5, "lamp_elevation": 30}, path, refine=False)
    assert json.loads(fake.requests[-1].content)["refine"] is False


def test_model_exposes_the_refine_choice(client):
    tile = client.model("tile")
    assert tile.refine == REFINE and tile.refines is True
    old = client.model("old")
    assert old.refine == {} and old.refines is False


def test_fill_at_once_and_as_a_polled_job(client, fake):
    seen = []
    small = client.fill("tile", [{"lamp_azimuth": 1, "lamp_elevation": 30}], progress=lambda d, t: seen.append((d, t)))
    assert small.job_id is None and len(small.frames) == 1 and seen == [(1, 1)]
    seen.clear()
    big = client.fill("tile", [{"lamp_azimuth": 1, "lamp_elevation": 30}] * 3, progress=lambda d, t: seen.append((d, t)))
    assert big.job_id == "a" * 32 and len(big.frames) == 3 and big.frames[2].target == {"lamp_azimuth": 1.0,
                                                                                         "lamp_elevation": 30.0}
    assert seen[-1] == (3, 3) and [d for d, _ in seen] == sorted(d for d, _ in seen)
    assert [f.detail for f in big.frames] == [0.125, None, 0.375] and small.frames[0].detail == 0.125
    assert client.cancel("a" * 32).state == "cancelled"


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


def test_public_names():
    assert set(client_module.__all__) == {"BetweenResult", "Client", "ClientError", "FillResult", "Frame",
                                          "JobStatus", "ModelDetail", "ModelSummary", "DEFAULT_TIMEOUT"}
