"""Scene folders: round trips, image conversion, and one test per kind of bad input."""
from __future__ import annotations

import io
import json
import os
import zlib

import numpy as np
import pytest
from PIL import Image

from geotween.models.params import ParamSpace
from geotween.models.scene import SceneError, load_scene, load_spec, save_scene

SPEC = {"name": "relief-tile",
        "parameters": [{"name": "lamp_azimuth", "unit": "deg", "min": 0, "max": 360, "periodic": True},
                       {"name": "lamp_elevation", "unit": "deg", "min": 20, "max": 70}]}
SPACE = ParamSpace.from_list(SPEC["parameters"])
ROWS = [(f"images/{i}.png", 45.0 * i, 20.0 + 5.0 * i) for i in range(8)]


HEADER = "image,lamp_azimuth,lamp_elevation"


def write_scene(root, rows=ROWS, spec=SPEC, mode="L", size=(16, 16), header=HEADER):
    """A scene folder written with Pillow directly (independent of save_scene)."""
    rng = np.random.default_rng(0)
    (root / "images").mkdir(parents=True, exist_ok=True)
    (root / "scene.json").write_text(json.dumps(spec))
    lines = [header]
    for row in rows:
        lines.append(",".join(str(c) for c in row))
        rel = str(row[0])
        if rel.startswith("images/") and not (root / rel).exists():
            shape = (size[1], size[0]) if mode == "L" else (size[1], size[0], len(mode))
            Image.fromarray(rng.integers(0, 256, shape, dtype=np.uint8), mode=mode).save(root / rel)
    (root / "samples.csv").write_text("\n".join(lines) + "\n")
    return root


def check(err: SceneError, file, row=None, column=None, value=None):
    """The error carries the culprit and its message names each known part."""
    assert (err.file, err.row, err.column) == (file, row, column)
    msg = str(err)
    assert msg.startswith(file)
    if row is not None:
        assert f"row {row}" in msg
    if column is not None:
        assert repr(column) in msg
    if value is not None:
        assert str(err.value) == str(value) and repr(str(value)) in msg
    return msg


def fails(root, **kwargs) -> SceneError:
    with pytest.raises(SceneError) as info:
        load_scene(root, **kwargs)
    assert isinstance(info.value, ValueError)
    return info.value


# -- happy paths -------------------------------------------------------------------------------
@pytest.mark.parametrize("channels", [1, 3])
def test_save_load_round_trip(tmp_path, channels):
    rng = np.random.default_rng(1)
    images = rng.random((8, 16, 16, channels))
    params = np.column_stack([rng.uniform(0, 360, 8), rng.uniform(20, 70, 8)])
    root = save_scene(tmp_path / "s", "round", SPACE, images, params)
    scene = load_scene(root, resolution=16)
    assert scene.name == "round" and scene.space == SPACE
    assert scene.images.dtype == np.float32 and scene.images.shape == (8, 16, 16, channels)
    assert scene.channels == channels and scene.resolution == 16
    assert np.abs(scene.images - images).max() <= 0.5 / 255 + 1e-6  # 8-bit rounding
    assert np.array_equal(scene.params, params)
    assert scene.files == [f"images/{i:04d}.png" for i in range(8)]


def test_grayscale_and_rgb_keep_their_channels(tmp_path):
    gray = load_scene(write_scene(tmp_path / "g", mode="L"), resolution=16)
    rgb = load_scene(write_scene(tmp_path / "c", mode="RGB"), resolution=16)
    assert gray.channels == 1 and rgb.channels == 3
    raw = np.asarray(Image.open(tmp_path / "c" / "images/3.png"), dtype=np.float32) / 255
    assert np.array_equal(rgb.images[3], raw)
    assert np.allclose(gray.params, [[r[1], r[2]] for r in ROWS])


def test_resize_matches_pillow_lanczos(tmp_path):
    root = write_scene(tmp_path, size=(16, 16))
    scene = load_scene(root, resolution=64)
    # reference: Pillow's own LANCZOS filter
    ref = np.asarray(Image.open(root / "images/5.png").resize((64, 64), Image.Resampling.LANCZOS)) / 255
    assert scene.images.shape == (8, 64, 64, 1)
    assert np.allclose(scene.images[5, :, :, 0], ref, atol=1e-6)


