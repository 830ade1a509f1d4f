"""The demo scene: a relief tile under a moving lamp.

A procedurally built heightfield (a raised ring, a stepped block, a round pillar and a groove on a
flat tile) rendered with Lambertian shading plus hard cast shadows, for lamp azimuth (degrees,
periodic 0-360, 0 = lamp towards +x, 90 = towards +y) and lamp elevation (degrees above the tile).
The renderer gives the true image for any settings, so every in-between can be scored against it.
With colour=True each feature (base tile, ring, block, pillar, groove) has its own RGB albedo.

World units: the tile spans [0, 1] x [0, 1]; heights are in the same units. Image row r, column c
looks at world (x, y) = ((c + 0.5) / S, (r + 0.5) / S) from straight above.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
from scipy import ndimage

from .params import Parameter, ParamSpace

DEMO_SPACE = ParamSpace([
    Parameter("lamp_azimuth", 0.0, 360.0, unit="deg", periodic=True),
    Parameter("lamp_elevation", 20.0, 70.0, unit="deg"),
])
DEMO_NAME = "relief-tile"
DEMO_COLOUR_NAME = "relief-tile-colour"


RGB = tuple[float, float, float]


@dataclass(frozen=True)
class Tile:
    """Shading constants. Intensity = albedo * max(0, n . l) + ambient, or ambient in shadow.

    Grayscale renders use `albedo` everywhere; colour renders give each feature its own RGB
    albedo (the same ambient in every channel). Albedo + ambient stays <= 1, so nothing clips.
    """
    albedo: float = 0.8
    ambient: float = 0.1
    pillar_height: float = 0.10
    pillar_center: tuple[float, float] = (0.72, 0.70)
    pillar_radius: float = 0.06
    base_rgb: RGB = (0.80, 0.72, 0.58)    # sandstone
    ring_rgb: RGB = (0.85, 0.38, 0.22)    # terracotta
    block_rgb: RGB = (0.28, 0.45, 0.80)   # slate blue
    pillar_rgb: RGB = (0.36, 0.72, 0.30)  # moss green
    groove_rgb: RGB = (0.55, 0.22, 0.52)  # plum

    def feature_rgb(self) -> dict[str, RGB]:
        """RGB albedo per feature, in the order the features are laid on the base tile."""
        return {"ring": self.ring_rgb, "block": self.block_rgb, "groove": self.groove_rgb,
                "pillar": self.pillar_rgb}


def _smoothstep(edge0: float, edge1: float, x: np.ndarray) -> np.ndarray:
    u = np.clip((x - edge0) / (edge1 - edge0), 0.0, 1.0)
    return u * u * (3.0 - 2.0 * u)


def _relief(size: int, tile: Tile) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """(size, size) heights and each feature's soft footprint in [0, 1] (see `feature_rgb`)."""
    c = (np.arange(size) + 0.5) / size
    x, y = np.meshgrid(c, c)  # x along columns, y along rows
    soft = 1.0 / 64.0
    h = np.zeros_like(x)
    # raised ring, lower left
    r = np.hypot(x - 0.30, y - 0.32)
    ring_in, ring_out = _smoothstep(0.08, 0.08 + soft, r), 1.0 - _smoothstep(0.17, 0.17 + soft, r)
    h += 0.035 * ring_in * ring_out
    # stepped block, upper left: two terraces (the upper one sits on the lower one's footprint)
    in_x = _smoothstep(0.12, 0.12 + soft, x) * (1.0 - _smoothstep(0.45, 0.45 + soft, x))
    lower_in, upper_in = _smoothstep(0.58, 0.58 + soft, y), _smoothstep(0.70, 0.70 + soft, y)
    top_out = 1.0 - _smoothstep(0.88, 0.88 + soft, y)
    h += 0.025 * in_x * lower_in * top_out
    h += 0.025 * in_x * upper_in * top_out
    # groove, right: a diagonal channel
    d = np.abs((x - 0.62) - 0.55 * (y - 0.25)) / np.hypot(1.0, 0.55)
    along = _smoothstep(0.05, 0.05 + soft, y) * (1.0 - _smoothstep(0.45, 0.45 + soft, y))
    channel = 1.0 - _smoothstep(0.025, 0.025 + soft, d)
    h -= 0.02 * channel * along
    # pillar: a flat-topped cylinder (its top is level, so it reads as a flat patch)
    px, py = tile.pillar_center
    inside = 1.0 - _smoothstep(tile.pillar_radius, tile.pillar_radius + soft / 2,
                               np.hypot(x - px, y - py))
    masks = {"ring": ring_in * ring_out, "block": in_x * lower_in * top_out, "groove": channel * along,
             "pillar": inside}
    return h + inside * (tile.pillar_height - h), masks


