"""Load shedding and a clean stop: the admission logic (cap, Retry-After, deadline) without a server,
the refusals' HTTP shape in process, then a real `geotween serve` under 32 clients and through a
SIGTERM drain. Loopback only; every loop is bounded in count and in time."""
import asyncio
import itertools
import os
import re
import shutil
import signal
import subprocess
import threading
import time
from contextlib import contextmanager

import httpx
import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families
from test_live import ROOT, dockerfile_cmd, free_port, local_argv, wait_until_alive

from geotween.service.admission import Admission, retry_after_seconds
from geotween.service.api import create_app
from geotween.service.errors import DeadlinePassed, Overloaded
from geotween.service.jobs import InferencePool
from geotween.service.metrics import Metrics
from geotween.service.registry import Registry
from geotween.service.settings import Settings

# Retry-After is delay-seconds = 1*DIGIT (RFC 9110, section 10.2.3); ours is also never 0
RETRY_AFTER = re.compile(r"[1-9][0-9]*")
WAIT = 10.0  # seconds: the longest any bounded wait below may take


def P(az, el):
    return {"lamp_azimuth": float(az), "lamp_elevation": float(el)}


def until(check, timeout: float = WAIT, step: float = 0.01) -> bool:
    """Poll check() until it is true or `timeout` seconds have passed; its last value."""
    deadline = time.monotonic() + timeout
    while not check():
        if time.monotonic() > deadline:
            return False
        time.sleep(step)
    return True