def test_non_square_is_squashed_and_constant_stays_constant(tmp_path):
    root = write_scene(tmp_path, size=(24, 10))
    for i in range(8):
        Image.new("L", (24, 10), 77).save(root / f"images/{i}.png")
    scene = load_scene(root, resolution=32)
    # a normalised resampling kernel maps a constant image to itself (common practice)
    assert scene.images.shape == (8, 32, 32, 1)
    assert np.allclose(scene.images, 77 / 255, atol=1e-6)


def test_channel_conversion_uses_bt601_luma(tmp_path):
    root = write_scene(tmp_path, mode="RGB")
    for i in range(8):
        Image.new("RGB", (16, 16), (200, 100, 50)).save(root / f"images/{i}.png")
    gray = load_scene(root, resolution=16, channels=1)
    # ITU-R BT.601 luma weights 0.299, 0.587, 0.114 (those Pillow documents for convert("L"))
    assert gray.channels == 1
    assert np.allclose(gray.images, (0.299 * 200 + 0.587 * 100 + 0.114 * 50) / 255, atol=1 / 255)
    back = load_scene(write_scene(tmp_path / "g"), resolution=16, channels=3)
    assert back.channels == 3 and np.array_equal(back.images[..., 0], back.images[..., 2])


def test_rgba_drops_alpha_and_16_bit_gray_is_scaled(tmp_path):
    root = write_scene(tmp_path, mode="RGBA")
    scene = load_scene(root, resolution=16)
    raw = np.asarray(Image.open(root / "images/2.png"), dtype=np.float32)[..., :3] / 255
    assert scene.channels == 3 and np.array_equal(scene.images[2], raw)
    deep = write_scene(tmp_path / "d")
    for i in range(8):
        Image.fromarray(np.full((16, 16), 32768, dtype=np.uint16)).save(deep / f"images/{i}.png")
    # a 16-bit PNG sample runs 0..65535 (PNG specification, sample depth 16)
    assert np.allclose(load_scene(deep, resolution=16).images, 32768 / 65535, atol=1e-6)


def test_palette_image_reads_as_its_colours(tmp_path):
    root = write_scene(tmp_path, mode="RGB")
    for i in range(8):
        Image.open(root / f"images/{i}.png").quantize(16).save(root / f"images/{i}.png")
    scene = load_scene(root, resolution=16)
    # reference: Pillow's palette lookup
    with Image.open(root / "images/4.png") as img:
        assert img.mode == "P"
        ref = np.asarray(img.convert("RGB"), dtype=np.float32) / 255
    assert scene.channels == 3 and np.array_equal(scene.images[4], ref)


def test_periodic_end_rejected_but_start_and_just_below_accepted(tmp_path):
    rows = ROWS[:6] + [("images/6.png", 0.0, 60.0), ("images/7.png", 359.9, 65.0)]
    scene = load_scene(write_scene(tmp_path / "ok", rows=rows), resolution=16)
    assert scene.params[6, 0] == 0.0 and scene.params[7, 0] == 359.9
    bad = rows[:7] + [("images/7.png", 360, 65.0)]
    err = fails(write_scene(tmp_path / "bad", rows=bad))
    assert "[0, 360)" in check(err, "samples.csv", 8, "lamp_azimuth", "360")


# -- scene.json ----------------------------------------------------------------------------------
def test_missing_scene_json(tmp_path):
    root = write_scene(tmp_path)
    (root / "scene.json").unlink()
    assert "not found" in check(fails(root), "scene.json")


def test_bad_json(tmp_path):
    root = write_scene(tmp_path)
    (root / "scene.json").write_text('{"name": "x", "parameters": [')
    assert "not valid JSON" in check(fails(root), "scene.json")


@pytest.mark.parametrize("doc", [{"name": "x"}, {"name": "x", "parameters": []}])
def test_missing_or_empty_parameters(tmp_path, doc):
    (tmp_path / "scene.json").write_text(json.dumps(doc))
    with pytest.raises(SceneError) as info:
        load_spec(tmp_path)
    check(info.value, "scene.json", column="parameters")


