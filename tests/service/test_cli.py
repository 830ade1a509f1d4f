import json

import pytest

from geotween.service.cli import main


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    assert main(["render-demo", str(out), "--size", "16", "--pairs", "3", "--long-pairs", "4"]) == 0
    return out


def test_render_demo_writes_scene_and_truth(demo_dir):
    rows = (demo_dir / "scene" / "samples.csv").read_text().strip().splitlines()
    assert rows[0] == "image,lamp_azimuth,lamp_elevation"
    assert len(rows) == 1 + 144  # azimuth every 15 deg x elevation every 10 deg
    truth = json.loads((demo_dir / "truth" / "truth.json").read_text())
    assert len(truth["pairs"]) == 3 + 4
    assert all(2 <= p["steps"] <= 6 for p in truth["pairs"][:3])  # the short pairs come first
    az_long = [p for p in truth["pairs"][3:] if p["direction"] == "azimuth"]
    assert az_long and all(7 <= p["steps"] <= 11 for p in az_long)  # 105 to 165 deg on the 15 deg grid
    for pair in truth["pairs"]:
        assert [f["t"] for f in pair["frames"]] == pytest.approx([i / 6 for i in range(1, 6)])
        for f in pair["frames"] + [pair["start"], pair["end"]]:
            assert (demo_dir / "truth" / f["image"]).is_file()


def test_render_demo_colour_writes_rgb_scene_and_truth(tmp_path):
    from PIL import Image

    from geotween.models.evaluate import load_truth
    from geotween.models.scene import load_scene

    assert main(["render-demo", str(tmp_path), "--size", "16", "--pairs", "2", "--long-pairs", "0", "--colour"]) == 0
    scene = load_scene(tmp_path / "scene", resolution=16)
    assert scene.name == "relief-tile-colour" and scene.channels == 3 and len(scene) == 144
    pairs = load_truth(tmp_path / "truth", 16, 3)
    assert len(pairs) == 2 and pairs[0]["truth"].shape == (5, 16, 16, 3)
    with Image.open(tmp_path / "truth" / "p000_t1.png") as img:
        assert img.mode == "RGB"


def test_train_registers_and_models_lists(demo_dir, tmp_path, capsys):
    reg = str(tmp_path / "reg")
    code = main(["--registry", reg, "train", str(demo_dir / "scene"), "--name", "tile", "--resolution", "16",
                 "--steps", "5"])
    out = capsys.readouterr().out
    assert code == 0
    assert "registered tile@1" in out
    assert main(["--registry", reg, "models"]) == 0
    assert "tile@1" in capsys.readouterr().out


def test_a_tau_the_model_cannot_reach_warns_and_every_frame_is_rejected(demo_dir, tmp_path, capsys):
    reg = str(tmp_path / "reg")
    assert main(["--registry", reg, "train", str(demo_dir / "scene"), "--name", "tile", "--resolution", "16",
                 "--steps", "5", "--tau", "0.999"]) == 0
    err = capsys.readouterr().err
    assert "warning: tile@1" in err and "reached SSIM 0.999" in err and "--tau" in err
    assert main(["--registry", reg, "models"]) == 0
    listed = capsys.readouterr().out
    assert "confidence: P(SSIM >= 0.999), bound" in listed and "straight route: one conservative rate" in listed
    out = tmp_path / "frames"
    code = main(["--registry", reg, "between", "tile", "lamp_azimuth=10,lamp_elevation=30",
                 "lamp_azimuth=170,lamp_elevation=30", "--frames", "4", "--out", str(out), "--strict"])
    assert code == 3  # --strict: some frame was rejected (here: all of them)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["tau"] == 0.999 and manifest["accepted"] == 0 and manifest["rejected"] == 4
    assert all(f["confidence"] == 0.0 for f in manifest["frames"])


def test_tau_out_of_range_is_refused_before_training(demo_dir, tmp_path, capsys):
    for bad in ("1.0", "0", "-0.5"):
        assert main(["--registry", str(tmp_path / "r"), "train", str(demo_dir / "scene"), "--name", "t",
                     "--tau", bad]) == 2
        assert "tau" in capsys.readouterr().err
    assert not (tmp_path / "r" / "models").exists() or not any((tmp_path / "r" / "models").iterdir())


