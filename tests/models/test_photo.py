"""The photo window scene against plain numpy crops of a photograph that ships with scikit-image."""
import json

import numpy as np
import pytest
from PIL import Image
from skimage import data

from geotween.models.evaluate import load_truth
from geotween.models.params import span_bucket
from geotween.models.photo import (
    PHOTO_SPACE,
    TIGHTEST,
    WIDEST,
    crop_resample,
    photo_grid,
    photo_long_pairs,
    photo_pairs,
    view,
    window_box,
    write_photo_scene,
)
from geotween.models.scene import load_scene

STEP = 1.0 / 11.0  # 12 grid values over [0, 1]


@pytest.fixture(scope="module")
def coffee():
    # skimage.data.coffee(): a 400 x 600 RGB photograph of a cup of coffee, shipped inside the
    # scikit-image wheel (no download).
    return data.coffee()


@pytest.fixture(scope="module")
def written(coffee, tmp_path_factory):
    out = tmp_path_factory.mktemp("photo")
    scene_dir, truth_dir = write_photo_scene(coffee, out, size=32, pairs=12, long_pairs=4, seed=0)
    return scene_dir, truth_dir


def _is_whole(v: float) -> bool:
    return abs(v - round(v)) < 1e-9


def test_a_window_exactly_size_pixels_wide_at_whole_offsets_is_the_numpy_slice(coffee):
    # The reference is a plain numpy slice of skimage.data.coffee(): resampling a box to its own
    # size at a whole-pixel offset must give the photo's pixels back.
    found = 0
    for zoom in (0.0, 1.0):
        for pan in np.arange(241) / 240.0:
            left, top, right, bottom = window_box(coffee.shape, pan, zoom)
            side = right - left
            if not all(_is_whole(v) for v in (left, top, right, bottom)):
                continue
            x0, y0, x1, y1, s = (int(round(v)) for v in (left, top, right, bottom, side))
            got = view(coffee, pan, zoom, size=s)
            assert np.array_equal(np.round(got * 255).astype(np.uint8), coffee[y0:y1, x0:x1]), (pan, zoom)
            found += 1
    assert found >= 4  # zoom 0: side 360 px; zoom 1: side 180 px, several whole offsets each
    # the lower level, any whole box of 64 px
    assert np.array_equal(np.round(crop_resample(coffee, (101, 37, 165, 101), 64) * 255).astype(np.uint8),
                          coffee[37:101, 101:165])


def test_window_sizes_are_linear_in_zoom_centred_and_always_inside(coffee):
    h, w = coffee.shape[:2]
    for pan, zoom in [*photo_grid(), (0.0, 0.0), (1.0, 0.0), (0.37, 0.61)]:
        left, top, right, bottom = window_box(coffee.shape, pan, zoom)
        assert 0 <= left and right <= w and 0 <= top and bottom <= h
        assert right - left == pytest.approx(bottom - top)  # square
        assert right - left == pytest.approx(h * (WIDEST + (TIGHTEST - WIDEST) * zoom))
        assert (top + bottom) / 2 == pytest.approx(h / 2)
    centres = [sum(window_box(coffee.shape, p, 0.5)[::2]) / 2 for p in np.linspace(0, 1, 7)]
    assert np.all(np.diff(centres) > 0)  # pan moves the centre left to right
    assert window_box(coffee.shape, 0.0, 0.0)[0] == pytest.approx(0.0)
    assert window_box(coffee.shape, 1.0, 0.0)[2] == pytest.approx(w)


def test_views_are_anti_aliased():
    # Common practice in resampling: a low-pass downscale turns a pattern finer than the output's
    # Nyquist limit into its mean, where point sampling would keep stripes of 0 and 255.
    stripes = np.zeros((200, 400, 3), dtype=np.uint8)
    stripes[:, ::2] = 255  # one-pixel columns
    # 4x down from a fractional box, away from the photo's edges (where the filter's support is cut)
    out = crop_resample(stripes, (40.5, 10.25, 200.5, 170.25), 40)
    assert np.abs(out - 0.5).max() < 0.01


