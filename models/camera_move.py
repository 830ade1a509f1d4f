"""A colour test scene: a camera over a photograph that turns about its view axis and zooms.

The view is a square window centred on the photo's centre. `roll` (degrees, periodic 0..360)
turns it: the photo appears turned counter-clockwise by `roll` as displayed (rows down), so a
quarter turn of roll is `np.rot90` of the view. `zoom` (0..1) shrinks its side linearly from
WIDEST to TIGHTEST times the photo's shorter side. WIDEST keeps the window's circumscribed circle,
plus the resampling filter's reach, inside the photo, so every roll sees only real pixels.

A view is rendered by PIL's affine transform with the bicubic filter on a supersampled grid (at
most one photo pixel between samples), in 32-bit float per channel, then box-averaged down to
the output size. Training images and truth frames come from the same function, so truth frames
are exact views of the same photograph.

The photo is an (H, W, 3) uint8 array passed in by the caller (the bench uses
`skimage.data.astronaut()`, which ships inside scikit-image's wheel); this module reads no files.
Photo coordinates are pixel edges: pixel column i spans [i, i + 1).
"""
from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from PIL import Image

from .params import Parameter, ParamSpace
from .render import grid_pairs, write_truth_set

CAMERA_SPACE = ParamSpace([Parameter("roll", 0.0, 360.0, unit="deg", periodic=True),
                           Parameter("zoom", 0.0, 1.0)])
CAMERA_NAME = "camera-move"
CAMERA_SCATTERED_NAME = "camera-move-scattered"
# Window side at zoom 0 and 1, as a fraction of the photo's shorter side. The circumscribed circle of
# the widest window has radius 0.68 / sqrt(2) = 0.481 of that side, inside the inscribed 0.5.
WIDEST = 0.68
TIGHTEST = 0.34
FILTER_REACH = 2.0  # photo pixels the bicubic filter reads on either side of a sample
SUPERSAMPLE = 1.0  # samples per photo pixel (at least) along each axis before the box average
GRID_ROLL = np.arange(0.0, 360.0, 15.0)  # 24 values
GRID_ZOOM = np.linspace(0.0, 1.0, 6)
CAMERA_DIRECTIONS = {"roll": (1, 0), "zoom": (0, 1), "rising": (1, 1), "falling": (1, -1)}
LONG_ROLL_STEPS = (7, 11)  # 105 to 165 deg: up to the longest short arc the 15 deg grid holds below half a turn


def _check_photo(photo: np.ndarray) -> np.ndarray:
    photo = np.asarray(photo)
    if photo.ndim != 3 or photo.shape[2] != 3 or photo.dtype != np.uint8:
        raise ValueError(f"photo must be an (H, W, 3) uint8 array, got {photo.shape} {photo.dtype}")
    return photo


def window_side(shape: tuple[int, ...], zoom: float) -> float:
    """Side of the window in photo pixels at `zoom` (in [0, 1]) for a photo of `shape` (H, W, ...)."""
    if not 0.0 <= zoom <= 1.0:
        raise ValueError(f"zoom must be in [0, 1], got {zoom!r}")
    shorter = min(int(shape[0]), int(shape[1]))
    widest = WIDEST * shorter
    if widest / math.sqrt(2.0) + FILTER_REACH > shorter / 2.0:
        raise ValueError(f"photo is {shape[1]} x {shape[0]} px: too small for the widest window "
                         f"({widest:g} px) to turn inside it")
    return shorter * (WIDEST + (TIGHTEST - WIDEST) * zoom)


def window_corners(shape: tuple[int, ...], roll: float, zoom: float) -> np.ndarray:
    """(4, 2) photo (x, y) of the view's top-left, top-right, bottom-right and bottom-left corners."""
    side = window_side(shape, float(zoom))
    return _to_photo(shape, float(roll), side, np.array([[-0.5, -0.5], [0.5, -0.5], [0.5, 0.5], [-0.5, 0.5]]))


def _to_photo(shape: tuple[int, ...], roll: float, side: float, uv: np.ndarray) -> np.ndarray:
    """View coordinates (u right, v down, each in [-0.5, 0.5]) to photo (x, y) in pixel edges."""
    c, s = math.cos(math.radians(roll)), math.sin(math.radians(roll))
    u, v = uv[..., 0], uv[..., 1]
    # the window turns clockwise on the photo, so the photo appears turned counter-clockwise
    return np.stack([shape[1] / 2.0 + side * (c * u - s * v), shape[0] / 2.0 + side * (s * u + c * v)], axis=-1)


