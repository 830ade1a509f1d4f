"""The demo renderer against outside facts: Lambert's cosine law and cast-shadow geometry."""
import numpy as np
import pytest

from geotween.models.params import Parameter, ParamSpace, span_bucket
from geotween.models.render import (
    DEMO_SPACE,
    Tile,
    albedo_map,
    demo_grid,
    grid_pairs,
    heightfield,
    long_truth_pairs,
    render,
    render_many,
    shadow_mask,
    truth_pairs,
    write_demo,
)


@pytest.mark.parametrize("azimuth, elevation", [(0, 20), (75, 35), (200, 50), (310, 70)])
def test_flat_patch_follows_lamberts_cosine_law(azimuth, elevation):
    # Lambert (1760), Photometria: radiance of a matte surface is proportional to cos(incidence).
    # For a level patch the incidence angle is 90 deg - elevation, so it reads
    # albedo * sin(elevation) + ambient.
    tile = Tile()
    img = render(azimuth, elevation, 64)
    patch = img[4:8, 56:60]  # around (x, y) = (0.9, 0.1): level floor, nothing between it and the lamp
    expected = tile.albedo * np.sin(np.radians(elevation)) + tile.ambient
    assert patch == pytest.approx(np.full_like(patch, expected), abs=2e-4)


@pytest.mark.parametrize("elevation", [30, 40, 55, 70])
def test_pillar_shadow_length_is_height_over_tan_elevation(elevation):
    # Elementary geometry (common practice in shading): a vertical pole of height h lit from
    # elevation e casts a shadow of length h / tan(e) on level ground.
    size, tile = 128, Tile()
    h = heightfield(size, tile)
    mask = shadow_mask(h, 180.0, elevation)  # lamp towards -x: the shadow falls towards +x
    cx, cy = tile.pillar_center
    row = int(cy * size)
    cols = np.nonzero(mask[row])[0]
    edge = (cx + tile.pillar_radius) * size  # pillar's far wall, in pixels
    tip = cols[cols > cx * size].max() + 1  # first lit pixel after the shadow
    expected = tile.pillar_height / np.tan(np.radians(elevation)) * size
    assert tip - edge == pytest.approx(expected, abs=1.5)


def test_shadow_is_cast_away_from_the_lamp_and_shortens_as_the_lamp_rises():
    low, high = render(0, 20), render(0, 70)
    # more of the tile is at ambient (in shadow) under a low lamp
    assert (low < 0.11).sum() > 3 * (high < 0.11).sum()


def test_images_are_in_range_and_deterministic():
    a, b = render(123.0, 45.0), render(123.0, 45.0)
    assert a.dtype == np.float32 and a.shape == (64, 64)
    assert 0.0 <= a.min() and a.max() <= 1.0
    assert np.array_equal(a, b)


def test_periodic_azimuth_renders_identically_one_turn_apart():
    assert np.allclose(render(10.0, 40.0), render(370.0, 40.0), atol=1e-6)


def test_demo_grid_and_truth_pairs():
    grid = demo_grid()
    assert grid.shape == (144, 2)
    assert len(np.unique(grid, axis=0)) == 144
    pairs = truth_pairs(40, seed=1)
    assert len(pairs) == 40
    for pair in pairs:
        steps = pair["steps"]
        assert 2 <= steps <= 6
        d = DEMO_SPACE.delta(pair["start"], pair["end"])
        da, de = {"azimuth": (1, 0), "elevation": (0, 1), "rising": (1, 1), "falling": (1, -1)}[pair["direction"]]
        assert abs(d[0]) == pytest.approx(15.0 * steps * da)  # short arc on azimuth
        assert abs(d[1]) == pytest.approx(10.0 * steps * abs(de))


def test_demo_truth_pairs_are_unchanged_for_seed_0():
    # Spot values taken from the pre-refactor truth_pairs(90, seed=0), before the pair picker was
    # shared with the photo scene: (index, direction, steps, start, end).
    pinned = [(0, "azimuth", 6, (225.0, 50.0), (135.0, 50.0)),
              (1, "elevation", 3, (15.0, 20.0), (15.0, 50.0)),
              (2, "rising", 2, (300.0, 20.0), (270.0, 40.0)),
              (3, "falling", 2, (0.0, 60.0), (30.0, 40.0)),
              (17, "elevation", 3, (270.0, 20.0), (270.0, 50.0)),
              (44, "azimuth", 4, (270.0, 50.0), (330.0, 50.0)),
              (89, "elevation", 5, (285.0, 20.0), (285.0, 70.0))]
    pairs = truth_pairs(90, seed=0)
    assert len(pairs) == 90
    for i, direction, steps, start, end in pinned:
        assert (pairs[i]["direction"], pairs[i]["steps"]) == (direction, steps)
        assert tuple(pairs[i]["start"]) == start and tuple(pairs[i]["end"]) == end


