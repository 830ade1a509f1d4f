"""The camera-move scene against numpy, scipy and scikit-image, on a photograph that ships with scikit-image."""
import json
import math

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from skimage import data
from skimage.color import rgb2gray
from skimage.metrics import peak_signal_noise_ratio, structural_similarity
from skimage.registration import phase_cross_correlation
from skimage.transform import resize, warp_polar

from geotween.models.camera_move import (
    CAMERA_NAME,
    CAMERA_SCATTERED_NAME,
    CAMERA_SPACE,
    FILTER_REACH,
    GRID_ROLL,
    GRID_ZOOM,
    TIGHTEST,
    WIDEST,
    camera_grid,
    camera_long_pairs,
    camera_pairs,
    camera_scattered,
    view,
    window_corners,
    window_side,
    write_camera_scene,
)
from geotween.models.evaluate import load_truth
from geotween.models.params import span_bucket
from geotween.models.scene import load_scene


@pytest.fixture(scope="module")
def astronaut():
    # skimage.data.astronaut(): a 512 x 512 RGB photograph shipped inside the scikit-image wheel
    # (no download).
    return data.astronaut()


def _ssim(a: np.ndarray, b: np.ndarray) -> float:
    # scikit-image's SSIM with the settings of Wang et al. 2004 (Gaussian window, sigma 1.5)
    return float(structural_similarity(a, b, channel_axis=2, data_range=1.0, gaussian_weights=True, sigma=1.5,
                                       use_sample_covariance=False))


def test_quarter_turns_of_roll_are_numpy_rot90_of_the_unturned_view(astronaut):
    # Reference: np.rot90 (counter-clockwise as displayed for k = 1). A quarter turn maps the
    # sampling grid onto itself, so the views agree up to float rounding in the resampler.
    for zoom in (0.0, 0.5, 1.0):
        flat = view(astronaut, 0.0, zoom, 48)
        for k in (1, 2, 3):
            turned = view(astronaut, 90.0 * k, zoom, 48)
            assert peak_signal_noise_ratio(np.rot90(flat, k), turned, data_range=1.0) > 60.0, (zoom, k)
            if k != 2:  # the other way round is a different picture
                assert peak_signal_noise_ratio(np.rot90(flat, -k), turned, data_range=1.0) < 20.0, (zoom, k)


