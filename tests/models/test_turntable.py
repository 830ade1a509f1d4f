"""The turntable scene against elementary geometry of orthographic projection, Lambert's law and scipy."""
import json

import numpy as np
import pytest
from PIL import Image
from scipy import stats

from geotween.models.evaluate import load_truth
from geotween.models.scene import load_scene
from geotween.models.turntable import (
    GRID_HEIGHT,
    GRID_YAW,
    PALETTE,
    RED,
    TURNTABLE_NAME,
    TURNTABLE_SCATTERED_NAME,
    TURNTABLE_SPACE,
    Turntable,
    camera_axes,
    turntable_grid,
    turntable_long_pairs,
    turntable_pairs,
    turntable_scattered,
    view,
    write_turntable_scene,
)

TT = Turntable()
W = TT.half_width
CENTRE_Z = TT.drum_height / 2.0  # the camera looks at the drum's centre
HALF_LEVEL = 0.5 / 255 + 1e-6  # 8-bit PNGs round to the nearest level; float32 may sit on a half level


def _column(x: float, size: int) -> float:
    """Continuous column coordinate (pixel edges at whole numbers) of world x."""
    return (x + W) * size / (2.0 * W)


def _row(screen_y: float, size: int) -> float:
    return (W - screen_y) * size / (2.0 * W)


def _screen_y(y: float, z: float, height: float) -> float:
    # orthographic projection onto the image's up axis (0, sin e, cos e) about the drum's centre
    e = np.radians(height)
    return y * np.sin(e) + (z - CENTRE_Z) * np.cos(e)


def _off_background(img: np.ndarray) -> np.ndarray:
    return np.any(img != np.asarray(TT.background, dtype=np.float32), axis=-1)


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    out = tmp_path_factory.mktemp("turntable")
    return write_turntable_scene(out, size=32, pairs=8, long_pairs=4, seed=0)


@pytest.mark.parametrize("height", [10.0, 20.0])
def test_drum_outline_is_its_diameter_wide_seen_from_the_side(height):
    # Orthographic projection of an upright cylinder: its outline is 2r wide at every row between
    # its base and its top rim, whatever the elevation (elementary geometry, common practice).
    # Yaw 90 turns the knob to the back, where the drum hides it; rows above the disc's far edge
    # and below the drum's top show the drum alone.
    size = 192
    img = view(90.0, height, size)
    e = np.radians(height)
    low = max(_screen_y(0.0, 0.0, height), TT.disc_radius * np.sin(e) - CENTRE_Z * np.cos(e))
    high = _screen_y(0.0, TT.drum_height, height)
    rows = range(int(np.ceil(_row(high, size))) + 1, int(np.floor(_row(low, size))) - 1)
    assert len(rows) >= 10
    want = 2 * TT.drum_radius * size / (2 * W)  # 86.4 px
    for r in rows:
        cols = np.flatnonzero(_off_background(img[r]))
        assert len(cols) == cols[-1] - cols[0] + 1  # one solid run
        assert abs(len(cols) - want) <= 2.0, r  # within a pixel at each edge
        assert (cols[0] + cols[-1] + 1) / 2 == pytest.approx(size / 2, abs=1.0)  # centred on the axis


def test_knob_reaches_its_outer_face_when_turned_side_on():
    # At yaw 0 the knob's outer face is the plane x = knob_hi[0] and faces right; in orthographic
    # projection screen x is world x (elementary geometry, common practice).
    size = 192
    img = view(0.0, 20.0, size)
    r = int(_row(_screen_y(0.04, 0.26, 20.0), size))  # through the knob's middle
    cols = np.flatnonzero(_off_background(img[r]))
    assert abs((cols[-1] + 1) - _column(TT.knob_hi[0], size)) <= 1.0
    assert (cols[-1] + 1) - _column(TT.drum_radius, size) > 10  # it sticks out past the drum


@pytest.mark.parametrize("height", [10.0, 35.0, 60.0])
def test_seam_appears_at_r_sin_theta_plus_yaw(height):
    # A point at surface angle theta on radius r, turned by yaw about the vertical axis, projects
    # orthographically to x = r sin(theta + yaw) (rotation about an axis plus orthographic
    # projection, common practice). The seam is painted black, the only paint that reads exactly 0;
    # one point sample per pixel keeps its pixels unmixed with its neighbours.
    size = 256
    for yaw in (15.0, 40.0, 60.0, 75.0, 100.0):
        img = view(yaw, height, size, supersample=1)
        rows, cols = np.nonzero(np.all(img == 0.0, axis=-1))
        assert len(rows) > 20
        found = float(np.mean(cols + 0.5))
        want = _column(TT.drum_radius * np.sin(np.radians(TT.seam_deg + yaw)), size)
        assert abs(found - want) <= 1.0, (yaw, found, want)  # a pixel is 1 / 128 of a world unit
        assert np.ptp(cols) <= 2 * np.ceil(TT.drum_radius * np.radians(2 * TT.seam_half_width) * size / 2 / W)