def test_long_pairs_run_7_to_11_azimuth_steps_on_the_short_arc_or_the_whole_elevation_range():
    pairs = long_truth_pairs(40, seed=0)
    along = [p for p in pairs if p["direction"] == "azimuth"]
    across = [p for p in pairs if p["direction"] == "elevation"]
    assert (len(along), len(across)) == (30, 10) and pairs == along + across
    assert len({(tuple(p["start"]), tuple(p["end"])) for p in pairs}) == 40
    for p in along:
        assert 7 <= p["steps"] <= 11
        d = DEMO_SPACE.delta(p["start"], p["end"])
        # the short arc is the way the pair was walked: 105-165 deg, never the ambiguous 180
        assert abs(d[0]) == pytest.approx(15.0 * p["steps"]) and d[1] == 0.0
        assert p["start"][1] == p["end"][1]
    assert {p["steps"] for p in along} == {7, 8, 9, 10, 11}
    assert {span_bucket(float(DEMO_SPACE.reach(p["start"], p["end"]))) for p in along} == {"medium", "long"}
    for p in across:
        assert p["steps"] == 5 and (p["start"][1], p["end"][1]) == (20.0, 70.0)
        assert p["start"][0] == p["end"][0]
        assert float(DEMO_SPACE.reach(p["start"], p["end"])) == pytest.approx(1.0)
    again = long_truth_pairs(40, seed=0)
    assert all(np.array_equal(a["start"], b["start"]) and np.array_equal(a["end"], b["end"])
               for a, b in zip(pairs, again))
    assert long_truth_pairs(0) == []
    with pytest.raises(ValueError, match="full-range"):
        long_truth_pairs(100)  # 25 full-range pairs; the grid has 24 azimuths


def test_write_demo_keeps_the_short_pairs_and_appends_the_long_ones(tmp_path):
    import json

    _, truth = write_demo(tmp_path, size=8, pairs=5, long_pairs=4, seed=0)
    doc = json.loads((truth / "truth.json").read_text())
    short, long = truth_pairs(5, seed=0), long_truth_pairs(4, seed=0)
    assert len(doc["pairs"]) == 9
    for entry, want in zip(doc["pairs"], short + long):
        assert (entry["direction"], entry["steps"]) == (want["direction"], want["steps"])
        got = [DEMO_SPACE.vector(entry[k]["params"]) for k in ("start", "end")]
        assert np.array_equal(got[0], want["start"]) and np.array_equal(got[1], want["end"])
    assert [e["direction"] for e in doc["pairs"][5:]] == ["azimuth"] * 3 + ["elevation"]


def test_grid_pairs_keep_non_periodic_ends_on_the_grid_and_refuse_too_many():
    space = ParamSpace([Parameter("u", 0.0, 1.0), Parameter("v", 0.0, 1.0)])
    axes = (np.linspace(0, 1, 5), np.linspace(0, 1, 5))
    pairs = grid_pairs(space, axes, {"u": (1, 0), "v": (0, 1)}, 20, seed=0, min_steps=2, max_steps=3)
    keys = {(tuple(p["start"]), tuple(p["end"])) for p in pairs}
    assert len(keys) == 20
    for p in pairs:
        assert np.all((0 <= p["start"]) & (p["start"] <= 1) & (0 <= p["end"]) & (p["end"] <= 1))
        assert np.abs(p["end"] - p["start"]).max() == pytest.approx(0.25 * p["steps"])
    # u walks either way: (3 + 2) * 2 per row x 5 rows = 50 pairs; v only upwards: 25. Directions
    # take turns, so the 52nd pair (v's 26th) cannot be found.
    both = {"u": (1, 0), "v": (0, 1)}
    assert len(grid_pairs(space, axes, both, 51, seed=0, min_steps=2, max_steps=3, max_draws=20_000)) == 51
    with pytest.raises(ValueError, match="distinct pairs"):
        grid_pairs(space, axes, both, 52, seed=0, min_steps=2, max_steps=3, max_draws=20_000)
    periodic = ParamSpace([Parameter("a", 0.0, 360.0, periodic=True), Parameter("v", 0.0, 1.0)])
    with pytest.raises(ValueError, match="over half"):
        grid_pairs(periodic, (np.arange(0, 360, 60.0), axes[1]), {"a": (1, 0)}, 3, max_steps=4)


# -- the colour tile ----------------------------------------------------------------------------
# Level patches inside each feature at 64 px (row slice, column slice), from the layout in
# heightfield(): floor near (x, y) = (0.9, 0.1), ring top left of its centre (0.30, 0.32), the block's
# upper terrace, the pillar's top around (0.72, 0.70), the groove's floor on its centre line at y = 0.25.
LEVEL_PATCHES = {"base": (slice(4, 8), slice(56, 60)), "ring": (slice(19, 22), slice(9, 11)),
                 "block": (slice(49, 53), slice(15, 20)), "pillar": (slice(43, 46), slice(45, 47)),
                 "groove": (slice(15, 17), slice(39, 40))}


