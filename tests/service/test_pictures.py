"""Pictures from the command line: the latent map beside `between --out` frames and in the eval report."""
import json
import shutil

import numpy as np
import pytest
from PIL import Image

from geotween.models.latent_map import INK, ROUTE
from geotween.service.cli import main
from geotween.service.registry import Registry


@pytest.fixture(scope="module")
def registry(small_bundle, tmp_path_factory):
    root = tmp_path_factory.mktemp("pictures-registry")
    Registry.open(root).publish("small", lambda folder: shutil.copytree(small_bundle, folder, dirs_exist_ok=True))
    return str(root)


def _colour_count(path, colour) -> int:
    return int(np.all(np.asarray(Image.open(path).convert("RGB")) == colour, axis=-1).sum())


def test_between_out_writes_the_latent_map(registry, tmp_path):
    out = tmp_path / "frames"
    code = main(["--registry", registry, "between", "small", "lamp_azimuth=300,lamp_elevation=30",
                 "lamp_azimuth=60,lamp_elevation=60", "--frames", "5", "--out", str(out), "--min-confidence", "0.5"])
    assert code == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["latent_map"] == "latent_map.png"
    with Image.open(out / "latent_map.png") as img:
        assert img.format == "PNG" and img.size == (720, 560)
    assert _colour_count(out / "latent_map.png", ROUTE) > 100  # the route is drawn
    # rejecting every frame turns the frame dots into crosses: fewer route-coloured pixels, more ink
    rejected = tmp_path / "rejected"
    assert main(["--registry", registry, "between", "small", "lamp_azimuth=300,lamp_elevation=30",
                 "lamp_azimuth=60,lamp_elevation=60", "--frames", "5", "--out", str(rejected),
                 "--min-confidence", "1.0"]) == 0
    assert json.loads((rejected / "manifest.json").read_text())["rejected"] == 5
    accepted_count = manifest["accepted"]
    if accepted_count:
        assert _colour_count(rejected / "latent_map.png", ROUTE) < _colour_count(out / "latent_map.png", ROUTE)
    assert _colour_count(rejected / "latent_map.png", INK) > _colour_count(out / "latent_map.png", INK)


def test_eval_report_has_the_latent_map(registry, tmp_path, capsys):
    demo = tmp_path / "demo"
    assert main(["render-demo", str(demo), "--size", "16", "--pairs", "2"]) == 0
    out = tmp_path / "eval"
    assert main(["--registry", registry, "eval", "small", str(demo / "truth"), "--out", str(out)]) == 0
    report = json.loads((out / "report.json").read_text())
    assert report["latent_map"] == str(out / "latent_map.png")
    assert (out / "contact_sheet.png").is_file()
    with Image.open(out / "latent_map.png") as img:
        assert img.format == "PNG"
    assert _colour_count(out / "latent_map.png", ROUTE) > 100
    assert "latent map" in capsys.readouterr().out