def heightfield(size: int, tile: Tile = Tile()) -> np.ndarray:
    """(size, size) heights in tile units; feature edges are softened over ~1/64 of the tile."""
    return _relief(size, tile)[0]


def _blend_albedo(masks: dict[str, np.ndarray], tile: Tile) -> np.ndarray:
    """(H, W, 3) albedo: the base colour with each feature laid over it by its footprint."""
    albedo = np.broadcast_to(np.asarray(tile.base_rgb, dtype=np.float64), masks["ring"].shape + (3,))
    for name, rgb in tile.feature_rgb().items():
        m = masks[name][..., None]
        albedo = albedo * (1.0 - m) + np.asarray(rgb, dtype=np.float64) * m  # exact where m is 0 or 1
    return albedo


def albedo_map(size: int, tile: Tile = Tile()) -> np.ndarray:
    """(size, size, 3) RGB albedo of the colour tile, sampled at pixel centres."""
    return _blend_albedo(_relief(size, tile)[1], tile)


def lamp_vector(azimuth_deg: float, elevation_deg: float) -> np.ndarray:
    """Unit vector towards the lamp, (x, y, z)."""
    az, el = np.radians(azimuth_deg), np.radians(elevation_deg)
    return np.array([np.cos(el) * np.cos(az), np.cos(el) * np.sin(az), np.sin(el)])


def shadow_mask(h: np.ndarray, azimuth_deg: float, elevation_deg: float, *,
                step_px: float = 1.0, bias: float = 1e-4) -> np.ndarray:
    """True where the lamp is hidden: march from each pixel towards the lamp over the heightfield."""
    size = h.shape[0]
    lamp = lamp_vector(azimuth_deg, elevation_deg)
    horiz = np.hypot(lamp[0], lamp[1])
    dx, dy = lamp[0] / horiz, lamp[1] / horiz
    rise_per_px = np.tan(np.radians(elevation_deg)) / size  # height gained per pixel of travel
    cols, rows = np.meshgrid(np.arange(size, dtype=np.float64), np.arange(size, dtype=np.float64))
    shadow = np.zeros((size, size), dtype=bool)
    h_max = float(h.max())
    n_steps = int(np.ceil(max(h_max - h.min(), 0.0) / max(rise_per_px * step_px, 1e-9))) + 1
    for s in range(1, min(n_steps, int(2 * size / step_px)) + 1):
        dist = s * step_px
        ray = h + dist * rise_per_px
        if ray.min() > h_max:
            break
        # bilinear height under the ray; outside the tile reads as the flat floor (0)
        under = ndimage.map_coordinates(h, (rows + dy * dist, cols + dx * dist), order=1,
                                        mode="constant", cval=0.0)
        shadow |= under > ray + bias
    return shadow


FINE = 512  # px: from here on the renderer takes one sample per pixel


