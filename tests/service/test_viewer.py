"""The viewer page: served from package data, self-contained, and driven in a real browser
(Debian's headless chromium through Playwright) against a live server on 127.0.0.1."""
import fnmatch
import io
import math
import os
import re
import shutil
import signal
import subprocess
import tomllib
import zipfile
from pathlib import Path

import httpx
import pytest
from fastapi.testclient import TestClient
from test_live import dockerfile_cmd, free_port, local_argv, wait_until_alive

from geotween.service.api import create_app
from geotween.service.registry import Registry
from geotween.service.settings import Settings

ROOT = Path(__file__).resolve().parents[2]
STATIC = ROOT / "service" / "static"
SCRIPTS = ("viewer.js", "viewer-core.js", "viewer-model.js", "viewer-map.js")  # viewer.js imports the rest
CHROMIUM = Path("/usr/bin/chromium")
BROWSER_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                "--disable-background-networking", "--disable-component-update", "--disable-sync"]
WAIT_MS = 60_000  # first model load builds the latent graph; slow on a busy 2-core machine


# -- the page as files and HTTP answers -----------------------------------------------------------
@pytest.fixture(scope="module")
def client(tmp_path_factory):
    with TestClient(create_app(Settings(registry=tmp_path_factory.mktemp("empty-registry")))) as c:
        yield c


def test_the_page_and_its_files_are_served(client):
    page = client.get("/")
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    policy = page.headers["content-security-policy"]
    assert "script-src 'self'" in policy and "connect-src 'self'" in policy and "default-src 'none'" in policy
    assert "synthesized, not captured" in page.text.lower()
    for name, kind in [(n, "text/javascript") for n in SCRIPTS] + [("viewer.css", "text/css")]:
        r = client.get(f"/viewer/{name}")
        assert r.status_code == 200 and r.headers["content-type"].startswith(kind)
        assert r.content == (STATIC / name).read_bytes()
        assert f"viewer/{name}" in page.text
    missing = client.get("/viewer/secrets.txt")
    assert missing.status_code == 404 and missing.json()["error"]["field"] == "asset"
    assert client.get("/viewer/..%2Fapi.py").status_code == 404


def test_the_page_fetches_nothing_from_elsewhere():
    text = {p.name: p.read_text() for p in STATIC.iterdir()}
    assert set(text) == {"index.html", "viewer.css", *SCRIPTS}
    for name, body in text.items():
        # the one absolute URL allowed is the SVG namespace name, which is an identifier, not a fetch
        urls = set(re.findall(r"(?:https?:)?//[A-Za-z0-9.-]+\.[a-z]{2,}[^\s\"')]*", body))
        assert urls <= {"http://www.w3.org/2000/svg"}, (name, urls)
        assert "@import" not in body and "import(" not in body
    for ref in re.findall(r'(?:src|href)="([^"]+)"', text["index.html"]):
        assert not ref.startswith(("/", "http")), ref  # relative: works behind a path prefix too
    # the modules import one another by relative name only, and every one they name is shipped
    imported = {m for n in SCRIPTS for m in re.findall(r'^import [^;]+ from "([^"]+)";', text[n], re.M)}
    assert imported == {"./" + n for n in SCRIPTS if n != "viewer.js"}


def test_the_page_uses_buttons_and_labels():
    html = (STATIC / "index.html").read_text()
    js = "".join((STATIC / n).read_text() for n in SCRIPTS)
    ids = set(re.findall(r'<(?:input|select)[^>]*\bid="([^"]+)"', html))
    labelled = set(re.findall(r'<label[^>]*\bfor="([^"]+)"', html)) | set(re.findall(r'aria-label[^>]*id="([^"]+)"', html))
    assert ids - labelled == set(), "every control has a label"
    assert "<div onclick" not in html and 'role="button"' not in html and 'role="button"' not in js


def test_pip_install_ships_every_package_and_the_page():
    tool = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(tool["packages"])
    found = {"geotween." + str(p.parent.relative_to(ROOT)).replace(os.sep, ".") for top in ("models", "service")
             for p in (ROOT / top).rglob("__init__.py")}
    assert found <= listed, f"packages missing from pyproject: {sorted(found - listed)}"
    patterns = tool["package-data"]["geotween.service"]
    for f in STATIC.iterdir():
        assert any(fnmatch.fnmatch(str(f.relative_to(ROOT / "service")), pat) for pat in patterns), f.name