def scrape(url: str) -> dict:
    """Every sample of /metrics, read with prometheus_client's own parser: (name, labels) -> value."""
    out = {}
    for family in text_string_to_metric_families(httpx.get(url + "/metrics", timeout=10).text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


# -- the admission logic, no server ------------------------------------------------------------------
def test_retry_after_is_the_backlog_drained_by_the_workers_in_whole_seconds():
    # Little's law, L = lambda x W (published queueing law): L requests served at lambda = workers / service
    # time per second leave in W = L x service / workers seconds; worked by hand below
    assert retry_after_seconds(8, 0.9, 2) == 4      # 8 x 0.9 s over 2 workers = 3.6 s, rounded up
    assert retry_after_seconds(3, 0.5, 1) == 2      # 1.5 s
    assert retry_after_seconds(4, 0.5, 2) == 1      # exactly 1 s stays 1
    assert retry_after_seconds(0, 5.0, 1) == 1      # never 0: an immediate retry is what shedding avoids
    assert retry_after_seconds(2, 0.001, 4) == 1
    assert retry_after_seconds(10_000, 2.0, 1) == 60 and retry_after_seconds(10, 9.0, 1, ceiling=30) == 30
    for args, ceiling in (((1, 1.0, 0), 60), ((-1, 1.0, 1), 60), ((1, float("nan"), 1), 60), ((1, 1.0, 1), 0)):
        with pytest.raises(ValueError):
            retry_after_seconds(*args, ceiling=ceiling)


def test_the_settings_have_defaults_and_refuse_unsafe_values():
    s = Settings()
    assert s.inflight_limit == 4 * s.inference_workers and s.request_deadline == 10.0
    assert Settings(inference_workers=3).inflight_limit == 12 and Settings(max_inflight=5).inflight_limit == 5
    for name, value, allowed in (("max_inflight", 0, "[1, 100000]"), ("request_deadline", 0.0, "[0.01, 3600.0]"),
                                 ("drain_seconds", -1.0, "[0.0, 600.0]"), ("shutdown_grace", 0.0, "[0.1, 3600.0]")):
        with pytest.raises(ValueError, match=re.escape(f"{name}: {value!r} is outside the allowed range {allowed}")):
            Settings.load(**{name: value})


@pytest.fixture
def pool():
    p = InferencePool(1)
    yield p
    p.shutdown()


def test_the_cap_refuses_at_once_and_frees_a_slot_when_work_ends(pool):
    metrics = Metrics()
    admission = Admission(pool, max_inflight=2, deadline_s=5.0, metrics=metrics)
    gate = threading.Event()
    ran = []

    async def scenario():
        blocked = asyncio.create_task(admission.run(gate.wait, 5.0))       # holds the only worker
        queued = asyncio.create_task(admission.run(ran.append, "queued"))  # waits on the pool's queue
        for _ in range(500):
            if admission.in_flight == 2:
                break
            await asyncio.sleep(0.01)
        assert admission.in_flight == 2
        t0 = time.monotonic()
        with pytest.raises(Overloaded) as refused:
            await admission.run(ran.append, "refused")
        assert time.monotonic() - t0 < 0.5  # at once, not after waiting for room
        gate.set()
        assert await blocked is True
        await queued
        for _ in range(500):  # the slot frees in the future's callback, on the worker thread
            if admission.in_flight == 0:
                break
            await asyncio.sleep(0.01)
        assert admission.in_flight == 0
        await admission.run(ran.append, "after")  # room again
        return refused.value

    refused = asyncio.run(scenario())
    assert (refused.status, refused.code) == (429, "overloaded") and refused.retry_after >= 1
    assert ran == ["queued", "after"]  # the refused request did no work
    assert metrics.registry.get_sample_value("geotween_requests_shed_total", {"reason": "overloaded"}) == 1.0
    assert metrics.registry.get_sample_value("geotween_inference_inflight") == 0.0


def test_work_not_started_by_the_deadline_is_refused_and_never_runs(pool):
    admission = Admission(pool, max_inflight=4, deadline_s=0.3)
    gate = threading.Event()
    ran = []

    async def scenario():
        blocked = asyncio.create_task(admission.run(gate.wait, 5.0))
        await asyncio.sleep(0.05)
        t0 = time.monotonic()
        try:
            with pytest.raises(DeadlinePassed) as late:
                await admission.run(ran.append, "late")
            waited = time.monotonic() - t0
        finally:
            gate.set()
        await blocked
        return late.value, waited

    late, waited = asyncio.run(scenario())
    assert (late.status, late.code) == (503, "deadline_passed") and late.retry_after >= 1
    assert 0.25 <= waited < 2.0  # refused at its deadline, not when a worker came free
    pool.call(lambda: None)  # everything queued before this has been taken off the queue or run
    assert ran == [] and until(lambda: admission.in_flight == 0, timeout=2.0)


def test_work_that_reaches_a_worker_after_its_deadline_does_nothing(pool):
    """The race the timer can lose: a worker picks the work up just after its deadline passed.
    The clock moves 10 s per reading, so the worker sees it start 10 s after it was admitted."""
    ticks = itertools.count()
    admission = Admission(pool, max_inflight=2, deadline_s=5.0, clock=lambda: 10.0 * next(ticks))
    ran = []
    with pytest.raises(DeadlinePassed):
        asyncio.run(admission.run(ran.append, "late"))
    assert ran == [] and until(lambda: admission.in_flight == 0, timeout=2.0)


def test_retry_after_comes_from_measured_service_times_and_is_long_enough(pool):
    """Three requests of 0.4 s in flight on one worker: Retry-After ceil(3 x 0.4) = 2 s, and a
    caller that waits that long is admitted (the backlog drains at the measured rate)."""
    admission = Admission(pool, max_inflight=3, deadline_s=10.0, default_service_s=1.0)
    assert admission.service_time() == 1.0  # nothing measured yet: the named default

    async def scenario():
        for _ in range(2):
            await admission.run(time.sleep, 0.4)
        measured = admission.service_time()
        backlog = [asyncio.create_task(admission.run(time.sleep, 0.4)) for _ in range(3)]
        await asyncio.sleep(0.05)
        with pytest.raises(Overloaded) as refused:
            await admission.run(time.sleep, 0.0)
        await asyncio.sleep(refused.value.retry_after)
        t0 = time.monotonic()
        await admission.run(time.sleep, 0.0)  # admitted after waiting as told
        admitted_after = time.monotonic() - t0
        await asyncio.gather(*backlog)
        return measured, refused.value.retry_after, admitted_after

    measured, retry_after, admitted_after = asyncio.run(scenario())
    assert 0.4 <= measured < 0.6
    assert retry_after == retry_after_seconds(3, measured, 1) == 2
    assert admitted_after < 0.5  # the backlog had drained: no long wait behind it


def test_refusals_keep_the_error_shape_with_retry_after(registry):
    """In process: a request whose work cannot start by its deadline gets 503 in the one error
    shape with Retry-After; /readyz answers 503 'draining' once the app is marked draining."""
    app = create_app(Settings(registry=registry.root, inference_workers=1, request_deadline=0.3))
    gate = threading.Event()
    with TestClient(app) as client:
        held = app.state.services.pool.submit(gate.wait, 5.0)  # the only worker is busy
        try:
            r = client.post("/v1/models/tile/between",
                            json={"start": {"params": P(10, 30)}, "end": {"params": P(100, 60)}, "frames": 2})
        finally:
            gate.set()
        held.result(timeout=5)
        assert r.status_code == 503 and RETRY_AFTER.fullmatch(r.headers["retry-after"])
        error = r.json()["error"]
        assert error["code"] == "deadline_passed" and set(error) == {"code", "message", "field"}
        assert client.post("/v1/models/tile/between", json={"start": {"params": P(10, 30)},
                                                             "end": {"params": P(100, 60)}}).status_code == 200
        assert client.get("/readyz").status_code == 200
        app.state.draining = True
        r = client.get("/readyz")
        assert r.status_code == 503 and r.json()["error"]["code"] == "draining"
        assert client.get("/healthz").status_code == 200  # alive, only not ready


# -- a real server ------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def registry_root(tmp_path_factory, service_bundle):
    root = tmp_path_factory.mktemp("load-registry")
    Registry.open(root).publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    return root


@contextmanager
def running_server(root, log, **settings):
    """`geotween serve` (the Dockerfile's CMD) on 127.0.0.1 with one torch thread and GEOTWEEN_*
    settings; killed on the way out if it is still running."""
    port = free_port()
    argv = local_argv(dockerfile_cmd(), port)
    argv[argv.index("serve"):argv.index("serve")] = ["--threads", "1"]
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(root), "OMP_NUM_THREADS": "1",
           "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""),
           **{f"GEOTWEEN_{k.upper()}": str(v) for k, v in settings.items()}}
    with open(log, "wb") as out:
        proc = subprocess.Popen(argv, cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    try:
        wait_until_alive(url, proc, log)
        yield url, proc
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)


