"""The wire contract: real answers (JSON, the ZIP answer's manifest.json, the manifests the command
line writes) checked against the service's own /openapi.json by an independent validator.

OpenAPI 3.1's Schema Object is JSON Schema draft 2020-12 (OpenAPI Specification 3.1.0, section
4.8.24), so each schema is checked with the `jsonschema` library's Draft202012Validator, its
`#/components/schemas/...` references resolved against the OpenAPI document itself.
"""
import base64
import copy
import io
import json
import shutil
import time
import zipfile
from pathlib import Path
from urllib.parse import quote

import pytest
from fastapi.testclient import TestClient
from jsonschema import Draft202012Validator
from referencing import Registry as SchemaRegistry
from referencing import Resource
from referencing.jsonschema import DRAFT202012
from test_api import P, with_confidence

from geotween.service.api import create_app
from geotween.service.cli import main
from geotween.service.registry import Registry
from geotween.service.settings import Settings

DOC_URI = "urn:geotween:openapi"  # the base URI the OpenAPI document is registered under
REFINING = Path(__file__).parents[1] / "data" / "bundle-v1"  # calibrated, detail transfer on


@pytest.fixture(scope="module")
def registry(tmp_path_factory, service_bundle):
    """Three models: uncalibrated (confidence null), calibrated (some frames rejected), refining
    (a numeric detail share per frame, the bundle kept in tests/data)."""
    reg = Registry.open(tmp_path_factory.mktemp("contract-registry"))
    reg.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    reg.publish("cal", lambda f: with_confidence(service_bundle, f))
    reg.publish("fine", lambda f: shutil.copytree(REFINING, f, dirs_exist_ok=True))
    return reg


@pytest.fixture(scope="module")
def client(registry):
    app = create_app(Settings(registry=registry.root, max_frames=16, max_fill_sync=4, max_fill_targets=64))
    with TestClient(app) as c:
        yield c


@pytest.fixture(scope="module")
def doc(client):
    r = client.get("/openapi.json")
    assert r.status_code == 200
    return r.json()


def validator(doc: dict, *where: str) -> Draft202012Validator:
    """A validator of the schema found at `where` (keys from the document's root) in `doc`; its
    "#/..." references point into `doc` too."""
    node = doc
    for key in where:
        node = node[key]
    assert isinstance(node, dict) and node, f"no schema at {where}"
    # a JSON Pointer in a URI fragment: "~" -> "~0", "/" -> "~1", then percent-encoded (RFC 6901, 3 and 6)
    pointer = "".join("/" + quote(k.replace("~", "~0").replace("/", "~1"), safe="~") for k in where)
    registry = SchemaRegistry().with_resource(DOC_URI, Resource(contents=doc, specification=DRAFT202012))
    return Draft202012Validator({"$ref": f"{DOC_URI}#{pointer}"}, registry=registry)


def answer_schema(doc: dict, path: str, method: str = "post", status: str = "200") -> Draft202012Validator:
    """The documented JSON answer of one operation."""
    return validator(doc, "paths", path, method, "responses", status, "content", "application/json", "schema")


def manifest_schema(doc: dict, path: str, method: str = "post") -> Draft202012Validator:
    """The documented manifest.json of one operation's ZIP answer (its content's x-manifest pointer)."""
    pointer = doc["paths"][path][method]["responses"]["200"]["content"]["application/zip"]["x-manifest"]
    assert pointer.startswith("#/components/schemas/")
    return validator(doc, *pointer[2:].split("/"))


def check(v: Draft202012Validator, instance) -> None:
    errors = sorted(v.iter_errors(instance), key=lambda e: list(e.absolute_path))
    assert not errors, "\n".join(f"{list(e.absolute_path)}: {e.message}" for e in errors[:5])


def refused(v: Draft202012Validator, instance) -> bool:
    return not v.is_valid(instance)


BETWEEN = "/v1/models/{name}/between"
FILL = "/v1/models/{name}/fill"


def between_body(**kw):
    return {"start": {"params": P(10, 30)}, "end": {"params": P(100, 60)}, "frames": 5, **kw}