def test_ci_installs_chromium_before_the_readme_test_command():
    readme = (ROOT / "README.md").read_text()
    command = re.search(r"Run the tests:\n\n    (.+)\n", readme).group(1)
    script = (ROOT / ".ci" / "run").read_text()
    lines = script.splitlines()
    assert command in lines, "the README's test command, verbatim"
    install = next(i for i, line in enumerate(lines) if "apt-get install" in line)
    asked = "\n".join(lines[:install])
    assert "need+=(chromium)" in asked and "need+=(postgresql-15)" in asked  # what the install line installs
    assert install < lines.index(command)
    assert "/usr/bin/chromium" in script and "DEBIAN_FRONTEND=noninteractive" in script
    assert "playwright install" not in script


# -- a real browser against a live server ---------------------------------------------------------
def skippable_copy(src: Path, folder: Path) -> None:
    """The small model with detail transfer forced on and a confidence for its decoded frames, so
    a request may skip refinement."""
    import json

    import numpy as np

    from geotween.models.calibrate import calibrate_decoded
    from geotween.models.engine import Engine, ServingConfig

    shutil.copytree(src, folder, dirs_exist_ok=True)
    engine = Engine.load(src, ServingConfig(refine=True, holdout_captures=False))
    held = engine.bundle.pixels("holdout_images").astype(np.float32) / 255.0
    decoded, _ = calibrate_decoded(engine, engine.bundle.arrays["holdout_params"], held, tau=0.85)
    manifest = json.loads((folder / "manifest.json").read_text())
    manifest["refine"] = {**manifest["refine"], "on": True, "decoded_confidence": decoded.to_dict()}
    (folder / "manifest.json").write_text(json.dumps(manifest))


@pytest.fixture(scope="module")
def live(tmp_path_factory, service_bundle, small_bundle):
    root = tmp_path_factory.mktemp("viewer-registry")
    reg = Registry.open(root)
    reg.publish("tile", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    reg.publish("relief-tile", lambda f: shutil.copytree(small_bundle, f, dirs_exist_ok=True))
    reg.publish("fast-tile", lambda f: skippable_copy(small_bundle, f))
    port = free_port()
    argv = local_argv(dockerfile_cmd(), port)
    argv.insert(argv.index("serve"), "--threads")
    argv.insert(argv.index("serve"), "1")
    env = {**os.environ, "GEOTWEEN_REGISTRY": str(root), "OMP_NUM_THREADS": "1",
           "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    log = tmp_path_factory.mktemp("viewer-log") / "server.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(argv, cwd=ROOT, env=env, stdout=out, stderr=subprocess.STDOUT)
    url = f"http://127.0.0.1:{port}"
    try:
        wait_until_alive(url, proc, log)
        yield {"url": url, "registry": reg, "log": log}
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=30)
        finally:
            if proc.poll() is None:
                proc.kill()


@pytest.fixture(scope="module")
def browser():
    if not CHROMIUM.exists():
        pytest.skip(f"{CHROMIUM} is missing: install Debian's chromium (apt-get install -y chromium) "
                    "to run the viewer's browser test")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        pytest.skip("playwright for Python is missing (pip install playwright; the browser is Debian's chromium)")
    with sync_playwright() as pw:
        b = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=BROWSER_ARGS)
        try:
            yield b
        finally:
            b.close()


def _is_between(response) -> bool:
    return response.request.method == "POST" and response.url.endswith("/v1/models/relief-tile/between")


