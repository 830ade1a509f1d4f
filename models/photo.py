"""A colour test scene cut from a photograph seen through a window that pans and zooms.

The window is square and its centre stays on the photo's middle row. `pan` (0..1) moves the
centre left to right; `zoom` (0..1) shrinks the side linearly from WIDEST to TIGHTEST times the
photo's height. The centre's path is set by the widest window, so every window stays inside the
photo. A view is the window resampled by PIL's Lanczos filter from a fractional box; training
images and truth frames come from the same function, so truth frames are exact crops of the
same photograph.

The photo is an (H, W, 3) uint8 array passed in by the caller (for instance
`skimage.data.coffee()`, which ships inside scikit-image's wheel); this module reads no files.
Box coordinates are photo pixel edges: pixel column i spans [i, i + 1).
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from .params import SPAN_BUCKETS, Parameter, ParamSpace
from .render import grid_pairs, write_truth_set

PHOTO_SPACE = ParamSpace([Parameter("pan", 0.0, 1.0), Parameter("zoom", 0.0, 1.0)])
PHOTO_NAME = "photo-window"
WIDEST = 0.90    # window side at zoom 0, as a fraction of the photo's height
TIGHTEST = 0.45  # window side at zoom 1
GRID_PAN = np.linspace(0.0, 1.0, 12)
GRID_ZOOM = np.linspace(0.0, 1.0, 12)
PHOTO_DIRECTIONS = {"pan": (1, 0), "zoom": (0, 1), "rising": (1, 1), "falling": (1, -1)}


def _check_photo(photo: np.ndarray) -> np.ndarray:
    photo = np.asarray(photo)
    if photo.ndim != 3 or photo.shape[2] != 3 or photo.dtype != np.uint8:
        raise ValueError(f"photo must be an (H, W, 3) uint8 array, got {photo.shape} {photo.dtype}")
    return photo


def window_box(shape: tuple[int, ...], pan: float, zoom: float) -> tuple[float, float, float, float]:
    """(left, top, right, bottom) of the window in photo pixels for a photo of `shape` (H, W, ...)."""
    height, width = int(shape[0]), int(shape[1])
    for name, v in (("pan", pan), ("zoom", zoom)):
        if not 0.0 <= v <= 1.0:
            raise ValueError(f"{name} must be in [0, 1], got {v!r}")
    widest = WIDEST * height
    if width < widest:
        raise ValueError(f"photo is {width} px wide, narrower than the widest window ({widest:g} px, "
                         f"{WIDEST:g} of its height {height})")
    side = height * (WIDEST + (TIGHTEST - WIDEST) * zoom)
    cx = widest / 2.0 + pan * (width - widest)
    cy = height / 2.0
    return (cx - side / 2.0, cy - side / 2.0, cx + side / 2.0, cy + side / 2.0)


def crop_resample(photo: np.ndarray, box: tuple[float, float, float, float], size: int) -> np.ndarray:
    """(size, size, 3) float32 in [0, 1]: the box of the photo resampled with Lanczos (anti-aliased)."""
    photo = _check_photo(photo)
    left, top, right, bottom = (float(v) for v in box)
    if not (0.0 <= left < right <= photo.shape[1] and 0.0 <= top < bottom <= photo.shape[0]):
        raise ValueError(f"box {box} is not inside the {photo.shape[1]} x {photo.shape[0]} photo")
    img = Image.fromarray(photo).resize((size, size), Image.Resampling.LANCZOS, box=(left, top, right, bottom))
    return np.asarray(img, dtype=np.float32) / 255.0


def view(photo: np.ndarray, pan: float, zoom: float, size: int = 64) -> np.ndarray:
    """(size, size, 3) float32 in [0, 1]: the photo through the window at (pan, zoom)."""
    photo = _check_photo(photo)
    return crop_resample(photo, window_box(photo.shape, float(pan), float(zoom)), size)


def photo_grid() -> np.ndarray:
    """(144, 2) grid settings (pan, zoom): 12 x 12 evenly spaced values over [0, 1]."""
    pan, zoom = np.meshgrid(GRID_PAN, GRID_ZOOM, indexing="ij")
    return np.stack([pan.ravel(), zoom.ravel()], axis=-1)


def photo_pairs(count: int = 90, *, seed: int = 0, min_steps: int = 2, max_steps: int = 6) -> list[dict]:
    """Pairs of grid settings `steps` grid steps apart along pan, zoom or a diagonal."""
    return grid_pairs(PHOTO_SPACE, (GRID_PAN, GRID_ZOOM), PHOTO_DIRECTIONS, count, seed=seed,
                      min_steps=min_steps, max_steps=max_steps)


# Long pairs: at least this many grid steps apart, the fewest whose reach (steps / 11 of the range)
# lies beyond the medium span bucket, up to the whole range.
LONG_MIN_STEPS = int(np.floor(SPAN_BUCKETS[1][1] * (len(GRID_PAN) - 1))) + 1  # 9 of 11


def photo_long_pairs(count: int = 24, *, seed: int = 0) -> list[dict]:
    """Long pairs: LONG_MIN_STEPS to 11 grid steps (the whole range) apart along pan, zoom or a diagonal."""
    return grid_pairs(PHOTO_SPACE, (GRID_PAN, GRID_ZOOM), PHOTO_DIRECTIONS, count, seed=seed,
                      min_steps=LONG_MIN_STEPS, max_steps=len(GRID_PAN) - 1)


def write_photo_scene(photo: np.ndarray, out: str | Path, *, size: int = 64, pairs: int = 90,
                      long_pairs: int = 24, seed: int = 0) -> tuple[Path, Path]:
    """Write OUT/scene (144 grid views, RGB PNGs) and OUT/truth (in-betweens at t = 1/6 ... 5/6):
    `pairs` pairs from `photo_pairs` (2 to 6 grid steps), then `long_pairs` from `photo_long_pairs`."""
    from .scene import save_scene

    photo = _check_photo(photo)
    window_box(photo.shape, 0.0, 0.0)  # refuse a photo too narrow for the window before writing
    out = Path(out)
    grid = photo_grid()
    images = np.stack([view(photo, pan, zoom, size) for pan, zoom in grid])
    scene_dir = save_scene(out / "scene", PHOTO_NAME, PHOTO_SPACE, images, grid)
    chosen = photo_pairs(pairs, seed=seed) + photo_long_pairs(long_pairs, seed=seed)
    truth_dir = write_truth_set(out / "truth", chosen,
                                lambda p: view(photo, p[0], p[1], size), PHOTO_SPACE)
    return scene_dir, truth_dir
