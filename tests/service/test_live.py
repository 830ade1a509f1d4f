"""A real server process: the Dockerfile's CMD, run on 127.0.0.1 at a free port, then end-to-end
requests, the client, and 8 concurrent callers. Loopback only; every wait is bounded."""
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
import tomllib
from pathlib import Path

import httpx
import numpy as np
import pytest
from PIL import Image
from prometheus_client.parser import text_string_to_metric_families

from geotween.models.render import render_many
from geotween.service.client import Client, ClientError
from geotween.service.registry import Registry

ROOT = Path(__file__).resolve().parents[2]
KEY = "live-key-0123456789abcdef"
START_TIMEOUT = 90.0  # seconds: importing torch on a busy 2-core machine is slow


def wait_until_alive(url: str, proc: subprocess.Popen, log: Path) -> None:
    """Poll /healthz until the server answers; fail with its log if it exits or takes too long."""
    deadline = time.monotonic() + START_TIMEOUT
    while True:
        try:
            if httpx.get(url + "/healthz", timeout=2.0).status_code == 200:
                return
        except httpx.TransportError:
            pass
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            pytest.fail(f"the server did not start (exit {proc.poll()}):\n{log.read_text()[-3000:]}")
        time.sleep(0.2)




def dockerfile_cmd(path: Path = ROOT / "Dockerfile") -> list[str]:
    """The exec-form CMD of a Dockerfile: the last CMD instruction, a JSON array (Dockerfile reference)."""
    joined = re.sub(r"\\\n", " ", path.read_text())  # line continuations belong to one instruction
    found = re.findall(r"^CMD\s+(\[.*\])\s*$", joined, flags=re.MULTILINE)
    assert found, "the Dockerfile has no exec-form CMD"
    return json.loads(found[-1])


def local_argv(cmd: list[str], port: int) -> list[str]:
    """The CMD with --host 127.0.0.1 and a free port; the console script resolved via pyproject."""
    argv = list(cmd)
    argv[argv.index("--port") + 1] = str(port)
    argv[argv.index("--host") + 1] = "127.0.0.1"
    script = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"][argv[0]]
    module, func = script.split(":")
    return [sys.executable, "-c", f"import sys; from {module} import {func}; sys.exit({func}())", *argv[1:]]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def P(az, el):
    return {"lamp_azimuth": float(az), "lamp_elevation": float(el)}