def spec_with(**changes):
    items = [dict(p) for p in SPEC["parameters"]]
    items[1].update(changes)
    return {"name": "x", "parameters": items}


def test_duplicate_parameter_names(tmp_path):
    err = fails(write_scene(tmp_path, spec=spec_with(name="lamp_azimuth")))
    assert "two" in check(err, "scene.json", column="parameters[1].name", value="lamp_azimuth")


def test_min_not_below_max(tmp_path):
    err = fails(write_scene(tmp_path, spec=spec_with(min=70, max=70)))
    assert "above min" in check(err, "scene.json", column="parameters[1].max", value=70)


@pytest.mark.parametrize("bound", ["20", None, True])
def test_non_numeric_bound(tmp_path, bound):
    err = fails(write_scene(tmp_path, spec=spec_with(min=bound)))
    assert "number" in check(err, "scene.json", column="parameters[1].min", value=bound)


def test_parameter_named_image(tmp_path):
    err = fails(write_scene(tmp_path, spec=spec_with(name="image")))
    assert "reserved" in check(err, "scene.json", column="parameters[1].name", value="image")


# -- samples.csv ---------------------------------------------------------------------------------
def test_missing_samples_csv(tmp_path):
    root = write_scene(tmp_path)
    (root / "samples.csv").unlink()
    assert "not found" in check(fails(root), "samples.csv")


def test_header_without_image_column(tmp_path):
    rows = [(a, e) for _, a, e in ROWS]
    err = fails(write_scene(tmp_path, rows=rows, header="lamp_azimuth,lamp_elevation"))
    assert "missing" in check(err, "samples.csv", column="image")


def test_unknown_parameter_column(tmp_path):
    rows = [r + (1,) for r in ROWS]
    err = fails(write_scene(tmp_path, rows=rows, header="image,lamp_azimuth,lamp_elevation,lamp_power"))
    assert "lamp_elevation" in check(err, "samples.csv", column="lamp_power")


def test_missing_parameter_column(tmp_path):
    rows = [(f, a) for f, a, _ in ROWS]
    err = fails(write_scene(tmp_path, rows=rows, header="image,lamp_azimuth"))
    assert "missing" in check(err, "samples.csv", column="lamp_elevation")


def test_empty_cell(tmp_path):
    rows = list(ROWS)
    rows[4] = (rows[4][0], rows[4][1], "")
    assert "empty" in check(fails(write_scene(tmp_path, rows=rows)), "samples.csv", 5, "lamp_elevation")


@pytest.mark.parametrize("cell", ["forty", "nan", "inf", "-Infinity"])
def test_non_numeric_or_non_finite_value(tmp_path, cell):
    rows = list(ROWS)
    rows[2] = (rows[2][0], cell, rows[2][2])
    err = fails(write_scene(tmp_path, rows=rows))
    assert "number" in check(err, "samples.csv", 3, "lamp_azimuth", cell)


def test_value_outside_range(tmp_path):
    rows = list(ROWS)
    rows[6] = (rows[6][0], rows[6][1], "85")
    msg = check(fails(write_scene(tmp_path, rows=rows)), "samples.csv", 7, "lamp_elevation", "85")
    assert msg == "samples.csv row 7, column 'lamp_elevation': value '85' is outside [20, 70]"


def test_duplicate_settings_name_both_rows(tmp_path):
    rows = list(ROWS)
    rows[5] = (rows[5][0], rows[1][1], rows[1][2])
    assert "row 2" in check(fails(write_scene(tmp_path, rows=rows)), "samples.csv", 6)


def test_duplicate_settings_across_the_periodic_seam(tmp_path):
    rows = list(ROWS)
    rows[0] = ("images/0.png", 0.0, 50.0)
    rows[7] = ("images/7.png", 359.9999999, 50.0)  # 1e-7 deg from 0 on the circle, within 1e-9 * 360
    assert "row 1" in check(fails(write_scene(tmp_path, rows=rows)), "samples.csv", 8)


