import json

import pytest

from service.cli import main


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo")
    assert main(["render-demo", str(out), "--size", "16", "--pairs", "3"]) == 0
    return out


def test_render_demo_writes_scene_and_truth(demo_dir):
    rows = (demo_dir / "scene" / "samples.csv").read_text().strip().splitlines()
    assert rows[0] == "image,lamp_azimuth,lamp_elevation"
    assert len(rows) == 1 + 144  # azimuth every 15 deg x elevation every 10 deg
    truth = json.loads((demo_dir / "truth" / "truth.json").read_text())
    assert len(truth["pairs"]) == 3
    for pair in truth["pairs"]:
        assert [f["t"] for f in pair["frames"]] == pytest.approx([i / 6 for i in range(1, 6)])
        for f in pair["frames"] + [pair["start"], pair["end"]]:
            assert (demo_dir / "truth" / f["image"]).is_file()


def test_render_demo_colour_writes_rgb_scene_and_truth(tmp_path):
    from PIL import Image

    from models.evaluate import load_truth
    from models.scene import load_scene

    assert main(["render-demo", str(tmp_path), "--size", "16", "--pairs", "2", "--colour"]) == 0
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


def test_bad_input_exits_2_with_message(tmp_path, capsys):
    assert main(["--registry", str(tmp_path / "r"), "train", str(tmp_path / "nope"), "--name", "x"]) == 2
    assert "scene.json" in capsys.readouterr().err
    assert main(["--registry", str(tmp_path / "r"), "train", str(tmp_path), "--name", "../evil"]) == 2
    assert "name" in capsys.readouterr().err
    assert not (tmp_path / "evil").exists()


@pytest.fixture()
def small_registry(small_bundle, tmp_path):
    import shutil

    from service.registry import Registry

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
    for f in manifest["frames"]:
        assert (out / f["image"]).is_file() and 0 <= f["confidence"] <= 1


def test_between_strict_exits_3_when_frames_are_rejected(small_registry, tmp_path):
    out = tmp_path / "strict"
    code = main(["--registry", small_registry, "between", "small", "lamp_azimuth=0,lamp_elevation=20",
                 "lamp_azimuth=180,lamp_elevation=70", "--frames", "3", "--out", str(out),
                 "--min-confidence", "1.0", "--strict"])
    assert code == 3  # min confidence 1.0 rejects every frame (probabilities are capped below 1)
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["rejected"] == 3 and all(f["image"] is None for f in manifest["frames"])


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