def test_bad_input_exits_2_with_message(tmp_path, capsys):
    assert main(["--registry", str(tmp_path / "r"), "train", str(tmp_path / "nope"), "--name", "x"]) == 2
    assert "scene.json" in capsys.readouterr().err
    assert main(["--registry", str(tmp_path / "r"), "train", str(tmp_path), "--name", "../evil"]) == 2
    assert "name" in capsys.readouterr().err
    assert not (tmp_path / "evil").exists()


@pytest.fixture()
def small_registry(small_bundle, tmp_path):
    import shutil

    from geotween.service.registry import Registry

    reg = Registry.open(tmp_path / "reg")
    reg.publish("small", lambda folder: shutil.copytree(small_bundle, folder, dirs_exist_ok=True))
    return str(tmp_path / "reg")


def test_between_writes_frames_and_manifest(small_registry, tmp_path, capsys):
    out = tmp_path / "frames"
    code = main(["--registry", small_registry, "between", "small", "lamp_azimuth=30,lamp_elevation=30",
                 "lamp_azimuth=90,lamp_elevation=50", "--frames", "4", "--out", str(out), "--keep-rejected"])
    assert code == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["synthesized"] is True
    assert [f["index"] for f in manifest["frames"]] == [1, 2, 3, 4]
    assert [f["t"] for f in manifest["frames"]] == pytest.approx([0.2, 0.4, 0.6, 0.8], abs=1e-6)
    # the files are named as in the ZIP answer (tests/service/test_contract.py checks the whole manifest)
    assert [f["file"] for f in manifest["frames"]] == [f"frame_{i:04d}.png" for i in range(1, 5)]
    for f in manifest["frames"]:
        assert (out / f["file"]).is_file() and 0 <= f["confidence"] <= 1


def test_between_strict_exits_3_when_frames_are_rejected(small_registry, tmp_path):
    out = tmp_path / "strict"
    code = main(["--registry", small_registry, "between", "small", "lamp_azimuth=0,lamp_elevation=20",
                 "lamp_azimuth=180,lamp_elevation=70", "--frames", "3", "--out", str(out),
                 "--min-confidence", "1.0", "--strict"])
    assert code == 3  # min confidence 1.0 rejects every frame (probabilities are capped below 1)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["rejected"] == 3 and all(f["file"] is None for f in manifest["frames"])
    assert sorted(p.name for p in out.iterdir()) == ["latent_map.png", "manifest.json"]


def test_between_warns_when_an_image_end_cannot_be_placed(small_registry, small_bundle, tmp_path, capsys):
    import numpy as np
    from PIL import Image

    from geotween.models.bundle import load_bundle

    # a captured view turned upside down: no capture matches it at any settings read for it
    bank = load_bundle(small_bundle).pixels()
    odd = tmp_path / "odd.png"
    Image.fromarray(np.ascontiguousarray(bank[3][::-1, ::-1, 0])).save(odd)
    out = tmp_path / "unplaced"
    assert main(["--registry", small_registry, "between", "small", "lamp_azimuth=30,lamp_elevation=30", str(odd),
                 "--frames", "3", "--out", str(out), "--keep-rejected", "--strict"]) == 3
    assert "could not be placed" in capsys.readouterr().err
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["ends_placed"] is False and manifest["accepted"] == 0
    assert all(f["confidence"] is None for f in manifest["frames"])


@pytest.mark.parametrize("start, message", [
    ("lamp_azimuth=30", "missing parameter 'lamp_elevation'"),
    ("lamp_azimuth=30,lamp_elevation=40,zoom=1", "unknown parameter 'zoom'"),
    ("lamp_azimuth=nan,lamp_elevation=40", "finite"),
    ("lamp_azimuth=30,lamp_elevation=95", "outside"),
    ("lamp_azimuth=abc,lamp_elevation=40", "not a number"),
    ("missing.png", "no such image file"),
])
def test_between_bad_input_writes_nothing(small_registry, tmp_path, capsys, start, message):
    out = tmp_path / "nothing"
    code = main(["--registry", small_registry, "between", "small", start, "lamp_azimuth=0,lamp_elevation=40",
                 "--frames", "3", "--out", str(out)])
    assert code == 2
    assert message in capsys.readouterr().err
    assert not out.exists()