def test_missing_image_file(tmp_path):
    root = write_scene(tmp_path)
    (root / "images/3.png").unlink()
    assert "no file" in check(fails(root), "samples.csv", 4, "image", "images/3.png")


def test_not_an_image(tmp_path):
    root = write_scene(tmp_path)
    (root / "images/2.png").write_text("image,lamp_azimuth\n")
    assert "readable" in check(fails(root), "samples.csv", 3, "image", "images/2.png")


@pytest.mark.parametrize("keep", [40, 0.5])
def test_truncated_png(tmp_path, keep):
    root = write_scene(tmp_path)
    buf = io.BytesIO()
    Image.fromarray(np.random.default_rng(2).integers(0, 256, (64, 64), dtype=np.uint8)).save(buf, "PNG")
    data = buf.getvalue()
    (root / "images/1.png").write_bytes(data[: keep if isinstance(keep, int) else int(len(data) * keep)])
    assert "readable" in check(fails(root), "samples.csv", 2, "image", "images/1.png")


def test_absolute_image_path(tmp_path):
    root = write_scene(tmp_path / "s")
    rows = list(ROWS)
    rows[0] = (str(root / "images/0.png"), *rows[0][1:])
    err = fails(write_scene(root, rows=rows))
    assert "absolute" in check(err, "samples.csv", 1, "image", rows[0][0])


def test_dotdot_escape(tmp_path):
    root = write_scene(tmp_path / "s")
    Image.new("L", (16, 16)).save(tmp_path / "outside.png")
    rows = list(ROWS)
    rows[3] = ("../outside.png", *rows[3][1:])
    err = fails(write_scene(root, rows=rows))
    assert "outside the scene folder" in check(err, "samples.csv", 4, "image", "../outside.png")


def test_symlink_escape(tmp_path):
    root = write_scene(tmp_path / "s")
    Image.new("L", (16, 16)).save(tmp_path / "outside.png")
    (root / "images/4.png").unlink()
    try:
        os.symlink(tmp_path / "outside.png", root / "images/4.png")
    except OSError:
        pytest.skip("symlinks not supported here")
    err = fails(root)
    assert "outside the scene folder" in check(err, "samples.csv", 5, "image", "images/4.png")


def test_mixed_channels_name_first_differing_file(tmp_path):
    root = write_scene(tmp_path)
    Image.new("RGB", (16, 16), (1, 2, 3)).save(root / "images/5.png")
    Image.new("RGB", (16, 16), (1, 2, 3)).save(root / "images/6.png")
    msg = check(fails(root), "samples.csv", 6, "image", "images/5.png")
    assert "images/0.png" in msg and "channels=1 or 3" in msg
    assert load_scene(root, resolution=16, channels=3).channels == 3  # asking converts the mix


def test_fewer_samples_than_minimum(tmp_path):
    root = write_scene(tmp_path, rows=ROWS[:5])
    assert "min_samples=8" in check(fails(root), "samples.csv")
    assert len(load_scene(root, resolution=16, min_samples=5)) == 5


def test_image_above_pixel_limit_refused_before_decoding(tmp_path):
    root = write_scene(tmp_path)
    Image.new("L", (20, 20)).save(root / "images/7.png")
    err = fails(root, max_image_pixels=300)
    assert "max_image_pixels=300" in check(err, "samples.csv", 8, "image", "images/7.png")
    assert "20x20" in str(err)


def test_pixel_limit_checked_from_header_alone(tmp_path):
    root = write_scene(tmp_path)
    # the IHDR chunk claims 7000 x 7000 (49 Mpx, under Pillow's own bomb warning) over 16x16 pixel data;
    # decoding would fail, so only a check of the header size can give this message
    with open(root / "images/0.png", "r+b") as fh:
        data = bytearray(fh.read())
    data[16:24] = (7000).to_bytes(4, "big") * 2
    data[29:33] = zlib.crc32(bytes(data[12:29])).to_bytes(4, "big")
    (root / "images/0.png").write_bytes(bytes(data))
    err = fails(root)
    assert "max_image_pixels=40000000" in check(err, "samples.csv", 1, "image", "images/0.png")