def _split(confidences: list[float], step: float = 0.05) -> float:
    """A min-confidence on the slider's grid that rejects some frames and keeps others (the one
    nearest the median), if there is one; else 1.0, which rejects all (confidences stay below 1)."""
    lo, hi, mid = min(confidences), max(confidences), sorted(confidences)[len(confidences) // 2]
    cuts = [round(k * step, 2) for k in range(1, round(1 / step) + 1)]
    splitting = [c for c in cuts if lo < c <= hi]
    return min(splitting, key=lambda c: abs(c - mid)) if splitting else 1.0


def _shown(conf: float) -> str:
    return f"confidence {math.floor(conf * 100 + 1e-9) / 100:.2f}"  # the page rounds down


def _panel(page) -> dict[str, str]:
    """The model panel's figures, term -> value."""
    pairs = page.eval_on_selector_all("#model-info dl.metrics dt",
                                      "ts => ts.map(t => [t.textContent, t.nextElementSibling.textContent])")
    return dict(pairs)


KINDS = {"fitted": "calibrated (", "bound": "one cautious rate for every frame", "none": "none: every frame is rejected"}


def _check_trust(page, cal: dict) -> None:
    """The model panel says how far the confidence can be trusted, as the describe answer does."""
    from playwright.sync_api import expect

    shown = _panel(page)
    assert shown["confidence"].startswith(KINDS[cal["kind"]]), shown
    if cal["tau"] is None:  # a model trained without calibration may never have had one
        assert "SSIM threshold (tau)" not in shown
    else:
        assert float(shown["SSIM threshold (tau)"]) == pytest.approx(cal["tau"], abs=0.005)
    quantiles = shown.get("held-out SSIM p10 / p50 / p90")
    if cal["ssim_quantiles"]:
        got = [float(v) for v in quantiles.split(" / ")]
        assert got == pytest.approx([cal["ssim_quantiles"][k] for k in ("p10", "p50", "p90")], abs=0.0006)
    else:
        assert quantiles is None
    chord = shown.get("straight route's confidence")
    if cal.get("straight") is None:
        assert chord is None
    elif cal["straight"]["kind"] == "bound":
        assert chord == "one conservative rate"
    else:
        assert chord.startswith(cal["straight"]["method"] + ", ECE "), chord
    alert = page.locator("#model-info [role=alert]")
    if cal["warning"] is None:
        expect(alert).to_have_count(0)
    else:
        expect(alert).to_have_text("Warning: " + cal["warning"])
        expect(alert).to_be_visible()


def test_the_viewer_in_a_browser(live, browser, tmp_path):
    from playwright.sync_api import expect

    page = browser.new_page(viewport={"width": 1280, "height": 800}, accept_downloads=True)
    failures = []
    page.on("pageerror", lambda exc: failures.append(str(exc)))
    page.on("console", lambda msg: failures.append(msg.text) if msg.type == "error" else None)
    try:
        page.goto(live["url"] + "/")
        expect(page.locator("#notice")).to_contain_text("Synthesized, not captured")
        expect(page.locator("#model option")).to_have_count(3, timeout=WAIT_MS)

        # pick the demo model: its parameter spec, metrics and bank map appear
        page.select_option("#model", "relief-tile")
        expect(page.locator("#status")).to_contain_text("relief-tile version 1 is ready", timeout=WAIT_MS)
        expect(page.locator("#model-info table tbody tr")).to_have_count(2)
        expect(page.locator("#model-info")).to_contain_text("held-out PSNR")
        relief_cal = httpx.get(live["url"] + "/v1/models/relief-tile", timeout=30).json()["calibration"]
        _check_trust(page, relief_cal)
        expect(page.locator("#model-info")).to_contain_text("detail transfer")
        bank = httpx.get(live["url"] + "/v1/models/relief-tile/map", timeout=30).json()["bank"]
        expect(page.locator("#map .bank-point")).to_have_count(len(bank))

        # sliders; a periodic one wraps past its ends from the keyboard, the other stops
        azimuth, elevation = page.locator("#end-lamp_azimuth"), page.locator("#end-lamp_elevation")
        azimuth.fill("359")
        azimuth.press("ArrowRight")
        expect(page.locator("#end-lamp_azimuth-value")).to_have_value("0")
        azimuth.press("ArrowLeft")
        expect(page.locator("#end-lamp_azimuth-value")).to_have_value("359")
        elevation.fill("70")
        elevation.press("ArrowRight")
        expect(page.locator("#end-lamp_elevation-value")).to_have_value("70")
        page.fill("#end-lamp_azimuth-value", "420")  # typed past the top: wraps to 60
        page.locator("#end-lamp_azimuth-value").press("Tab")
        expect(azimuth).to_have_value("60")
        page.locator("#start-lamp_azimuth").fill("300")
        page.locator("#start-lamp_elevation").fill("30")
        elevation.fill("60")
        page.fill("#frames", "6")
        page.locator("#min-confidence").fill("0")
        page.locator("input[name=route][value=geodesic]").check()

        with page.expect_response(_is_between) as first:
            page.click("#go")
        sent = first.value.request.post_data_json
        assert sent["start"] == {"params": {"lamp_azimuth": 300, "lamp_elevation": 30}}
        assert sent["end"] == {"params": {"lamp_azimuth": 60, "lamp_elevation": 60}}
        assert (sent["frames"], sent["route"], sent["min_confidence"]) == (6, "geodesic", 0)
        assert sent["size"] == "working"  # the filmstrip at the model's size keeps the page light
        answer = first.value.json()
        strip = page.locator("#strip li")
        expect(strip).to_have_count(6)
        confidences = [f["confidence"] for f in answer["frames"]]
        for i, conf in enumerate(confidences):
            expect(strip.nth(i).locator(".conf")).to_have_text(_shown(conf))
            expect(strip.nth(i).locator(".verdict")).to_have_text("accepted")
        for i, f in enumerate(answer["frames"]):  # the detail share, only where the model refines
            mark = strip.nth(i).locator(".caption .detail")
            if f["detail"] is None:
                expect(mark).to_have_count(0)
            else:
                expect(mark).to_have_text(f"detail {math.floor(f['detail'] * 100 + 0.5)} %")  # as Math.round
        expect(page.locator("#map .route-frame")).to_have_count(6)
        expect(page.locator("#map .route-end")).to_have_count(2)

        # again with a min confidence that rejects frames: marked by text and hatching, and on the map
        cut = _split(confidences)
        page.locator("#min-confidence").fill(str(cut))
        expect(page.locator("#min-confidence-out")).to_have_text(f"{cut:.2f}")
        with page.expect_response(_is_between) as second:
            page.click("#go")
        answer = second.value.json()
        assert answer["rejected"] >= 1
        expect(strip).to_have_count(6)
        expect(page.locator("#strip li.rejected")).to_have_count(answer["rejected"])
        expect(page.locator("#strip li.rejected .hatch")).to_have_count(answer["rejected"])
        expect(page.locator("#strip li.rejected .verdict")).to_have_text(["REJECTED"] * answer["rejected"])
        expect(page.locator("#map .route-frame.rejected")).to_have_count(answer["rejected"])
        expect(page.locator("#status")).to_contain_text(f"{answer['accepted']} accepted, {answer['rejected']} rejected")

        # hovering a bank point shows its settings
        page.locator("#map .bank-point").first.hover()
        expect(page.locator("#tip")).to_be_visible()
        first_bank = bank[0]["params"]
        expect(page.locator("#tip")).to_contain_text(f"lamp_azimuth {first_bank['lamp_azimuth']:.1f} deg")

        # playback steps through the frames, by button and by the keyboard
        page.click("#step-on")
        expect(page.locator("#screen-label")).to_contain_text("frame 2 of 6")
        page.focus("#step-back")
        page.keyboard.press("Enter")
        expect(page.locator("#screen-label")).to_contain_text("frame 1 of 6")
        page.click("#play")
        expect(page.locator("#play")).to_have_attribute("aria-pressed", "true")
        expect(page.locator("#screen-label")).not_to_contain_text("frame 1 of 6", timeout=5000)
        page.click("#play")
        expect(page.locator("#play")).to_have_text("Play")
        page.locator("#strip li button").nth(answer["frames"].index(next(f for f in answer["frames"]
                                                                        if not f["accepted"]))).click()
        expect(page.locator("#screen-mark")).to_be_visible()

        # the ZIP download is the between answer as PNGs and a manifest, at the default size (full)
        with page.expect_download() as download, page.expect_request(
                lambda r: r.method == "POST" and r.url.endswith("/v1/models/relief-tile/between")
                and r.headers.get("accept") == "application/zip") as zipped:
            page.click("#zip")
        assert "size" not in zipped.value.post_data_json
        archive = zipfile.ZipFile(io.BytesIO(Path(download.value.path()).read_bytes()))
        assert sorted(archive.namelist()) == [f"frame_{i:04d}.png" for i in range(1, 7)] + ["manifest.json"]

        page.screenshot(path=str(tmp_path / "viewer.png"), full_page=True)
        shot = os.environ.get("GEOTWEEN_VIEWER_SHOT")  # a copy to look at, when asked for
        if shot:
            shutil.copy(tmp_path / "viewer.png", shot)
        assert (tmp_path / "viewer.png").stat().st_size > 10_000

        # an end given as an image: chosen with the file input, sent as a data URL
        from PIL import Image

        from geotween.models.render import render_many

        picture = tmp_path / "start.png"
        Image.fromarray((render_many([[300.0, 30.0]], 16)[0, ..., 0] * 255).round().astype("uint8")).save(picture)
        page.set_input_files("#start-file", str(picture))
        expect(page.locator("#start-preview")).to_be_visible()
        expect(page.locator("#start-kind-image")).to_be_checked()
        expect(page.locator("#start-sliders")).to_be_hidden()
        with page.expect_response(_is_between) as third:
            page.click("#go")
        assert third.value.status == 200
        assert third.value.request.post_data_json["start"]["image"].startswith("data:image/png;base64,")
        expect(page.locator("#status")).to_contain_text("6 frames on the geodesic route")

        # a model that refines and may skip it offers the choice; the demo model above did not
        expect(page.locator("#refine-field")).to_be_hidden()
        page.select_option("#model", "fast-tile")
        expect(page.locator("#status")).to_contain_text("fast-tile version 1 is ready", timeout=WAIT_MS)
        expect(page.locator("#refine-field")).to_be_visible()
        for skip in (True, False):
            page.locator("#skip-refine").set_checked(skip)
            with page.expect_response(lambda r: r.request.method == "POST"
                                      and r.url.endswith("/v1/models/fast-tile/between")) as fast:
                page.click("#go")
            assert fast.value.status == 200
            assert fast.value.request.post_data_json.get("refine", True) is (not skip)
            details = [f["detail"] for f in fast.value.json()["frames"]]
            assert all(d is None for d in details) if skip else all(d is not None for d in details)
            expect(page.locator("#strip li .caption .detail")).to_have_count(0 if skip else len(details))

        # a refused request shows the service's message, not a blank page
        page.fill("#frames", "500")
        page.click("#go")
        expect(page.locator("#problem")).to_contain_text("max_frames")

        # a model trained without calibration has no confidence: the panel warns that every frame is rejected
        cal = httpx.get(live["url"] + "/v1/models/tile", timeout=30).json()["calibration"]
        assert cal["kind"] == "none" and cal["warning"], cal  # else the check below would see no warning
        page.select_option("#model", "tile")
        expect(page.locator("#status")).to_have_text(re.compile(r"^tile version 1 is ready"), timeout=WAIT_MS)
        _check_trust(page, cal)
        expect(page.locator("#model-info [role=alert]")).to_contain_text("every frame")

        # an older service, whose describe answer has no kind, quantiles or warning, still gets a panel
        def older(route):
            body = route.fetch().json()
            for key in ("kind", "ssim_quantiles", "warning"):
                body["calibration"].pop(key)
            route.fulfill(json=body)

        page.route("**/v1/models/relief-tile", older)
        page.select_option("#model", "relief-tile")
        expect(page.locator("#status")).to_contain_text("relief-tile version 1 is ready", timeout=WAIT_MS)
        expect(page.locator("#model-info [role=alert]")).to_have_count(0)
        shown = _panel(page)
        assert shown["confidence"] == (f"calibrated ({relief_cal['method']})" if relief_cal["fitted"] else "not calibrated")
        assert "held-out SSIM p10 / p50 / p90" not in shown
        assert float(shown["SSIM threshold (tau)"]) == pytest.approx(relief_cal["tau"], abs=0.005)
        assert failures == [] or all("422" in f for f in failures), failures
    finally:
        page.close()