def read_zip(content: bytes) -> tuple[dict, dict[str, bytes]]:
    with zipfile.ZipFile(io.BytesIO(content)) as zf:  # read back with the standard library
        files = {n: zf.read(n) for n in zf.namelist()}
    return json.loads(files.pop("manifest.json")), files


# -- JSON answers -------------------------------------------------------------------------------
@pytest.mark.parametrize("name, extra", [("tile", {"route": "straight"}), ("cal", {"min_confidence": 0.5}),
                                         ("fine", {"frames": 16})])
def test_json_between_answers_follow_the_documented_schema(client, doc, name, extra):
    r = client.post(f"/v1/models/{name}/between", json=between_body(**extra))
    assert r.status_code == 200 and r.headers["content-type"] == "application/json"
    answer = r.json()
    check(answer_schema(doc, BETWEEN), answer)
    if name == "fine":
        assert all(isinstance(f["detail"], float) for f in answer["frames"])
    if name == "cal":
        assert all(isinstance(f["confidence"], float) for f in answer["frames"])


def test_upload_fill_and_job_answers_follow_the_documented_schemas(client, doc):
    png = base64.b64decode(client.post("/v1/models/tile/between", json=between_body(frames=1)).json()
                           ["frames"][0]["image"])
    r = client.post("/v1/models/tile/between/upload", files={"start": ("a.png", png, "image/png"),
                                                             "end": ("b.png", png, "image/png")}, data={"frames": "2"})
    assert r.status_code == 200, r.text
    check(answer_schema(doc, BETWEEN + "/upload"), r.json())
    for name in ("cal", "fine"):
        r = client.post(f"/v1/models/{name}/fill", json={"targets": [P(0, 20), P(95, 50)]})
        assert r.status_code == 200, r.text
        check(answer_schema(doc, FILL), r.json())
    r = client.post("/v1/models/cal/fill", json={"targets": [P(a, 45) for a in range(0, 360, 60)]})
    assert r.status_code == 202
    check(answer_schema(doc, FILL, status="202"), r.json())
    job_id = r.json()["id"]
    for _ in range(600):
        job = client.get(f"/v1/jobs/{job_id}").json()
        if job["state"] not in ("queued", "running"):
            break
        time.sleep(0.05)
    assert job["state"] == "done", job
    check(answer_schema(doc, "/v1/jobs/{job_id}", method="get"), job)
    result = client.get(f"/v1/jobs/{job_id}/result")
    check(answer_schema(doc, "/v1/jobs/{job_id}/result", method="get"), result.json())
    assert len(result.json()["frames"]) == 6
    manifest, _ = read_zip(client.get(f"/v1/jobs/{job_id}/result", headers={"Accept": "application/zip"}).content)
    check(manifest_schema(doc, "/v1/jobs/{job_id}/result", method="get"), manifest)


# -- ZIP answers: manifest.json is the JSON answer with each frame's image as a file ---------------
@pytest.mark.parametrize("path, body, prefix", [
    (BETWEEN, between_body(min_confidence=0.5), "frame"),
    (FILL, {"targets": [P(0, 20), P(95, 50), P(200, 65)]}, "target")])
def test_zip_manifest_follows_the_documented_schema_and_matches_the_json_answer(client, doc, path, body, prefix):
    url = path.format(name="cal")
    zipped = client.post(url, json=body, headers={"Accept": "application/zip"})
    assert zipped.status_code == 200 and zipped.headers["content-type"] == "application/zip"
    manifest, files = read_zip(zipped.content)
    check(manifest_schema(doc, path), manifest)
    n = len(manifest["frames"])
    assert sorted(files) == [f"{prefix}_{i:04d}.png" for i in range(1, n + 1)]  # every frame, by index
    plain = client.post(url, json=body).json()
    assert {k: v for k, v in manifest.items() if k != "frames"} == {k: v for k, v in plain.items() if k != "frames"}
    for m, j in zip(manifest["frames"], plain["frames"]):
        assert {k: v for k, v in m.items() if k != "file"} == {k: v for k, v in j.items() if k != "image"}
        assert files[m["file"]] == base64.b64decode(j["image"])  # the same PNG, byte for byte
    assert manifest["rejected"] + manifest["accepted"] == n