@pytest.mark.parametrize("azimuth, elevation", [(0, 70), (100, 60), (200, 65), (300, 55), (45, 40)])
def test_colour_level_patches_follow_lamberts_cosine_law_per_channel(azimuth, elevation):
    # Lambert (1760), Photometria: a matte level patch lit from elevation e reads
    # albedo * sin(e) + ambient, channel by channel, with that feature's own RGB albedo.
    tile = Tile()
    img = render(azimuth, elevation, 64, colour=True)
    assert img.shape == (64, 64, 3) and img.dtype == np.float32
    albedo = {"base": tile.base_rgb, **tile.feature_rgb()}
    for name, (rows, cols) in LEVEL_PATCHES.items():
        expected = np.asarray(albedo[name]) * np.sin(np.radians(elevation)) + tile.ambient
        patch = img[rows, cols].reshape(-1, 3)
        assert patch == pytest.approx(np.broadcast_to(expected, patch.shape), abs=2e-6), name


@pytest.mark.parametrize("azimuth, elevation", [(75, 35), (250, 20)])
def test_colour_is_the_gray_lambert_term_scaled_per_channel_and_shadows_are_ambient(azimuth, elevation):
    # Lambert's law is linear in the albedo (common practice): where every sub-sample of a pixel
    # sees the same albedo, colour_c - ambient = albedo_c / albedo_gray * (gray - ambient).
    tile, size, ss = Tile(), 64, 2
    gray, colour = render(azimuth, elevation, size), render(azimuth, elevation, size, colour=True)
    albedo = albedo_map(size * ss, tile).reshape(size, ss, size, ss, 3)
    uniform = np.all(albedo.max(axis=(1, 3)) == albedo.min(axis=(1, 3)), axis=-1)
    assert uniform.mean() > 0.8
    scale = albedo[:, 0, :, 0, :] / tile.albedo
    want = scale * (gray[..., None].astype(np.float64) - tile.ambient) + tile.ambient
    assert colour[uniform] == pytest.approx(want[uniform], abs=2e-6)
    # fully shadowed pixels get the ambient term alone, in every channel
    dark = shadow_mask(heightfield(size * ss, tile), azimuth, elevation).reshape(size, ss, size, ss).all(axis=(1, 3))
    assert dark.sum() > 20
    assert colour[dark] == pytest.approx(np.full((int(dark.sum()), 3), tile.ambient), abs=1e-7)
    assert gray[dark] == pytest.approx(np.full(int(dark.sum()), tile.ambient), abs=1e-7)


def test_each_feature_has_its_own_colour_and_render_many_keeps_channels():
    tile = Tile()
    albedo = albedo_map(64, tile)
    seen = {tuple(albedo[rows, cols].reshape(-1, 3)[0]) for rows, cols in LEVEL_PATCHES.values()}
    assert len(seen) == 5
    grid = demo_grid()[:2]
    assert render_many(grid, 16).shape == (2, 16, 16, 1)
    rgb = render_many(grid, 16, colour=True)
    assert rgb.shape == (2, 16, 16, 3) and 0.0 <= rgb.min() and rgb.max() <= 1.0


def test_grayscale_render_is_unchanged_by_the_colour_option():
    # Pixel values of render(75, 35, 64) taken from the code before the colour option was added.
    pinned = {(17, 38): 0.3544318377971649, (37, 48): 0.4441458582878113, (27, 42): 0.5601897239685059,
              (19, 23): 0.557149350643158, (5, 37): 0.5507487058639526, (47, 49): 0.6412087082862854,
              (36, 20): 0.10000000149011612}
    img = render(75.0, 35.0, 64)
    assert img.shape == (64, 64)
    assert np.array_equal(img, render(75.0, 35.0, 64, colour=False))
    for (r, c), v in pinned.items():
        assert float(img[r, c]) == pytest.approx(v, abs=1e-6)
    assert float(img.astype(np.float64).sum()) == pytest.approx(2154.3320073634386, abs=1e-3)


def test_from_fine_sizes_one_sample_per_pixel_is_enough():
    # the relief's edges are softened over 1/64 of the tile: at 512 px over 8 px, so one sample per
    # pixel draws what two per side do (box-averaged), to well under one level of 255 on average
    from geotween.models.render import FINE, render

    one = render(300.0, 30.0, FINE)
    two = render(300.0, 30.0, FINE, supersample=2)
    assert np.abs(one - two).mean() < 1.0 / 255
    assert render(300.0, 30.0, 64).shape == (64, 64)  # below FINE the default still takes two per side