def render(azimuth_deg: float, elevation_deg: float, size: int = 64, *, tile: Tile = Tile(),
           supersample: int | None = None, colour: bool = False) -> np.ndarray:
    """Float32 image in [0, 1] of the tile lit from the given lamp direction (degrees).

    (size, size) grayscale, or (size, size, 3) RGB with colour=True (per-feature albedo).
    `supersample` (None: 2 below FINE px, else 1): samples per pixel side, box-averaged. From FINE px
    up a pixel is finer than the relief's edges (softened over 1/64 of the tile, 8 px at 512), so
    more samples add nothing but time (the cast-shadow march is most of it).
    """
    if supersample is None:
        supersample = 2 if size < FINE else 1
    hi = size * supersample
    h, masks = _relief(hi, tile)
    gy, gx = np.gradient(h, 1.0 / hi)  # slopes, rows = y
    n = np.stack([-gx, -gy, np.ones_like(h)], axis=-1)
    n /= np.linalg.norm(n, axis=-1, keepdims=True)
    lamp = lamp_vector(azimuth_deg, elevation_deg)
    lit = np.clip(n @ lamp, 0.0, None)
    lit = np.where(shadow_mask(h, azimuth_deg, elevation_deg), 0.0, lit)
    if colour:
        img = _blend_albedo(masks, tile) * lit[..., None] + tile.ambient
        img = img.reshape(size, supersample, size, supersample, 3).mean(axis=(1, 3))  # box anti-aliasing
    else:
        img = tile.albedo * lit + tile.ambient
        img = img.reshape(size, supersample, size, supersample).mean(axis=(1, 3))  # box anti-aliasing
    return np.clip(img, 0.0, 1.0).astype(np.float32)


def render_many(params: np.ndarray, size: int = 64, *, colour: bool = False) -> np.ndarray:
    """(N, 2) settings (azimuth, elevation) to (N, size, size, 1) images, (N, size, size, 3) in colour."""
    imgs = np.stack([render(a, e, size, colour=colour) for a, e in np.asarray(params, dtype=np.float64)])
    return imgs if colour else imgs[..., None]


# -- the demo scene folder and its truth set ------------------------------------------------------
GRID_AZIMUTH = np.arange(0.0, 360.0, 15.0)   # 24 values
GRID_ELEVATION = np.arange(20.0, 71.0, 10.0)  # 6 values
TRUTH_T = np.arange(1, 6) / 6.0               # five in-betweens per pair
TRUTH_DIRECTIONS = {"azimuth": (1, 0), "elevation": (0, 1), "rising": (1, 1), "falling": (1, -1)}


def demo_grid() -> np.ndarray:
    """(144, 2) grid settings: azimuth every 15 deg x elevation every 10 deg."""
    az, el = np.meshgrid(GRID_AZIMUTH, GRID_ELEVATION, indexing="ij")
    return np.stack([az.ravel(), el.ravel()], axis=-1)


