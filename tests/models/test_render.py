"""The demo renderer against outside facts: Lambert's cosine law and cast-shadow geometry."""
import numpy as np
import pytest

from models.render import DEMO_SPACE, Tile, demo_grid, render, shadow_mask, heightfield, truth_pairs


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