def test_between_refuses_unreadable_and_wrong_channel_images(small_registry, tmp_path, capsys):
    import numpy as np
    from PIL import Image

    junk = tmp_path / "junk.png"
    junk.write_bytes(b"not an image at all")
    rgb = tmp_path / "rgb.png"
    Image.fromarray(np.zeros((16, 16, 3), dtype=np.uint8)).save(rgb)
    for start, message in ((junk, "not a readable image"), (rgb, "3 channel")):
        out = tmp_path / "o"
        assert main(["--registry", small_registry, "between", "small", str(start), "lamp_azimuth=0,lamp_elevation=40",
                     "--frames", "2", "--out", str(out)]) == 2
        assert message in capsys.readouterr().err
        assert not out.exists()
    assert main(["--registry", small_registry, "between", "small", "lamp_azimuth=0,lamp_elevation=40",
                 "lamp_azimuth=10,lamp_elevation=40", "--frames", "0", "--out", str(tmp_path / "o")]) == 2


# -- detail transfer in the manifests and the listing ------------------------------------------------
@pytest.fixture(scope="module")
def detail_registry(service_bundle, tmp_path_factory):
    """The tiny bundle three ways: no refine choice, refining off, refining forced on (the held-out
    figures are its own, from models.calibrate.choose_refine)."""
    import shutil

    from test_api import with_refine

    from geotween.service.registry import Registry

    root = tmp_path_factory.mktemp("detail-reg")
    reg = Registry.open(root)
    reg.publish("bare", lambda f: shutil.copytree(service_bundle, f, dirs_exist_ok=True))
    entries = {}
    for name, on in (("plain", False), ("fine", True)):
        reg.publish(name, lambda f, on=on, name=name: entries.update({name: with_refine(service_bundle, f, on=on)}))
    return str(root), reg, entries


BETWEEN = ["lamp_azimuth=10,lamp_elevation=30", "lamp_azimuth=100,lamp_elevation=60"]


def test_between_manifest_carries_each_frames_detail(detail_registry, tmp_path):
    from geotween.models.engine import Endpoint, Engine

    root, reg, _ = detail_registry
    for name in ("fine", "plain", "bare"):
        out = tmp_path / name
        assert main(["--registry", root, "between", name, *BETWEEN, "--frames", "3", "--out", str(out)]) == 0
        frames = json.loads((out / "manifest.json").read_text())["frames"]
        ends = [Endpoint(params={k: float(v) for k, v in (p.split("=") for p in e.split(","))}) for e in BETWEEN]
        want = [f.detail for f in Engine.load(reg.get(name).path).between(*ends, frames=3).frames]
        if name == "fine":
            assert all(isinstance(f["detail"], float) and 0.0 <= f["detail"] <= 1.0 for f in frames), frames
            assert [f["detail"] for f in frames] == pytest.approx(want, abs=1e-9)
        else:
            assert [f["detail"] for f in frames] == want == [None, None, None]
    out = tmp_path / "fine-no-refine"  # detail transfer skipped on request: the decoded frames
    assert main(["--registry", root, "between", "fine", *BETWEEN, "--frames", "3", "--out", str(out),
                 "--no-refine"]) == 0
    assert [f["detail"] for f in json.loads((out / "manifest.json").read_text())["frames"]] == [None, None, None]