def grid_pairs(space: ParamSpace, axes: tuple[np.ndarray, np.ndarray], directions: dict[str, tuple[int, int]],
               count: int, *, seed: int = 0, min_steps: int = 2, max_steps: int = 6,
               max_draws: int = 1_000_000) -> list[dict]:
    """Distinct pairs of settings on a 2-D grid, `steps` grid steps apart along a direction.

    `axes` are the grid values of the two parameters of `space`; `directions` maps a name to a
    step (d0, d1) in grid units, taken in turn. Half the time the first axis runs the other way,
    so a diagonal's name does not fix its orientation. A periodic axis wraps (the pair lies on its
    short arc); a non-periodic one must hold both ends. Each pair is {"direction", "steps",
    "start", "end"} with start and end in the parameters' units.
    """
    if len(space) != 2 or len(axes) != 2:
        raise ValueError(f"grid_pairs needs a 2-parameter space and two axes, got {len(space)} and {len(axes)}")
    if not 1 <= min_steps <= max_steps:
        raise ValueError(f"need 1 <= min_steps <= max_steps, got {min_steps} and {max_steps}")
    n0, n1 = len(axes[0]), len(axes[1])
    wrap0, wrap1 = bool(space.periodic[0]), bool(space.periodic[1])
    for name, n, wraps in ((space.names[0], n0, wrap0), (space.names[1], n1, wrap1)):
        if wraps and 2 * max_steps > n:  # beyond half a turn the short arc is the other way round
            raise ValueError(f"{name}: max_steps={max_steps} is over half of its {n} periodic grid values")
    rng = np.random.default_rng(seed)
    pairs, seen = [], set()
    names = list(directions)
    draws = 0
    while len(pairs) < count:
        draws += 1
        if draws > max_draws:
            raise ValueError(f"found only {len(pairs)} distinct pairs of {count} in {max_draws} draws; "
                             "ask for fewer pairs or a wider step range")
        direction = names[len(pairs) % len(names)]
        d0, d1 = directions[direction]
        steps = int(rng.integers(min_steps, max_steps + 1))
        if (d1 != 0 and not wrap1 and steps > n1 - 1) or (d0 != 0 and not wrap0 and steps > n0 - 1):
            continue
        i0 = int(rng.integers(0, n0))
        i1 = int(rng.integers(0, n1))
        j1 = i1 + d1 * steps
        if wrap1:
            j1 %= n1
        elif not 0 <= j1 < n1:
            continue
        if rng.random() < 0.5:  # walk either way along the first axis
            d0 = -d0
        j0 = i0 + d0 * steps
        if wrap0:
            j0 %= n0
        elif not 0 <= j0 < n0:
            continue
        key = (i0, i1, j0, j1)
        if key in seen:
            continue
        seen.add(key)
        start = np.array([axes[0][i0], axes[1][i1]])
        end = np.array([axes[0][j0], axes[1][j1]])
        pairs.append({"direction": direction, "steps": steps, "start": start, "end": end})
    return pairs


def truth_pairs(count: int = 90, *, seed: int = 0, min_steps: int = 2, max_steps: int = 6) -> list[dict]:
    """Pairs of demo grid settings `steps` grid steps apart along an axis or a diagonal (short arc)."""
    return grid_pairs(DEMO_SPACE, (GRID_AZIMUTH, GRID_ELEVATION), TRUTH_DIRECTIONS, count, seed=seed,
                      min_steps=min_steps, max_steps=max_steps)


# Long pairs: along azimuth 7 to 11 grid steps (105-165 deg), up to the longest short arc the 15 deg
# grid holds below half a turn (at exactly 180 deg both ways round are as short, so the true frames
# would be ambiguous); along elevation the whole range (20 to 70 deg).
LONG_AZIMUTH_STEPS = (7, 11)
LONG_FULL_RANGE_SHARE = 0.25  # of the long pairs, the share (rounded down) across the whole elevation range


def long_truth_pairs(count: int = 40, *, seed: int = 0) -> list[dict]:
    """Long pairs of demo grid settings: `count` minus a quarter (rounded down) along azimuth,
    LONG_AZIMUTH_STEPS grid steps apart on the short arc, then the quarter from the lowest to the
    highest elevation at one azimuth (at most one per azimuth grid value)."""
    if count < 0:
        raise ValueError(f"long pairs: count must be >= 0, got {count}")
    full = int(count * LONG_FULL_RANGE_SHARE)
    if full > len(GRID_AZIMUTH):
        raise ValueError(f"long pairs: {count} asks for {full} full-range elevation pairs; the grid holds "
                         f"{len(GRID_AZIMUTH)} (one per azimuth), so ask for at most "
                         f"{round((len(GRID_AZIMUTH) + 1) / LONG_FULL_RANGE_SHARE) - 1}")
    axes = (GRID_AZIMUTH, GRID_ELEVATION)
    lo, hi = LONG_AZIMUTH_STEPS
    along = grid_pairs(DEMO_SPACE, axes, {"azimuth": TRUTH_DIRECTIONS["azimuth"]}, count - full, seed=seed,
                       min_steps=lo, max_steps=hi)
    whole = len(GRID_ELEVATION) - 1
    across = grid_pairs(DEMO_SPACE, axes, {"elevation": TRUTH_DIRECTIONS["elevation"]}, full, seed=seed,
                        min_steps=whole, max_steps=whole)
    return along + across