def test_thirty_two_clients_get_answers_or_refusals_with_retry_after(registry_root, tmp_path):
    """32 callers against one worker and a cap of 2: every answer is 200, or 429/503 with
    Retry-After in the error shape; no other status, and the cap is really reached."""
    log = tmp_path / "server.log"
    with running_server(registry_root, log, inference_workers=1, max_inflight=2, request_deadline=2) as (url, proc):
        before = scrape(url)
        outcomes, lock = [], threading.Lock()
        stop = time.monotonic() + 8.0

        def caller(k: int):
            with httpx.Client(base_url=url, timeout=30) as h:
                for i in range(8):
                    if time.monotonic() > stop:
                        break
                    kind = (k + i) % 4
                    if kind == 0:
                        r = h.post("/v1/models/tile/fill", json={"targets": [P(15 * k, 40), P(15 * k + 7, 60)]})
                    elif kind == 1:
                        r = h.get("/v1/models/tile/map")
                    else:
                        r = h.post("/v1/models/tile/between", json={"start": {"params": P(10 * k, 30)},
                                                                    "end": {"params": P(10 * k + 150, 65)},
                                                                    "frames": 64})
                    with lock:
                        outcomes.append((r.status_code, r.headers.get("retry-after"),
                                         r.json() if r.status_code != 200 else None))

        threads = [threading.Thread(target=caller, args=(k,)) for k in range(32)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=60)
        assert not any(t.is_alive() for t in threads)
        statuses = [s for s, _, _ in outcomes]
        assert len(outcomes) >= 32 and set(statuses) <= {200, 429, 503}, sorted(set(statuses))
        assert 429 in statuses and 200 in statuses
        for status, retry_after, body in outcomes:
            if status != 200:
                assert retry_after is not None and RETRY_AFTER.fullmatch(retry_after), (status, retry_after)
                assert body["error"]["code"] == {429: "overloaded", 503: "deadline_passed"}[status], body
        after = scrape(url)

        def shed(reason):
            key = ("geotween_requests_shed_total", (("reason", reason),))
            return after.get(key, 0.0) - before.get(key, 0.0)

        assert shed("overloaded") == statuses.count(429) and shed("deadline") == statuses.count(503)
        assert after[("geotween_inference_inflight", ())] == 0.0  # every slot given back
        # and the service is as good as before the storm
        r = httpx.post(url + "/v1/models/tile/between", json={"start": {"params": P(0, 30)},
                                                              "end": {"params": P(90, 60)}, "frames": 4}, timeout=30)
        assert r.status_code == 200 and len(r.json()["frames"]) == 4
    print(f"overload: {len(outcomes)} requests, {statuses.count(200)} x 200, {statuses.count(429)} x 429, "
          f"{statuses.count(503)} x 503")