def test_models_says_whether_each_model_refines(detail_registry, capsys):
    root, _, entries = detail_registry
    assert main(["--registry", root, "models"]) == 0
    lines = capsys.readouterr().out.splitlines()
    # three lines a model: name@version and figures, its detail transfer, its confidence
    said = {lines[i].split("@")[0]: lines[i + 1].strip() for i in range(0, len(lines), 3)}
    confidence = {lines[i].split("@")[0]: lines[i + 2].strip() for i in range(0, len(lines), 3)}
    assert said["bare"] == "detail transfer off (no choice made at training time)"
    assert confidence["bare"].startswith("confidence: none -- ") and "every frame it serves is rejected" in \
        confidence["bare"]
    for name, state in (("plain", "off"), ("fine", "on")):
        dec, ref = entries[name]["holdout"]["decoded"], entries[name]["holdout"]["refined"]
        flow = f" (flow {entries[name]['config']['flow']})" if state == "on" else ""
        pair = state == "on" and entries[name]["config"].get("mode") == "pair"
        what = "frames from the captures around each" if pair else "detail transfer"
        assert said[name].startswith(f"{what} {state}{flow}; "), said[name]
        assert f"PSNR {dec['psnr']:.2f} -> {ref['psnr']:.2f} dB" in said[name]
        assert f"SSIM {dec['ssim']:.4f} -> {ref['ssim']:.4f}" in said[name]


def test_fill_reports_detail_locally_and_through_the_service(detail_registry, tmp_path, monkeypatch):
    """The remote path runs against the real app: the client's transport hands each request to
    FastAPI's TestClient, so no server is started."""
    import csv

    import httpx
    from fastapi.testclient import TestClient

    from geotween.service import client as client_module
    from geotween.service.api import create_app
    from geotween.service.settings import Settings

    root, _, _ = detail_registry
    targets = tmp_path / "targets.csv"
    targets.write_text("lamp_azimuth,lamp_elevation\n0,20\n95,50\n")
    with TestClient(create_app(Settings(registry=root))) as app:
        def forward(request: httpx.Request) -> httpx.Response:
            r = app.request(request.method, request.url.raw_path.decode(), content=request.content,
                            headers={k: v for k, v in request.headers.items() if k.lower() != "host"})
            return httpx.Response(r.status_code, content=r.content, headers=r.headers)

        real = client_module.Client
        monkeypatch.setattr(client_module, "Client",
                            lambda url, **kw: real(url, transport=httpx.MockTransport(forward), **kw))
        got = {}
        for name in ("fine", "plain"):
            for where, extra in (("local", []), ("remote", ["--url", "http://geotween.test"])):
                out = tmp_path / f"{name}-{where}"
                assert main(["--registry", root, "fill", name, str(targets), "--out", str(out), *extra]) == 0
                report = [f["detail"] for f in json.loads((out / "report.json").read_text())["frames"]]
                with open(out / "report.csv", newline="") as fh:
                    rows = list(csv.DictReader(fh))
                column = [None if r["detail"] == "" else float(r["detail"]) for r in rows]
                if name == "fine":
                    assert column == pytest.approx(report, abs=1e-6)  # the CSV rounds to 6 places
                else:
                    assert column == report
                got[name, where] = report
    assert all(isinstance(v, float) and 0.0 <= v <= 1.0 for v in got["fine", "local"])
    assert got["fine", "remote"] == pytest.approx(got["fine", "local"], abs=1e-9)
    assert got["plain", "local"] == got["plain", "remote"] == [None, None]
    for where, extra in (("local", []), ("remote", ["--url", "http://geotween.test"])):  # refinement skipped
        out = tmp_path / f"fine-{where}-no-refine"
        with TestClient(create_app(Settings(registry=root))) as app:
            assert main(["--registry", root, "fill", "fine", str(targets), "--out", str(out), "--no-refine",
                         *extra]) == 0
        assert [f["detail"] for f in json.loads((out / "report.json").read_text())["frames"]] == [None, None]


def test_demo_runs_end_to_end_on_a_short_training(tmp_path, capsys):
    # the README's demo command, with a few training steps: scene, training, eval, example frames
    out = tmp_path / "demo"
    assert main(["--registry", str(tmp_path / "reg"), "demo", "--steps", "4", "--out", str(out)]) == 0
    said = capsys.readouterr().out
    assert "registered relief-tile@1" in said and "geodesic" in said and "not captured" in said
    manifest = json.loads((out / "between" / "manifest.json").read_text())
    assert len(manifest["frames"]) == 8
    assert (out / "report.json").is_file() and (out / "contact_sheet.png").is_file()
