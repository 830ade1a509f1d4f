"""The demo scene: a relief tile under a moving lamp.

A procedurally built heightfield (a raised ring, a stepped block, a round pillar and a groove on a
flat tile) rendered with Lambertian shading plus hard cast shadows, for lamp azimuth (degrees,
periodic 0-360, 0 = lamp towards +x, 90 = towards +y) and lamp elevation (degrees above the tile).
The renderer gives the true image for any settings, so every in-between can be scored against it.

World units: the tile spans [0, 1] x [0, 1]; heights are in the same units. Image row r, column c
looks at world (x, y) = ((c + 0.5) / S, (r + 0.5) / S) from straight above.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import ndimage

from .params import Parameter, ParamSpace

DEMO_SPACE = ParamSpace([
    Parameter("lamp_azimuth", 0.0, 360.0, unit="deg", periodic=True),
    Parameter("lamp_elevation", 20.0, 70.0, unit="deg"),
])
DEMO_NAME = "relief-tile"


@dataclass(frozen=True)
class Tile:
    """Shading constants. Intensity = albedo * max(0, n . l) + ambient, or ambient in shadow."""
    albedo: float = 0.8
    ambient: float = 0.1
    pillar_height: float = 0.10
    pillar_center: tuple[float, float] = (0.72, 0.70)
    pillar_radius: float = 0.06


def _smoothstep(edge0: float, edge1: float, x: np.ndarray) -> np.ndarray:
    u = np.clip((x - edge0) / (edge1 - edge0), 0.0, 1.0)
    return u * u * (3.0 - 2.0 * u)


def heightfield(size: int, tile: Tile = Tile()) -> np.ndarray:
    """(size, size) heights in tile units; feature edges are softened over ~1/64 of the tile."""
    c = (np.arange(size) + 0.5) / size
    x, y = np.meshgrid(c, c)  # x along columns, y along rows
    soft = 1.0 / 64.0
    h = np.zeros_like(x)
    # raised ring, lower left
    r = np.hypot(x - 0.30, y - 0.32)
    h += 0.035 * _smoothstep(0.08, 0.08 + soft, r) * (1.0 - _smoothstep(0.17, 0.17 + soft, r))
    # stepped block, upper left: two terraces
    in_x = _smoothstep(0.12, 0.12 + soft, x) * (1.0 - _smoothstep(0.45, 0.45 + soft, x))
    h += 0.025 * in_x * _smoothstep(0.58, 0.58 + soft, y) * (1.0 - _smoothstep(0.88, 0.88 + soft, y))
    h += 0.025 * in_x * _smoothstep(0.70, 0.70 + soft, y) * (1.0 - _smoothstep(0.88, 0.88 + soft, y))
    # groove, right: a diagonal channel
    d = np.abs((x - 0.62) - 0.55 * (y - 0.25)) / np.hypot(1.0, 0.55)
    along = _smoothstep(0.05, 0.05 + soft, y) * (1.0 - _smoothstep(0.45, 0.45 + soft, y))
    h -= 0.02 * (1.0 - _smoothstep(0.025, 0.025 + soft, d)) * along
    # pillar: a flat-topped cylinder (its top is level, so it reads as a flat patch)
    px, py = tile.pillar_center
    inside = 1.0 - _smoothstep(tile.pillar_radius, tile.pillar_radius + soft / 2,
                               np.hypot(x - px, y - py))
    return h + inside * (tile.pillar_height - h)


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


def render(azimuth_deg: float, elevation_deg: float, size: int = 64, *, tile: Tile = Tile(),
           supersample: int = 2) -> np.ndarray:
    """(size, size) float32 image in [0, 1] of the tile lit from the given lamp direction (degrees)."""
    hi = size * supersample
    h = heightfield(hi, tile)
    gy, gx = np.gradient(h, 1.0 / hi)  # slopes, rows = y
    n = np.stack([-gx, -gy, np.ones_like(h)], axis=-1)
    n /= np.linalg.norm(n, axis=-1, keepdims=True)
    lamp = lamp_vector(azimuth_deg, elevation_deg)
    lit = np.clip(n @ lamp, 0.0, None)
    lit = np.where(shadow_mask(h, azimuth_deg, elevation_deg), 0.0, lit)
    img = tile.albedo * lit + tile.ambient
    img = img.reshape(size, supersample, size, supersample).mean(axis=(1, 3))  # box anti-aliasing
    return np.clip(img, 0.0, 1.0).astype(np.float32)


def render_many(params: np.ndarray, size: int = 64) -> np.ndarray:
    """(N, 2) settings (azimuth, elevation) to (N, size, size, 1) images."""
    return np.stack([render(a, e, size) for a, e in np.asarray(params, dtype=np.float64)])[..., None]


# -- the demo scene folder and its truth set ------------------------------------------------------
GRID_AZIMUTH = np.arange(0.0, 360.0, 15.0)   # 24 values
GRID_ELEVATION = np.arange(20.0, 71.0, 10.0)  # 6 values
TRUTH_T = np.arange(1, 6) / 6.0               # five in-betweens per pair
TRUTH_DIRECTIONS = {"azimuth": (1, 0), "elevation": (0, 1), "rising": (1, 1), "falling": (1, -1)}


def demo_grid() -> np.ndarray:
    """(144, 2) grid settings: azimuth every 15 deg x elevation every 10 deg."""
    az, el = np.meshgrid(GRID_AZIMUTH, GRID_ELEVATION, indexing="ij")
    return np.stack([az.ravel(), el.ravel()], axis=-1)


def truth_pairs(count: int = 90, *, seed: int = 0, min_steps: int = 2, max_steps: int = 6) -> list[dict]:
    """Pairs of grid settings `steps` grid steps apart along an axis or a diagonal (short arc)."""
    rng = np.random.default_rng(seed)
    pairs, seen = [], set()
    n_el = len(GRID_ELEVATION)
    names = list(TRUTH_DIRECTIONS)
    while len(pairs) < count:
        direction = names[len(pairs) % len(names)]
        da, de = TRUTH_DIRECTIONS[direction]
        steps = int(rng.integers(min_steps, max_steps + 1))
        if de != 0 and steps > n_el - 1:
            continue
        ia = int(rng.integers(0, len(GRID_AZIMUTH)))
        ie = int(rng.integers(0, n_el))
        je = ie + de * steps
        if not 0 <= je < n_el:
            continue
        if rng.random() < 0.5:  # walk either way round
            da = -da
        ja = (ia + da * steps) % len(GRID_AZIMUTH)
        key = (ia, ie, ja, je)
        if key in seen:
            continue
        seen.add(key)
        start = np.array([GRID_AZIMUTH[ia], GRID_ELEVATION[ie]])
        end = np.array([GRID_AZIMUTH[ja], GRID_ELEVATION[je]])
        pairs.append({"direction": direction, "steps": steps, "start": start, "end": end})
    return pairs


def write_demo(out: str | Path, *, size: int = 64, pairs: int = 90, seed: int = 0) -> tuple[Path, Path]:
    """Write OUT/scene (training scene folder, 144 grid renders) and OUT/truth (see `write_truth`)."""
    from .scene import save_scene

    out = Path(out)
    grid = demo_grid()
    scene_dir = save_scene(out / "scene", DEMO_NAME, DEMO_SPACE, render_many(grid, size), grid)
    truth_dir = write_truth(out / "truth", truth_pairs(pairs, seed=seed), size=size)
    return scene_dir, truth_dir


def write_truth(out: str | Path, pairs: list[dict], *, size: int = 64) -> Path:
    """Truth set: truth.json plus PNGs.

    truth.json = {"format": "geotween-truth/1", "space": [parameter dicts], "pairs": [
      {"direction", "steps", "start": {"params": {...}, "image": "p000_start.png"},
       "end": {...}, "frames": [{"t": 1/6, "params": {...}, "image": "p000_t1.png"}, ...]}]}
    Frame params are the true settings at t on the short arc; images are 8-bit grayscale PNGs.
    """
    from PIL import Image

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)

    def save(name: str, p: np.ndarray) -> dict:
        img = render(float(p[0]), float(p[1]), size)
        Image.fromarray(np.round(img * 255).astype(np.uint8), mode="L").save(out / name)
        return {"params": DEMO_SPACE.named(p), "image": name}

    entries = []
    for i, pair in enumerate(pairs):
        frames = []
        for j, t in enumerate(TRUTH_T, start=1):
            entry = save(f"p{i:03d}_t{j}.png", DEMO_SPACE.lerp(pair["start"], pair["end"], t))
            frames.append({"t": float(t), **entry})
        entries.append({"direction": pair["direction"], "steps": pair["steps"],
                        "start": save(f"p{i:03d}_start.png", pair["start"]),
                        "end": save(f"p{i:03d}_end.png", pair["end"]), "frames": frames})
    doc = {"format": "geotween-truth/1", "space": DEMO_SPACE.to_list(), "pairs": entries}
    (out / "truth.json").write_text(json.dumps(doc, indent=1))
    return out