@pytest.fixture(scope="module")
def server(tmp_path_factory, service_bundle):
    root = tmp_path_factory.mktemp("registry")
    Registry.open(root).publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    port = free_port()
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(root), "GEOTWEEN_API_KEYS": KEY, "GEOTWEEN_MAX_FILL_SYNC": "4",
           "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    log = tmp_path_factory.mktemp("log") / "server.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(local_argv(dockerfile_cmd(), port), cwd=ROOT, env=env, stdout=out,
                                stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    wait_until_alive(url, proc, log)
    yield {"url": url, "proc": proc, "log": log, "root": root}
    proc.send_signal(signal.SIGINT)  # graceful: uvicorn finishes in-flight requests, then exits
    try:
        assert proc.wait(timeout=30) == 0, log.read_text()[-3000:]
    finally:
        if proc.poll() is None:
            proc.kill()


def test_the_dockerfile_cmd_serves(server):
    cmd = dockerfile_cmd()
    assert cmd[:2] == ["geotween", "serve"] and "--port" in cmd and "--host" in cmd
    r = httpx.get(server["url"] + "/healthz", timeout=5)
    assert r.status_code == 200 and r.json() == {"status": "ok"} and r.headers["x-request-id"]


def test_end_to_end_ready_between_fill(server):
    url = server["url"]
    with httpx.Client(base_url=url, timeout=30) as h:
        assert h.get("/readyz").json()["status"] == "ready"
        r = h.post("/v1/models/tile/between",
                   json={"start": {"params": P(10, 30)}, "end": {"params": P(200, 60)}, "frames": 4})
        assert r.status_code == 200 and len(r.json()["frames"]) == 4
        r = h.post("/v1/models/tile/fill", json={"targets": [P(0, 20), P(180, 70)]})
        assert r.status_code == 200 and r.json()["accepted"] + r.json()["rejected"] == 2
        r = h.post("/v1/models/tile/fill", json={"targets": [P(a, 45) for a in range(0, 360, 30)]})
        assert r.status_code == 202
        job_id = r.json()["id"]
        for _ in range(300):
            job = h.get(f"/v1/jobs/{job_id}").json()
            if job["state"] in ("done", "failed", "cancelled"):
                break
            time.sleep(0.05)
        assert job["state"] == "done" and len(h.get(job["result"]).json()["frames"]) == 12
        bad = h.post("/v1/models/tile/between", content=b"{", headers={"content-type": "application/json"})
        assert bad.status_code == 400 and bad.json()["error"]["code"] == "invalid_json"
    lines = [json.loads(x) for x in server["log"].read_text().splitlines() if x.startswith("{")]
    assert any(x.get("logger", "").startswith("uvicorn") for x in lines)  # the server's own lines are JSON too
    access = [x for x in lines if "request_id" in x and "latency_ms" in x]
    assert any(x["path"] == "/v1/models/tile/between" and x["status"] == 200 and x["frames"] == 4 for x in access)


def test_client_against_the_live_server(server):
    with Client(server["url"], api_key=KEY, poll_interval=0.05) as c:
        assert c.health() and c.ready()
        assert [m.name for m in c.models()] == ["tile"]
        detail = c.model("tile")
        assert [p.name for p in detail.parameters] == ["lamp_azimuth", "lamp_elevation"] and detail.resolution == 16
        start = Image.fromarray((render_many(np.array([[30.0, 40.0]]), 16)[0, ..., 0] * 255).astype(np.uint8))
        result = c.between("tile", start, P(120, 60), frames=3, route="straight")
        assert len(result.frames) == 3 and result.frames[0].array().shape == (16, 16, 1)
        assert result.frames[1].t == pytest.approx(0.5)
        progress = []
        filled = c.fill("tile", [P(a, 50) for a in range(0, 360, 40)], progress=lambda d, t: progress.append((d, t)))
        assert len(filled.frames) == 9 and progress[-1] == (9, 9)
        job = c.start_fill("tile", [P(a, 50) for a in range(0, 360, 40)])
        assert job.kind == "fill" and c.wait(job.id).state == "done"
        assert [f.png() for f in c.result(job.id).frames] == [f.png() for f in filled.frames]  # the same frames
        with pytest.raises(ClientError) as info:
            c.between("nope", P(1, 30), P(2, 30))
        assert (info.value.status, info.value.code) == (404, "model_not_found")
        with pytest.raises(ClientError) as info:
            c.delete("tile", 99)
        assert (info.value.status, info.value.code) == (404, "version_not_found")  # the key was accepted


def _metrics(url: str) -> dict:
    out = {}
    text = httpx.get(url + "/metrics", timeout=10).text
    for family in text_string_to_metric_families(text):  # prometheus_client's own parser
        for s in family.samples:
            key = (s.name, tuple(sorted(s.labels.items())))
            out[key] = out.get(key, 0.0) + s.value
    return out


def test_eight_concurrent_clients(server):
    url, route = server["url"], "/v1/models/{name}/between"
    before = _metrics(url)
    outcomes, lock = [], threading.Lock()
    stop = time.monotonic() + 2.0

    def caller(k: int):
        with httpx.Client(base_url=url, timeout=60) as h:
            i = 0
            while time.monotonic() < stop and i < 200:
                i += 1
                if (k + i) % 3 == 0:
                    r = h.get("/v1/models")
                    kind, frames = "models", 0
                else:
                    n = 1 + (k + i) % 3
                    r = h.post("/v1/models/tile/between",
                               json={"start": {"params": P(10 * k, 30)}, "end": {"params": P(10 * k + 90, 60)},
                                     "frames": n})
                    kind, frames = "between", n
                with lock:
                    outcomes.append((kind, r.status_code, frames, len(r.json().get("frames", []))))

    threads = [threading.Thread(target=caller, args=(k,)) for k in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads)
    assert outcomes and all(status == 200 for _, status, _, _ in outcomes), outcomes[:5]
    assert all(asked == got for kind, _, asked, got in outcomes if kind == "between")
    after = _metrics(url)

    def delta(name, **labels):
        key = (name, tuple(sorted(labels.items())))
        return after.get(key, 0.0) - before.get(key, 0.0)

    sent = sum(kind == "between" for kind, *_ in outcomes)
    assert delta("geotween_requests_total", route=route, method="POST", status="200") == sent
    assert delta("geotween_request_duration_seconds_count", route=route, method="POST") == sent
    assert delta("geotween_requests_total", route="/v1/models", method="GET", status="200") == len(outcomes) - sent
    assert delta("geotween_frames_served_total", model="tile") == sum(f for kind, _, f, _ in outcomes
                                                                      if kind == "between")


def test_fill_command_local_and_through_the_service(server, tmp_path, capsys):
    from geotween.service.cli import main

    targets = tmp_path / "targets.csv"
    targets.write_text("lamp_azimuth,lamp_elevation\n0,20\n90,45\n\n359,70\n")
    local, remote = tmp_path / "local", tmp_path / "remote"
    assert main(["--registry", str(server["root"]), "fill", "tile", str(targets), "--out", str(local),
                 "--keep-rejected"]) == 0
    assert main(["fill", "tile", str(targets), "--out", str(remote), "--url", server["url"], "--keep-rejected"]) == 0
    err = capsys.readouterr().err
    assert "3/3" in err  # the progress bar, on stderr
    reports = [json.loads((d / "report.json").read_text()) for d in (local, remote)]
    for report in reports:
        assert len(report["frames"]) == 3 and report["synthesized"] is True
        assert [f["target"] for f in report["frames"]] == [P(0, 20), P(90, 45), P(359, 70)]
    for a, b in zip(*(r["frames"] for r in reports)):
        # no calibration: no confidence, so every frame is rejected (never let through unjudged),
        # and --keep-rejected writes them all the same
        assert a["confidence"] is None and not a["accepted"] and not b["accepted"]
        assert a["file"] == b["file"] == f"target_{a['index']:04d}.png"
        img_a, img_b = (np.asarray(Image.open(d / a["file"]), dtype=int) for d in (local, remote))
        assert np.abs(img_a - img_b).max() <= 1
    strict = tmp_path / "strict"  # without --keep-rejected, rejected frames are not written
    assert main(["--registry", str(server["root"]), "fill", "tile", str(targets), "--out", str(strict)]) == 0
    assert not list(strict.glob("*.png")) and (strict / "report.json").is_file()
    rows = (local / "report.csv").read_text().splitlines()
    assert rows[0].split(",")[:3] == ["index", "lamp_azimuth", "lamp_elevation"] and len(rows) == 4


@pytest.mark.parametrize("csv_text, words", [
    ("lamp_azimuth,lamp_elevation\n0,abc\n", "row 1, column 'lamp_elevation'"),
    ("lamp_azimuth,lamp_elevation\n0,95\n", "outside"),
    ("lamp_azimuth,height\n0,1\n", "unknown parameter"),
    ("lamp_azimuth,lamp_elevation\n", "no targets"),
])
def test_fill_command_bad_input_exits_2(server, tmp_path, capsys, csv_text, words):
    from geotween.service.cli import main

    targets = tmp_path / "t.csv"
    targets.write_text(csv_text)
    code = main(["--registry", str(server["root"]), "fill", "tile", str(targets), "--out", str(tmp_path / "o")])
    assert code == 2 and words in capsys.readouterr().err
    assert not (tmp_path / "o").exists()
    remote = main(["fill", "tile", str(targets), "--out", str(tmp_path / "o"), "--url", server["url"]])
    assert remote == 2 and not (tmp_path / "o").exists()