@pytest.mark.parametrize("height", [30.0, 45.0, 60.0])
def test_drum_top_follows_lamberts_cosine_law(height):
    # Lambert's cosine law (Lambert 1760): a matte patch reads albedo * (ambient + diffuse * cos i),
    # i the angle between its normal and the lamp. The red dot at the centre of the drum's top
    # faces straight up; the lamp is fixed to the camera, so cos i changes with camera height
    # and not with yaw.
    size = 64
    right, up, back = camera_axes(height)
    lamp = TT.lamp[0] * right + TT.lamp[1] * up + TT.lamp[2] * back
    cos_i = lamp[2] / np.linalg.norm(lamp)
    want = np.asarray(PALETTE[RED]) * (TT.ambient + TT.diffuse * cos_i)
    r = int(_row(_screen_y(0.0, TT.drum_height, height), size))
    for yaw in (0.0, 130.0, 275.0):
        img = view(yaw, height, size)
        for c in (size // 2 - 1, size // 2):  # the axis is the edge between these two columns
            assert img[r, c] == pytest.approx(want, abs=1e-6)


def test_supersampling_is_the_box_mean_of_the_finer_render():
    # Box-filter anti-aliasing: a pixel is the mean of its k x k point samples (common practice),
    # so the anti-aliased view equals the 3x finer point-sampled view averaged over 3x3 blocks.
    fine = view(37.0, 25.0, 96, supersample=1).astype(np.float64)
    boxed = fine.reshape(32, 3, 32, 3, 3).mean(axis=(1, 3))
    coarse = view(37.0, 25.0, 32)
    assert np.abs(coarse - boxed).max() < 1e-6
    edge = (coarse > 0.01) & (coarse < 0.99) & ~np.isin(coarse, fine)
    assert edge.any()  # some pixels are mixtures that no single sample holds


def test_a_full_turn_gives_the_same_view_and_no_smaller_turn_does():
    # The subject is a rigid body turned about one axis: a turn of 360 deg is the identity
    # (elementary geometry); the knob breaks every smaller symmetry.
    for yaw, height in ((0.0, 10.0), (37.5, 33.0), (345.0, 60.0)):
        base = view(yaw, height, 48)
        assert np.array_equal(base, view(yaw + 360.0, height, 48))
        assert np.array_equal(base, view(yaw - 720.0, height, 48))
    base = view(0.0, 35.0, 48)
    for turn in np.arange(15.0, 360.0, 15.0):
        assert np.abs(view(turn, 35.0, 48) - base).mean() > 0.01, turn


@pytest.mark.parametrize("height", [10.0, 35.0, 60.0])
def test_turning_moves_the_subject_and_never_the_background(height):
    # Everything stands inside the upright cylinder of the disc's radius, from the disc's bottom
    # to the drum's top; in orthographic projection that cylinder's image is bounded by |x| <= R
    # and y within its top and bottom ellipses (elementary geometry, common practice). Pixels
    # wholly outside that box read the plain background at every yaw.
    size = 64
    frames = np.stack([view(yaw, height, size) for yaw in GRID_YAW])
    e = np.radians(height)
    top = _screen_y(0.0, TT.drum_height, height) + TT.disc_radius * np.sin(e)
    bottom = _screen_y(0.0, -TT.disc_thickness, height) - TT.disc_radius * np.sin(e)
    edges = W - 2 * W * np.arange(size + 1) / size  # screen coordinate of pixel edges, top / left first
    outside_row = (edges[1:] > top) | (edges[:-1] < bottom)
    outside_col = (-edges[:-1] > TT.disc_radius) | (-edges[1:] < -TT.disc_radius)
    outside = outside_row[:, None] | outside_col[None, :]
    assert outside.sum() > 0.1 * size * size
    assert np.all(frames[:, outside] == np.asarray(TT.background, dtype=np.float32))
    # every 15 deg grid step moves the subject visibly (short arc, the last back to the first)
    steps = np.abs(frames - np.roll(frames, -1, axis=0)).mean(axis=(1, 2, 3))
    assert steps.min() > 0.02


def test_grid_and_scattered_settings_cover_the_space():
    grid = turntable_grid()
    assert grid.shape == (144, 2)
    assert set(grid[:, 0]) == set(GRID_YAW) and len(GRID_YAW) == 24
    assert set(grid[:, 1]) == set(GRID_HEIGHT) == {10.0, 20.0, 30.0, 40.0, 50.0, 60.0}
    pts = turntable_scattered(220, seed=0)
    assert pts.shape == (220, 2)
    assert np.all((pts[:, 0] >= 0) & (pts[:, 0] < 360) & (pts[:, 1] >= 10) & (pts[:, 1] <= 60))
    assert np.array_equal(pts, turntable_scattered(220, seed=0))
    assert not np.array_equal(pts, turntable_scattered(220, seed=1))
    # scipy.stats.kstest: each setting is uniform over its range (Kolmogorov-Smirnov, p well above 1%)
    assert stats.kstest(pts[:, 0], stats.uniform(0, 360).cdf).pvalue > 0.01
    assert stats.kstest(pts[:, 1], stats.uniform(10, 50).cdf).pvalue > 0.01


def test_pairs_run_along_the_grid_on_the_short_arc():
    pairs = turntable_pairs(90, seed=0)
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 90
    assert {p["direction"] for p in pairs} == {"yaw", "height", "rising", "falling"}
    for p in pairs:
        assert 2 <= p["steps"] <= 5
        moved = TURNTABLE_SPACE.delta(p["start"], p["end"]) / np.array([15.0, 10.0])
        assert np.allclose(moved, np.round(moved))
        assert set(np.abs(np.round(moved)).astype(int)) - {0} == {p["steps"]}
    long = turntable_long_pairs(24, seed=0)
    assert len(long) == 24 and {p["direction"] for p in long} == {"yaw"}
    for p in long:
        assert 7 <= p["steps"] <= 11 and p["start"][1] == p["end"][1]
        assert abs(float(TURNTABLE_SPACE.delta(p["start"], p["end"])[0])) == pytest.approx(15.0 * p["steps"])


def test_written_scene_loads_back_as_the_grid_views(written):
    scene_dir, _ = written
    scene = load_scene(scene_dir, resolution=32)
    assert scene.name == TURNTABLE_NAME and scene.space == TURNTABLE_SPACE and scene.channels == 3
    assert np.array_equal(scene.params, turntable_grid())
    for i in (0, 61, 143):
        assert np.abs(scene.images[i] - view(*scene.params[i], size=32)).max() <= HALF_LEVEL


def test_truth_frames_are_views_at_the_settings_between_grid_pairs(written):
    _, truth_dir = written
    doc = json.loads((truth_dir / "truth.json").read_text())
    assert doc["format"] == "geotween-truth/1" and doc["space"] == TURNTABLE_SPACE.to_list()
    assert [p["steps"] >= 7 for p in doc["pairs"]] == [False] * 8 + [True] * 4
    for pair in doc["pairs"]:
        a, b = (TURNTABLE_SPACE.vector(pair[k]["params"]) for k in ("start", "end"))
        assert a[0] in GRID_YAW and b[0] in GRID_YAW and a[1] in GRID_HEIGHT and b[1] in GRID_HEIGHT
        for f in [pair["start"], pair["end"]] + pair["frames"]:
            p = TURNTABLE_SPACE.vector(f["params"])
            if "t" in f:
                assert TURNTABLE_SPACE.distance(p, TURNTABLE_SPACE.lerp(a, b, f["t"])) < 1e-9
            with Image.open(truth_dir / f["image"]) as img:
                disk = np.asarray(img.convert("RGB"), dtype=np.float32) / 255.0
            assert np.abs(disk - view(p[0], p[1], 32)).max() <= HALF_LEVEL
    loaded = load_truth(truth_dir, 32, 3)
    assert len(loaded) == 12 and loaded[0]["truth"].shape == (5, 32, 32, 3)


def test_scattered_scene_keeps_its_truth_pairs_on_the_grid(tmp_path):
    scene_dir, truth_dir = write_turntable_scene(tmp_path, size=16, pairs=3, long_pairs=1, scattered=True)
    scene = load_scene(scene_dir, resolution=16)
    assert scene.name == TURNTABLE_SCATTERED_NAME and len(scene) == 220
    assert np.allclose(scene.params, turntable_scattered(220, seed=0))
    for pair in json.loads((truth_dir / "truth.json").read_text())["pairs"]:
        assert pair["start"]["params"]["yaw"] in GRID_YAW and pair["end"]["params"]["camera_height"] in GRID_HEIGHT


def test_bad_settings_are_refused():
    with pytest.raises(ValueError, match="camera_height"):
        view(0.0, 75.0)
    with pytest.raises(ValueError, match="yaw"):
        view(float("nan"), 30.0)
    with pytest.raises(ValueError, match="size"):
        view(0.0, 30.0, size=0)