# -- what the command line writes ----------------------------------------------------------------
def test_cli_between_manifest_is_the_zip_manifest(client, doc, registry, tmp_path):
    schema = manifest_schema(doc, BETWEEN)
    ends = ["lamp_azimuth=10,lamp_elevation=30", "lamp_azimuth=100,lamp_elevation=60"]
    for name, extra in (("cal", ["--min-confidence", "0.5"]), ("fine", ["--keep-rejected"])):
        out = tmp_path / name
        assert main(["--registry", str(registry.root), "between", name, *ends, "--frames", "5", "--out", str(out),
                     *extra]) == 0  # rejected frames fail the command only under --strict
        manifest = json.loads((out / "manifest.json").read_text())
        check(schema, manifest)
        assert manifest["latent_map"] == "latent_map.png" and (out / "latent_map.png").is_file()
        written = sorted(p.name for p in out.glob("frame_*.png"))
        assert written == sorted(f["file"] for f in manifest["frames"] if f["file"] is not None)
        # the same frames the service answers for the same request
        zipped, files = read_zip(client.post(f"/v1/models/{name}/between",
                                             json={"start": {"params": P(10, 30)}, "end": {"params": P(100, 60)},
                                                   "frames": 5, "min_confidence": 0.5},
                                             headers={"Accept": "application/zip"}).content)
        for mine, theirs in zip(manifest["frames"], zipped["frames"]):
            assert mine["index"] == theirs["index"] and mine["accepted"] == theirs["accepted"]
            assert mine["t"] == pytest.approx(theirs["t"]) and mine["confidence"] == pytest.approx(theirs["confidence"])
            if mine["file"] is not None:
                assert mine["file"] == theirs["file"] and (out / mine["file"]).read_bytes() == files[theirs["file"]]
    assert any(f["file"] is None for f in json.loads((tmp_path / "cal" / "manifest.json").read_text())["frames"])


def test_cli_fill_report_is_the_zip_manifest(doc, registry, tmp_path):
    targets = tmp_path / "targets.csv"
    targets.write_text("lamp_azimuth,lamp_elevation\n0,20\n95,50\n200,65\n")
    out = tmp_path / "fill"
    assert main(["--registry", str(registry.root), "fill", "cal", str(targets), "--out", str(out)]) == 0
    report = json.loads((out / "report.json").read_text())
    check(manifest_schema(doc, FILL), report)
    assert sorted(p.name for p in out.glob("*.png")) == [f["file"] for f in report["frames"] if f["accepted"]]


# -- the check can fail -------------------------------------------------------------------------
def test_answers_that_break_the_contract_are_refused(client, doc):
    answer = client.post("/v1/models/cal/between", json=between_body()).json()
    json_schema = answer_schema(doc, BETWEEN)
    check(json_schema, answer)
    manifest, _ = read_zip(client.post("/v1/models/cal/between", json=between_body(),
                                       headers={"Accept": "application/zip"}).content)
    zip_schema = manifest_schema(doc, BETWEEN)
    check(zip_schema, manifest)

    def broken(body, change):
        body = copy.deepcopy(body)
        change(body)
        return body

    for change in (lambda b: b["frames"][0].update(confidence=1.5),          # a probability above 1
                   lambda b: b["frames"][0].pop("accepted"),                  # a field left out
                   lambda b: b["frames"][0].update(file="frame_0001.png"),    # a field the contract lacks
                   lambda b: b.update(route="scenic"),                        # a route the service has not
                   lambda b: b.update(synthesized=False)):                    # frames are never captured
        assert refused(json_schema, broken(answer, change))
    for change in (lambda b: b["frames"][0].update(file="frame_001.png"),     # three digits
                   lambda b: b["frames"][0].update(image=b["frames"][0].pop("file")),  # named as in the JSON
                   lambda b: b["frames"][0].update(t=1.5)):                   # beyond the route
        assert refused(zip_schema, broken(manifest, change))
    assert refused(zip_schema, answer) and refused(json_schema, manifest)  # neither passes for the other
