"""The latent map endpoints through TestClient, and the codes a between answer now carries."""
import shutil

import numpy as np
import pytest
from fastapi.testclient import TestClient

from geotween.models.engine import Endpoint, Engine
from geotween.models.latent_map import fit_map
from geotween.service.api import create_app
from geotween.service.registry import Registry
from geotween.service.settings import Settings


def P(az, el):
    return {"lamp_azimuth": az, "lamp_elevation": el}


@pytest.fixture(scope="module")
def registry(tmp_path_factory, service_bundle):
    reg = Registry.open(tmp_path_factory.mktemp("map-registry"))
    for _ in range(2):  # two versions of one bundle: the map must follow the version asked for
        reg.publish("tile", lambda folder: shutil.copytree(service_bundle, folder, dirs_exist_ok=True))
    return reg


@pytest.fixture(scope="module")
def client(registry):
    with TestClient(create_app(Settings(registry=registry.root, max_map_codes=8))) as c:
        yield c


@pytest.fixture(scope="module")
def engine(service_bundle):
    return Engine.load(service_bundle)


def error_of(r, status):
    assert r.status_code == status, r.text
    body = r.json()
    assert set(body) == {"error"} and set(body["error"]) == {"code", "message", "field"}
    return body["error"]


def test_bank_map_shape_and_params(client, engine):
    r = client.get("/v1/models/tile/map")
    assert r.status_code == 200
    body = r.json()
    codes, params = engine.bundle.codes, engine.bundle.params
    assert (body["model"], body["version"], body["latent_dim"], body["method"]) == ("tile", 2, codes.shape[1], "pca")
    assert len(body["bank"]) == len(codes)
    assert [b["index"] for b in body["bank"]] == list(range(1, len(codes) + 1))
    for b, p in zip(body["bank"], params):  # every bank point comes back with its sample's settings
        assert b["params"] == pytest.approx(P(*p))
    xy = np.array([[b["x"], b["y"]] for b in body["bank"]])
    np.testing.assert_allclose(xy, fit_map(codes).project(codes), atol=1e-9)
    assert 0.0 <= body["explained"][1] <= body["explained"][0] <= 1.0 and sum(body["explained"]) <= 1.0 + 1e-9


def test_bank_map_is_deterministic_and_follows_the_version(client):
    first = client.get("/v1/models/tile/map").json()
    assert client.get("/v1/models/tile/map").json() == first
    v1 = client.get("/v1/models/tile/map", params={"version": 1}).json()
    assert v1["version"] == 1 and v1["bank"] == first["bank"]  # same bundle, same map


def test_between_codes_land_on_the_map_where_the_engine_puts_them(client, engine):
    body = {"start": {"params": P(10, 30)}, "end": {"params": P(200, 60)}, "frames": 4, "route": "straight"}
    answer = client.post("/v1/models/tile/between", json=body).json()
    codes = [answer["start_code"]] + [f["code"] for f in answer["frames"]] + [answer["end_code"]]
    assert all(len(c) == engine.bundle.codes.shape[1] for c in codes)
    ref = engine.between(Endpoint(params=P(10, 30)), Endpoint(params=P(200, 60)), frames=4, route="straight")
    np.testing.assert_allclose(np.array(codes[1:-1]), ref.codes, atol=1e-5)
    np.testing.assert_allclose(np.array([codes[0], codes[-1]]), ref.ends, atol=1e-5)
    # a straight route is a line between the end codes, and PCA is affine: the frames stay on it
    placed = client.post("/v1/models/tile/map", json={"codes": codes}).json()
    assert (placed["model"], placed["version"]) == ("tile", 2) and len(placed["points"]) == 6
    xy = np.array([[p["x"], p["y"]] for p in placed["points"]])
    t = np.array([f["t"] for f in answer["frames"]])
    np.testing.assert_allclose(xy[1:-1], xy[0] + t[:, None] * (xy[-1] - xy[0]), atol=1e-4)
    # and each placed code sits where the bank map would put the same code
    lmap = fit_map(engine.bundle.codes)
    np.testing.assert_allclose(xy, lmap.project(np.array(codes)), atol=1e-9)


def test_fill_answers_are_unchanged(client):
    frame = client.post("/v1/models/tile/fill", json={"targets": [P(0, 20)]}).json()["frames"][0]
    # no latent code on fill frames; detail (null here: the model does not refine) is the one addition
    assert set(frame) == {"index", "target", "image", "confidence", "accepted", "params", "detail"}
    assert frame["detail"] is None


@pytest.mark.parametrize("body, status, code, field", [
    ({"codes": [[0.0, 1.0]]}, 422, "invalid_codes", "codes[0]"),
    ({"codes": []}, 422, "invalid", "codes"),
    ({"codes": [[0.0, 0.0, 0.0]] * 9}, 422, "too_many_codes", "codes"),
    ({"codes": [["a", 0.0, 0.0]]}, 422, "invalid", "codes[0][0]"),
    ({"codes": [[0.0, 0.0, 0.0]], "version": 9}, 404, "version_not_found", "version"),
    ({"codes": [[0.0, 0.0, 0.0]], "colour": "red"}, 422, "invalid", "colour"),
    ({}, 422, "missing", "codes"),
])
def test_bad_map_requests_get_the_one_error_shape(client, engine, body, status, code, field):
    d = engine.bundle.codes.shape[1]
    assert d == 3  # the cases above are written for the demo space's default latent size
    err = error_of(client.post("/v1/models/tile/map", json=body), status)
    assert (err["code"], err["field"]) == (code, field)


def test_bad_map_lookups_get_the_one_error_shape(client):
    assert error_of(client.get("/v1/models/nope/map"), 404)["code"] == "model_not_found"
    assert error_of(client.get("/v1/models/tile/map", params={"version": 0}), 422)["field"] == "version"
    assert error_of(client.get("/v1/models/tile/map", params={"version": 7}), 404)["code"] == "version_not_found"
    assert error_of(client.post("/v1/models/tile/map", content=b"{", headers={"content-type": "application/json"}),
                    400)["code"] == "invalid_json"
    nan = client.post("/v1/models/tile/map", content=b'{"codes": [[NaN, 0, 0]]}',
                      headers={"content-type": "application/json"})
    assert nan.status_code in (400, 422) and set(nan.json()) == {"error"}


def test_the_map_is_in_the_openapi_document(client):
    paths = client.get("/openapi.json").json()["paths"]
    assert {"get", "post"} <= set(paths["/v1/models/{name}/map"])
    assert "/" not in paths and "/viewer/{asset}" not in paths
