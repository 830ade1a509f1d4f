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