def view(photo: np.ndarray, roll: float, zoom: float, size: int = 64) -> np.ndarray:
    """(size, size, 3) float32 in [0, 1]: the photo seen at (roll degrees, zoom)."""
    photo = _check_photo(photo)
    roll, zoom = float(roll), float(zoom)
    if not math.isfinite(roll):
        raise ValueError(f"roll must be a finite number of degrees, got {roll!r}")
    if size < 1:
        raise ValueError(f"size must be >= 1 pixel, got {size!r}")
    roll = roll % 360.0  # periodic: 360 deg is 0 deg exactly
    side = window_side(photo.shape, zoom)
    k = max(1, math.ceil(SUPERSAMPLE * side / size))  # supersamples per output pixel and axis
    n = size * k
    c, s = math.cos(math.radians(roll)), math.sin(math.radians(roll))
    cx, cy = photo.shape[1] / 2.0, photo.shape[0] / 2.0
    # PIL maps output pixel centre (X + 0.5, Y + 0.5) to photo (a X' + b Y' + c0, d X' + e Y' + f0), in
    # pixel edges; with u = X' / n - 0.5 this is `_to_photo`
    step = side / n
    coeffs = (step * c, -step * s, cx - side / 2.0 * (c - s), step * s, step * c, cy - side / 2.0 * (s + c))
    planes = []
    for ch in range(3):
        plane = Image.fromarray(photo[..., ch].astype(np.float32))  # mode F: no rounding between steps
        hi = plane.transform((n, n), Image.Transform.AFFINE, coeffs, resample=Image.Resampling.BICUBIC)
        planes.append(np.asarray(hi, dtype=np.float32).reshape(size, k, size, k).mean(axis=(1, 3)))
    return np.clip(np.stack(planes, axis=-1) / 255.0, 0.0, 1.0).astype(np.float32)


def camera_grid() -> np.ndarray:
    """(144, 2) grid settings (roll, zoom): roll every 15 deg x 6 zoom values over [0, 1]."""
    roll, zoom = np.meshgrid(GRID_ROLL, GRID_ZOOM, indexing="ij")
    return np.stack([roll.ravel(), zoom.ravel()], axis=-1)


def camera_scattered(count: int = 220, *, seed: int = 0) -> np.ndarray:
    """(count, 2) scattered settings (roll, zoom), off any grid: each axis cut into `count` equal
    strata, one uniform draw in each, strata paired at random (Latin hypercube sampling), so the
    samples cover both ranges evenly without lining up."""
    if count < 2:
        raise ValueError(f"scattered settings: count must be >= 2, got {count}")
    rng = np.random.default_rng(seed)
    cols = [(rng.permutation(count) + rng.random(count)) / count for _ in range(2)]
    return np.stack([cols[0] * 360.0, cols[1]], axis=-1)


def camera_pairs(count: int = 90, *, seed: int = 0, min_steps: int = 2, max_steps: int = 5) -> list[dict]:
    """Pairs of grid settings `steps` grid steps apart along roll, zoom or a diagonal (roll on the short arc)."""
    return grid_pairs(CAMERA_SPACE, (GRID_ROLL, GRID_ZOOM), CAMERA_DIRECTIONS, count, seed=seed,
                      min_steps=min_steps, max_steps=max_steps)


def camera_long_pairs(count: int = 24, *, seed: int = 0) -> list[dict]:
    """Long pairs: along roll, LONG_ROLL_STEPS grid steps (105 to 165 deg) apart on the short arc."""
    lo, hi = LONG_ROLL_STEPS
    return grid_pairs(CAMERA_SPACE, (GRID_ROLL, GRID_ZOOM), {"roll": CAMERA_DIRECTIONS["roll"]}, count,
                      seed=seed, min_steps=lo, max_steps=hi)


def write_camera_scene(photo: np.ndarray, out: str | Path, *, size: int = 64, pairs: int = 90,
                       long_pairs: int = 24, scattered: bool = False, seed: int = 0) -> tuple[Path, Path]:
    """Write OUT/scene (RGB PNG views) and OUT/truth (in-betweens at t = 1/6 ... 5/6 on the grid):
    `pairs` pairs from `camera_pairs`, then `long_pairs` from `camera_long_pairs`.

    The scene holds the 144 grid views, or with scattered=True the views at `camera_scattered`
    settings under the name CAMERA_SCATTERED_NAME (its truth pairs still join grid settings).
    """
    from .scene import save_scene

    photo = _check_photo(photo)
    window_side(photo.shape, 0.0)  # refuse a photo too small for the window before writing
    out = Path(out)
    settings = camera_scattered(seed=seed) if scattered else camera_grid()
    images = np.stack([view(photo, roll, zoom, size) for roll, zoom in settings])
    scene_dir = save_scene(out / "scene", CAMERA_SCATTERED_NAME if scattered else CAMERA_NAME, CAMERA_SPACE,
                           images, settings)
    chosen = camera_pairs(pairs, seed=seed) + camera_long_pairs(long_pairs, seed=seed)
    truth_dir = write_truth_set(out / "truth", chosen, lambda p: view(photo, p[0], p[1], size), CAMERA_SPACE)
    return scene_dir, truth_dir