def test_bad_inputs_are_refused(coffee):
    with pytest.raises(ValueError, match="narrower"):
        window_box((400, 300, 3), 0.5, 0.5)
    with pytest.raises(ValueError, match="zoom"):
        view(coffee, 0.5, 1.2)
    with pytest.raises(ValueError, match="uint8"):
        view(coffee.astype(np.float32), 0.5, 0.5)


def test_pairs_are_2_to_6_grid_steps_apart_along_an_axis_or_a_diagonal():
    pairs = photo_pairs(90, seed=0)
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 90
    assert {p["direction"] for p in pairs} == {"pan", "zoom", "rising", "falling"}
    kinds = set()
    for p in pairs:
        assert 2 <= p["steps"] <= 6
        moved = np.round((p["end"] - p["start"]) / STEP).astype(int)
        assert np.allclose(p["end"] - p["start"], moved * STEP)
        assert set(np.abs(moved)) - {0} == {p["steps"]}
        want = {"pan": (True, False), "zoom": (False, True)}.get(p["direction"], (True, True))
        assert tuple(moved != 0) == want
        kinds.add(tuple(np.sign(moved)))
    slopes = {a * b for a, b in kinds if a and b}
    assert slopes == {1, -1}  # both diagonals occur
    assert kinds >= {(0, 1), (1, 0), (-1, 0)}


def test_long_pairs_are_9_to_11_grid_steps_apart_and_all_in_the_long_span_bucket():
    pairs = photo_long_pairs(24, seed=0)
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 24
    assert {p["direction"] for p in pairs} == {"pan", "zoom", "rising", "falling"}
    for p in pairs:
        moved = np.round((p["end"] - p["start"]) / STEP).astype(int)
        assert set(np.abs(moved)) - {0} == {p["steps"]} and 9 <= p["steps"] <= 11
        # reach = steps / 11 of the whole range: 9 / 11 = 0.82 is past the medium bucket's 0.75
        assert float(PHOTO_SPACE.reach(p["start"], p["end"])) == pytest.approx(p["steps"] / 11)
        assert span_bucket(float(PHOTO_SPACE.reach(p["start"], p["end"]))) == "long"
    # 8 steps (8 / 11 = 0.73) would be medium: the floor is the first step count past it
    assert span_bucket(8 / 11) == "medium" and span_bucket(9 / 11) == "long"


def test_written_scene_loads_as_144_rgb_views(written, coffee):
    scene_dir, _ = written
    scene = load_scene(scene_dir, resolution=32)
    assert scene.channels == 3 and len(scene) == 144 and scene.space == PHOTO_SPACE
    assert np.array_equal(scene.params, photo_grid())
    for i in (0, 77, 143):
        pan, zoom = scene.params[i]
        assert np.abs(scene.images[i] - view(coffee, pan, zoom, 32)).max() <= 0.5 / 255


def test_truth_frames_on_disk_are_views_at_the_lerped_settings(written, coffee):
    _, truth_dir = written
    doc = json.loads((truth_dir / "truth.json").read_text())
    assert doc["format"] == "geotween-truth/1" and doc["space"] == PHOTO_SPACE.to_list()
    assert len(doc["pairs"]) == 16  # 12 short, then 4 long
    assert [p["steps"] >= 9 for p in doc["pairs"]] == [False] * 12 + [True] * 4
    for pair in doc["pairs"]:
        a, b = (PHOTO_SPACE.vector(pair[k]["params"]) for k in ("start", "end"))
        assert pair["steps"] == int(round(np.abs(b - a).max() / STEP))
        assert [f["t"] for f in pair["frames"]] == pytest.approx([i / 6 for i in range(1, 6)])
        for f in [pair["start"], pair["end"]] + pair["frames"]:
            p = PHOTO_SPACE.vector(f["params"])
            if "t" in f:
                assert p == pytest.approx(a + f["t"] * (b - a), abs=1e-12)
            with Image.open(truth_dir / f["image"]) as img:
                assert img.mode == "RGB"
                disk = np.asarray(img, dtype=np.float32) / 255.0
            assert np.abs(disk - view(coffee, p[0], p[1], 32)).max() <= 0.5 / 255
    pairs = load_truth(truth_dir, 32, 3)
    assert len(pairs) == 16 and pairs[0]["truth"].shape == (5, 32, 32, 3)
    assert pairs[0]["start_image"].shape == (32, 32, 3)