def write_demo(out: str | Path, *, size: int = 64, pairs: int = 90, long_pairs: int = 40, seed: int = 0,
               colour: bool = False) -> tuple[Path, Path]:
    """Write OUT/scene (training scene folder, 144 grid renders) and OUT/truth (see `write_truth`):
    `pairs` pairs from `truth_pairs` (2 to 6 grid steps), then `long_pairs` from `long_truth_pairs`.

    colour=True writes the colour tile (RGB PNGs) under the name DEMO_COLOUR_NAME.
    """
    from .scene import save_scene

    out = Path(out)
    grid = demo_grid()
    name = DEMO_COLOUR_NAME if colour else DEMO_NAME
    scene_dir = save_scene(out / "scene", name, DEMO_SPACE, render_many(grid, size, colour=colour), grid)
    chosen = truth_pairs(pairs, seed=seed) + long_truth_pairs(long_pairs, seed=seed)
    truth_dir = write_truth(out / "truth", chosen, size=size, colour=colour)
    return scene_dir, truth_dir


def write_truth(out: str | Path, pairs: list[dict], *, size: int = 64, colour: bool = False) -> Path:
    """The demo's truth set (see `write_truth_set`), rendered at size x size pixels."""
    return write_truth_set(out, pairs, lambda p: render(float(p[0]), float(p[1]), size, colour=colour),
                           DEMO_SPACE)


def write_truth_set(out: str | Path, pairs: list[dict], view: Callable[[np.ndarray], np.ndarray],
                    space: ParamSpace) -> Path:
    """Truth set: truth.json plus PNGs, each image made by `view(settings vector)`.

    `view` returns (H, W) or (H, W, 1) floats in [0, 1] for grayscale, (H, W, 3) for colour.
    truth.json = {"format": "geotween-truth/1", "space": [parameter dicts], "pairs": [
      {"direction", "steps", "start": {"params": {...}, "image": "p000_start.png"},
       "end": {...}, "frames": [{"t": 1/6, "params": {...}, "image": "p000_t1.png"}, ...]}]}
    Frame params are the true settings at t (on the short arc for periodic parameters); images
    are 8-bit grayscale or RGB PNGs.
    """
    from PIL import Image

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)

    def save(name: str, p: np.ndarray) -> dict:
        img = np.asarray(view(p))
        if img.ndim == 3 and img.shape[2] == 1:
            img = img[..., 0]
        if not (img.ndim == 2 or (img.ndim == 3 and img.shape[2] == 3)):
            raise ValueError(f"view must give (H, W), (H, W, 1) or (H, W, 3) images, got {img.shape}")
        pixels = np.round(np.clip(img, 0.0, 1.0) * 255).astype(np.uint8)
        Image.fromarray(pixels).save(out / name)  # uint8 (H, W) is L, (H, W, 3) is RGB
        return {"params": space.named(p), "image": name}

    entries = []
    for i, pair in enumerate(pairs):
        frames = []
        for j, t in enumerate(TRUTH_T, start=1):
            entry = save(f"p{i:03d}_t{j}.png", space.lerp(pair["start"], pair["end"], t))
            frames.append({"t": float(t), **entry})
        entries.append({"direction": pair["direction"], "steps": pair["steps"],
                        "start": save(f"p{i:03d}_start.png", pair["start"]),
                        "end": save(f"p{i:03d}_end.png", pair["end"]), "frames": frames})
    doc = {"format": "geotween-truth/1", "space": space.to_list(), "pairs": entries}
    (out / "truth.json").write_text(json.dumps(doc, indent=1))
    return out