@pytest.mark.parametrize("roll", [30.0, 137.5])
def test_a_turned_view_matches_scipy_rotate_of_a_larger_crop(astronaut, roll):
    # Reference: scipy.ndimage.rotate (cubic spline, positive angle counter-clockwise as displayed)
    # of a centred crop wide enough to hold the turned window, then the window's centred square,
    # brought to the view's size by skimage.transform.resize with anti-aliasing.
    zoom, size = 0.5, 96
    side = window_side(astronaut.shape, zoom)
    wide = int(math.ceil(side * math.sqrt(2.0))) + 8
    wide += wide % 2
    centre = astronaut.shape[0] // 2
    crop = astronaut[centre - wide // 2:centre + wide // 2, centre - wide // 2:centre + wide // 2] / 255.0
    turned = ndimage.rotate(crop, roll, axes=(1, 0), reshape=False, order=3)
    inner = int(round(side))
    o = (wide - inner) // 2
    want = resize(np.clip(turned[o:o + inner, o:o + inner], 0.0, 1.0), (size, size), anti_aliasing=True)
    assert _ssim(view(astronaut, roll, zoom, size), want) > 0.95
    assert _ssim(view(astronaut, -roll, zoom, size), want) < 0.5     # the other sense of turning
    assert _ssim(view(astronaut, roll + 2.0, zoom, size), want) < 0.85  # two degrees off shows


def test_an_unturned_window_at_its_own_size_on_whole_pixels_is_the_numpy_slice(astronaut):
    # Reference: a plain numpy slice. Side 0.5 of 512 px = 256 px, from pixel 128 to 384, resampled
    # to 256 px: the bicubic filter at whole-pixel positions gives the photo's pixels back.
    zoom = (WIDEST - 0.5) / (WIDEST - TIGHTEST)
    assert window_side(astronaut.shape, zoom) == pytest.approx(256.0)
    got = np.round(view(astronaut, 0.0, zoom, 256) * 255).astype(np.uint8)
    assert np.array_equal(got, astronaut[128:384, 128:384])


def test_log_polar_registration_recovers_the_zoom_ratio_and_the_roll(astronaut):
    # Reference: scale and rotation by phase correlation of log-polar images, as in scikit-image's
    # gallery example "Using Polar and Log-Polar Transformations for Registration" (skimage.transform.
    # warp_polar, skimage.registration.phase_cross_correlation); the shift-to-scale step is from memory.
    radius = 64
    wide = rgb2gray(view(astronaut, 0.0, 0.0, 128))
    for zoom, roll in ((1.0, 0.0), (0.5, 0.0), (1.0, 25.0)):
        near = rgb2gray(view(astronaut, roll, zoom, 128))
        shifts, _, _ = phase_cross_correlation(warp_polar(wide, radius=radius, scaling="log"),
                                               warp_polar(near, radius=radius, scaling="log"), upsample_factor=20)
        scale = 1.0 / np.exp(shifts[1] / (radius / np.log(radius)))
        # zooming in by the window's shrink factor makes every feature that much larger
        want = window_side(astronaut.shape, 0.0) / window_side(astronaut.shape, zoom)
        assert scale == pytest.approx(want, rel=0.03), zoom
        assert shifts[0] == pytest.approx(roll, abs=0.5)  # 360 rows: one degree per row


def test_the_tightest_window_is_the_middle_half_of_the_widest_at_twice_the_size(astronaut):
    # TIGHTEST is half of WIDEST: the same photo points are sampled, so the views agree to float rounding
    assert TIGHTEST == pytest.approx(WIDEST / 2)
    for roll in (0.0, 33.0):
        wide, tight = view(astronaut, roll, 0.0, 96), view(astronaut, roll, 1.0, 48)
        assert np.abs(wide[24:72, 24:72] - tight).max() < 1e-4, roll


def test_roll_is_periodic(astronaut):
    assert np.array_equal(view(astronaut, 360.0, 0.3, 32), view(astronaut, 0.0, 0.3, 32))
    assert np.array_equal(view(astronaut, -90.0, 0.3, 32), view(astronaut, 270.0, 0.3, 32))
    assert np.array_equal(view(astronaut, 735.0, 0.3, 32), view(astronaut, 15.0, 0.3, 32))
    assert not np.allclose(view(astronaut, 15.0, 0.3, 32), view(astronaut, 0.0, 0.3, 32), atol=0.05)


def test_the_turned_window_stays_inside_the_photo_with_the_filters_reach(astronaut):
    h, w = astronaut.shape[:2]
    rng = np.random.default_rng(0)
    settings = np.concatenate([camera_grid(), np.stack([rng.uniform(0, 360, 50), rng.uniform(0, 1, 50)], -1)])
    for roll, zoom in settings:
        corners = window_corners(astronaut.shape, roll, zoom)
        assert corners.min() >= FILTER_REACH and corners[:, 0].max() <= w - FILTER_REACH
        assert corners[:, 1].max() <= h - FILTER_REACH
        side = window_side(astronaut.shape, zoom)
        assert side == pytest.approx(min(h, w) * (WIDEST + (TIGHTEST - WIDEST) * zoom))
        edges = np.linalg.norm(np.roll(corners, -1, axis=0) - corners, axis=1)
        assert edges == pytest.approx([side] * 4)  # a square of that side
        assert corners.mean(axis=0) == pytest.approx([w / 2, h / 2])  # centred
    # the widest window's circumscribed circle lies inside the inscribed circle of the shorter side
    assert WIDEST / math.sqrt(2) < 0.5
    # a non-square photo: the shorter side sets the window
    assert window_side((300, 451, 3), 0.0) == pytest.approx(WIDEST * 300)


def test_views_are_anti_aliased():
    # Common practice in resampling: a low-pass downscale turns a pattern finer than the output's
    # Nyquist limit into its mean, where point sampling would keep stripes of 0 and 255.
    stripes = np.zeros((400, 400, 3), dtype=np.uint8)
    stripes[:, ::2] = 255  # one-pixel columns
    for roll in (0.0, 30.0, 90.0):
        out = view(stripes, roll, 0.0, 32)
        assert np.abs(out - 0.5).max() < 0.05, roll


def test_bad_inputs_are_refused(astronaut):
    with pytest.raises(ValueError, match="too small"):
        window_side((40, 60, 3), 0.0)
    with pytest.raises(ValueError, match="zoom"):
        view(astronaut, 10.0, 1.2)
    with pytest.raises(ValueError, match="roll"):
        view(astronaut, float("nan"), 0.5)
    with pytest.raises(ValueError, match="uint8"):
        view(astronaut.astype(np.float32), 10.0, 0.5)


def _grid_steps(p: dict) -> np.ndarray:
    d = CAMERA_SPACE.delta(p["start"], p["end"])
    return np.round(d / np.array([15.0, 0.2])).astype(int)


def test_pairs_are_2_to_5_grid_steps_apart_along_an_axis_or_a_diagonal():
    pairs = camera_pairs(90, seed=0)
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 90
    assert {p["direction"] for p in pairs} == {"roll", "zoom", "rising", "falling"}
    across_zero = 0
    for p in pairs:
        moved = _grid_steps(p)
        assert np.allclose(CAMERA_SPACE.delta(p["start"], p["end"]), moved * [15.0, 0.2])
        assert 2 <= p["steps"] <= 5 and set(np.abs(moved)) - {0} == {p["steps"]}
        want = {"roll": (True, False), "zoom": (False, True)}.get(p["direction"], (True, True))
        assert tuple(moved != 0) == want
        assert p["start"][0] in GRID_ROLL and p["end"][0] in GRID_ROLL
        assert np.isclose(GRID_ZOOM, p["start"][1]).any() and np.isclose(GRID_ZOOM, p["end"][1]).any()
        across_zero += abs(p["end"][0] - p["start"][0]) > 180  # the short arc wraps through 0 deg
    assert across_zero > 0


def test_long_pairs_turn_105_to_165_degrees_at_one_zoom():
    pairs = camera_long_pairs(24, seed=0)
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 24
    for p in pairs:
        moved = _grid_steps(p)
        assert moved[1] == 0 and 7 <= abs(moved[0]) == p["steps"] <= 11
        reach = float(CAMERA_SPACE.reach(p["start"], p["end"]))
        assert reach == pytest.approx(15.0 * p["steps"] / 180.0)  # a short arc over half a turn
    assert {span_bucket(float(CAMERA_SPACE.reach(p["start"], p["end"]))) for p in pairs} == {"medium", "long"}


def test_scattered_settings_cover_each_axis_evenly_off_the_grid():
    s = camera_scattered(220, seed=0)
    assert s.shape == (220, 2)
    assert (s[:, 0] >= 0).all() and (s[:, 0] < 360).all() and (s[:, 1] >= 0).all() and (s[:, 1] <= 1).all()
    # Latin hypercube: exactly one sample in each of 220 equal strata of each axis
    for col, span in ((s[:, 0], 360.0), (s[:, 1], 1.0)):
        assert sorted(np.floor(col / span * 220).astype(int)) == list(range(220))
    assert not any((np.isclose(GRID_ROLL, r).any() and np.isclose(GRID_ZOOM, z).any()) for r, z in s)
    assert not np.allclose(s, camera_scattered(220, seed=1))
    assert np.array_equal(s, camera_scattered(220, seed=0))


@pytest.fixture(scope="module")
def written(astronaut, tmp_path_factory):
    out = tmp_path_factory.mktemp("camera")
    return write_camera_scene(astronaut, out, size=24, pairs=8, long_pairs=4, seed=0)


def test_written_scene_loads_as_144_rgb_grid_views(written, astronaut):
    scene = load_scene(written[0], resolution=24)
    assert scene.name == CAMERA_NAME and scene.channels == 3 and len(scene) == 144 and scene.space == CAMERA_SPACE
    assert np.array_equal(scene.params, camera_grid())
    for i in (0, 77, 143):
        roll, zoom = scene.params[i]
        assert np.abs(scene.images[i] - view(astronaut, roll, zoom, 24)).max() <= 0.5 / 255


def test_truth_frames_on_disk_are_views_at_the_settings_along_the_short_arc(written, astronaut):
    truth_dir = written[1]
    doc = json.loads((truth_dir / "truth.json").read_text())
    assert doc["space"] == CAMERA_SPACE.to_list() and len(doc["pairs"]) == 12  # 8 short, then 4 long
    assert [p["steps"] >= 7 for p in doc["pairs"]][8:] == [True] * 4
    for pair in doc["pairs"]:
        a, b = (CAMERA_SPACE.vector(pair[k]["params"]) for k in ("start", "end"))
        for f in [pair["start"], pair["end"]] + pair["frames"]:
            p = CAMERA_SPACE.vector(f["params"])
            if "t" in f:
                assert CAMERA_SPACE.distance(p, a + f["t"] * CAMERA_SPACE.delta(a, b)) < 1e-9
            with Image.open(truth_dir / f["image"]) as img:
                disk = np.asarray(img.convert("RGB"), dtype=np.float32) / 255.0
            assert np.abs(disk - view(astronaut, p[0], p[1], 24)).max() <= 0.5 / 255
    pairs = load_truth(truth_dir, 24, 3)
    assert len(pairs) == 12 and pairs[0]["truth"].shape == (5, 24, 24, 3)


def test_the_scattered_scene_holds_the_scattered_views_and_grid_truth(astronaut, tmp_path):
    scene_dir, truth_dir = write_camera_scene(astronaut, tmp_path, size=16, pairs=2, long_pairs=1, scattered=True,
                                              seed=3)
    scene = load_scene(scene_dir, resolution=16)
    assert scene.name == CAMERA_SCATTERED_NAME and len(scene) == 220
    assert np.allclose(scene.params, camera_scattered(220, seed=3), atol=1e-9)
    i = 101
    assert np.abs(scene.images[i] - view(astronaut, *scene.params[i], 16)).max() <= 0.5 / 255
    doc = json.loads((truth_dir / "truth.json").read_text())
    assert len(doc["pairs"]) == 3
    for pair in doc["pairs"]:
        roll, zoom = CAMERA_SPACE.vector(pair["start"]["params"])
        assert roll in GRID_ROLL and np.isclose(GRID_ZOOM, zoom).any()