def test_sigterm_drains_then_finishes_requests_in_flight_and_exits_0(registry_root, tmp_path):
    """SIGTERM with requests in flight: /readyz answers 503 at once while new requests are still
    served for drain_seconds; then the listener closes, every request in flight is answered in
    full, and the process exits 0."""
    drain, grace, n = 1.5, 30.0, 40  # 40 answers of 1024 frames, about 0.1 s each on one worker here
    log = tmp_path / "server.log"
    with running_server(registry_root, log, inference_workers=1, max_frames=1024, max_inflight=64,
                        request_deadline=60, drain_seconds=drain, shutdown_grace=grace) as (url, proc):
        body = {"start": {"params": P(10, 30)}, "end": {"params": P(200, 60)}, "frames": 1024}
        t0 = time.monotonic()
        assert httpx.post(url + "/v1/models/tile/between", json=body, timeout=60).status_code == 200  # loads it
        one = time.monotonic() - t0
        results, lock = {}, threading.Lock()

        def call(k: int, frames: int):
            try:
                r = httpx.post(url + "/v1/models/tile/between", json={**body, "frames": frames}, timeout=60)
                outcome = (r.status_code, len(r.json().get("frames", [])))
            except httpx.HTTPError as exc:  # a lost request: the checks below fail on it
                outcome = (repr(exc), 0)
            with lock:
                results[k] = (*outcome, time.monotonic())

        threads = [threading.Thread(target=call, args=(k, 1024)) for k in range(n)]
        for t in threads:
            t.start()
        inflight = ("geotween_inference_inflight", ())
        # every request has reached the server: in flight there, or answered already
        assert until(lambda: scrape(url).get(inflight, 0.0) + len(results) >= n, step=0.02), "requests went missing"
        assert scrape(url)[inflight] >= n // 2  # most of the work is still ahead

        sent = time.monotonic()
        proc.send_signal(signal.SIGTERM)
        ready = []
        assert until(lambda: ready.append(httpx.get(url + "/readyz", timeout=5)) or ready[-1].status_code == 503,
                     timeout=drain, step=0.02)
        assert ready[-1].json()["error"]["code"] == "draining"
        # still accepting and serving during the drain, on new connections
        assert httpx.get(url + "/healthz", timeout=5).status_code == 200
        threads.append(threading.Thread(target=call, args=(n, 2)))  # queued behind the others
        threads[-1].start()
        assert time.monotonic() - sent < drain - 0.4
        time.sleep(0.2)  # its request reaches the server well inside the drain

        def refused() -> bool:
            try:
                httpx.get(url + "/healthz", timeout=1)
                return False
            except httpx.TransportError:  # no longer accepting connections
                return True

        assert until(refused, timeout=drain + 10, step=0.02)
        closed = time.monotonic()
        for t in threads:
            t.join(timeout=grace + 10)
        assert not any(t.is_alive() for t in threads)
        assert proc.wait(timeout=grace + 10) == 0, log.read_text()[-3000:]
    assert closed - sent >= drain - 0.1  # accepting until the drain ended
    assert sorted(results) == list(range(n + 1))
    assert all(r[:2] == (200, 1024) for k, r in results.items() if k < n), results  # none lost
    assert results[n][:2] == (200, 2)
    finished_after_close = sum(r[2] > closed for r in results.values())
    assert finished_after_close >= 1, (one, results, closed)  # the grace period carried them
    assert "draining" in log.read_text()
    print(f"drain: the first request {one:.2f} s; {n} sent before SIGTERM, listener closed after {closed - sent:.2f} s, "
          f"{finished_after_close} answered after that")
