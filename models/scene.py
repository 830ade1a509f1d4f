"""Scene folders: load, validate and write the images of one subject under known settings.

A scene folder holds `scene.json` (name and parameter spec), `samples.csv` (header
`image,<parameter names>`, one row per image, paths relative to the folder) and the images
(PNG or JPEG, grayscale or RGB, any size). Every problem raises one `SceneError` naming the
file, the 1-based data row of samples.csv, the column and the offending value.
"""
from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

from .params import Parameter, ParamSpace

SPEC_FILE = "scene.json"
SAMPLES_FILE = "samples.csv"
IMAGE_COLUMN = "image"

_GRAY_MODES = {"1", "L", "LA", "La", "I", "F"}  # plus every "I;16..." variant


class SceneError(ValueError):
    """A scene folder that cannot be used; `file`, `row`, `column`, `value` locate the culprit."""

    def __init__(self, problem: str, *, file: str, row: int | None = None,
                 column: str | None = None, value: object = None):
        self.file, self.row, self.column, self.value, self.problem = file, row, column, value, problem
        where = file + (f" row {row}" if row is not None else "")
        if column is not None:
            # samples.csv has columns; scene.json has fields
            where += f", {'column' if file.endswith('.csv') else 'field'} {column!r}"
        what = f"value {str(value)!r} {problem}" if value is not None else problem
        super().__init__(f"{where}: {what}")


@dataclass
class Scene:
    """Images (N, H, W, C) float32 in [0, 1] with their settings (N, P) in the parameters' units."""

    name: str
    space: ParamSpace
    images: np.ndarray
    params: np.ndarray
    files: list[str]
    root: Path
    full: np.ndarray | None = None  # uint8 (N, H', W', C): the captures at their own size, when larger

    def __len__(self) -> int:
        return len(self.images)

    @property
    def channels(self) -> int:
        return int(self.images.shape[3])

    @property
    def resolution(self) -> int:
        return int(self.images.shape[1])


# -- scene.json ------------------------------------------------------------------------------
def load_spec(root: str | Path) -> tuple[str, ParamSpace]:
    """Read and check scene.json; the name defaults to the folder's name."""
    root = Path(root)
    path = root / SPEC_FILE
    if not path.is_file():
        raise SceneError(f"not found in folder '{root}'", file=SPEC_FILE)
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise SceneError(f"is not valid JSON ({exc})", file=SPEC_FILE) from None
    if not isinstance(doc, dict):
        raise SceneError("must hold a JSON object", file=SPEC_FILE)
    name = doc.get("name", root.resolve().name)
    if not isinstance(name, str) or not name.strip():
        raise SceneError("must be a non-empty string", file=SPEC_FILE, column="name", value=name)
    items = doc.get("parameters")
    if not isinstance(items, list) or not items:
        raise SceneError("must be a non-empty list of parameters", file=SPEC_FILE, column="parameters")
    params: list[Parameter] = []
    for i, item in enumerate(items):
        field = f"parameters[{i}]"
        if not isinstance(item, dict):
            raise SceneError("must be an object", file=SPEC_FILE, column=field, value=item)
        pname = item.get("name")
        at = dict(file=SPEC_FILE, column=f"{field}.name", value=pname)
        if not isinstance(pname, str) or not pname.strip():
            raise SceneError("must be a non-empty string", **at)
        if pname == IMAGE_COLUMN:
            raise SceneError("is reserved for the image column", **at)
        if pname in (p.name for p in params):
            raise SceneError("names two parameters", **at)
        for key in ("min", "max"):
            v = item.get(key)
            # bool is an int in Python but never a bound
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise SceneError(f"is not a finite number (got {type(v).__name__})", file=SPEC_FILE,
                                 column=f"{field}.{key}", value=v)
        if item["min"] >= item["max"]:
            raise SceneError(f"must be above min {item['min']}", file=SPEC_FILE, column=f"{field}.max",
                             value=item["max"])
        if not isinstance(item.get("periodic", False), bool):
            raise SceneError("must be true or false", file=SPEC_FILE, column=f"{field}.periodic",
                             value=item["periodic"])
        if not isinstance(item.get("unit", ""), str):
            raise SceneError("must be a string", file=SPEC_FILE, column=f"{field}.unit", value=item["unit"])
        params.append(Parameter.from_dict(item))
    return name, ParamSpace(params)


# -- samples.csv -----------------------------------------------------------------------------
def _read_samples(root: Path, space: ParamSpace) -> tuple[list[int], list[str], np.ndarray]:
    """Data rows of samples.csv: (row numbers, image paths, settings (N, P))."""
    path = root / SAMPLES_FILE
    if not path.is_file():
        raise SceneError(f"not found in folder '{root}'", file=SAMPLES_FILE)
    # utf-8-sig: spreadsheet programs often write a byte-order mark
    with path.open(newline="", encoding="utf-8-sig") as fh:
        rows = list(csv.reader(fh))
    if not rows:
        expected = ",".join((IMAGE_COLUMN,) + space.names)
        raise SceneError(f"is empty; expected a header {expected}", file=SAMPLES_FILE)
    header = [h.strip() for h in rows[0]]
    for h in header:
        if h != IMAGE_COLUMN and h not in space.names:
            raise SceneError(f"is not a parameter; expected one of {list(space.names)}", file=SAMPLES_FILE,
                             column=h)
        if header.count(h) > 1:
            raise SceneError("appears twice in the header", file=SAMPLES_FILE, column=h)
    for h in (IMAGE_COLUMN,) + space.names:
        if h not in header:
            raise SceneError("is missing from the header", file=SAMPLES_FILE, column=h)
    order = [header.index(n) for n in space.names]
    numbers, files, values = [], [], []
    # data row r is the r-th line after the header, blank lines included, so it matches an editor
    for r, cells in enumerate(rows[1:], start=1):
        if not any(c.strip() for c in cells):
            continue
        if len(cells) > len(header):
            raise SceneError(f"has {len(cells)} cells but the header has {len(header)}",
                             file=SAMPLES_FILE, row=r)
        cells = [c.strip() for c in cells] + [""] * (len(header) - len(cells))
        if not cells[header.index(IMAGE_COLUMN)]:
            raise SceneError("is empty", file=SAMPLES_FILE, row=r, column=IMAGE_COLUMN)
        vec = []
        for k, j in enumerate(order):
            prm, cell = space.parameters[k], cells[j]
            where = dict(file=SAMPLES_FILE, row=r, column=prm.name)
            if not cell:
                raise SceneError("is empty", **where)
            try:
                v = float(cell)
            except ValueError:
                raise SceneError("is not a number", value=cell, **where) from None
            if not math.isfinite(v):
                raise SceneError("is not a finite number", value=cell, **where)
            closing = ")" if prm.periodic else "]"
            if v < prm.min or v > prm.max or (prm.periodic and v == prm.max):
                raise SceneError(f"is outside [{prm.min:g}, {prm.max:g}{closing}", value=cell, **where)
            vec.append(v)
        numbers.append(r)
        files.append(cells[header.index(IMAGE_COLUMN)])
        values.append(vec)
    params = np.array(values, dtype=np.float64).reshape(-1, len(space))
    tol = 1e-9 * space.span
    for i in range(1, len(params)):
        same = np.all(np.abs(space.delta(params[:i], params[i])) <= tol, axis=-1)
        if same.any():
            first = numbers[int(np.argmax(same))]
            shown = ", ".join(f"{n}={v:g}" for n, v in zip(space.names, params[i]))
            raise SceneError(f"has the same settings as row {first} ({shown})",
                             file=SAMPLES_FILE, row=numbers[i])
    return numbers, files, params


# -- images ----------------------------------------------------------------------------------
def _image_path(root: Path, rel: str, where: dict) -> Path:
    """The file a samples.csv path names, refusing paths that leave the scene folder."""
    if Path(rel).is_absolute() or rel.startswith(("/", "\\")):
        raise SceneError("is an absolute path; paths are relative to the scene folder", **where)
    path = (root / rel).resolve()  # follows symlinks, so a link pointing outside is caught too
    if not path.is_relative_to(root.resolve()):
        raise SceneError("points outside the scene folder", **where)
    if not path.is_file():
        raise SceneError(f"names no file in folder '{root}'", **where)
    return path


def _open_image(path: Path, where: dict, max_image_pixels: int) -> Image.Image:
    """Open, refuse oversized images from the header alone, then decode."""
    try:
        img = Image.open(path)
    except Image.DecompressionBombError as exc:
        raise SceneError(f"is too large to decode, max_image_pixels={max_image_pixels} ({exc})",
                         **where) from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise SceneError(f"is not a readable image ({exc})", **where) from None
    w, h = img.size
    if w * h > max_image_pixels:
        img.close()
        raise SceneError(f"is {w}x{h} = {w * h} pixels, above max_image_pixels={max_image_pixels}", **where)
    try:
        img.load()  # truncated files fail here
        return ImageOps.exif_transpose(img)  # photos may be stored rotated with an orientation tag
    except (OSError, ValueError, SyntaxError) as exc:
        img.close()
        raise SceneError(f"is not a readable image ({exc})", **where) from None


def native_channels(img: Image.Image) -> int:
    return 1 if img.mode in _GRAY_MODES or img.mode.startswith("I;16") else 3


def image_to_array(img: Image.Image, resolution: int | tuple[int, int], channels: int) -> np.ndarray:
    """(resolution, resolution, channels) float32 in [0, 1]; non-square images are squashed. A
    (width, height) pair resizes to that size instead."""
    size = (resolution, resolution) if isinstance(resolution, int) else tuple(resolution)
    lanczos = Image.Resampling.LANCZOS
    if native_channels(img) == 1 and img.mode not in ("1", "L", "LA", "La"):
        # 16/32-bit integer or float gray: resize in float so no precision is lost
        raw = np.asarray(img, dtype=np.float64)
        scale = 1.0 if img.mode == "F" else 65535.0  # PNG stores at most 16 bits per sample
        gray = Image.fromarray((raw / scale).astype(np.float32), mode="F").resize(size, lanczos)
        arr = np.clip(np.asarray(gray, dtype=np.float32), 0.0, 1.0)[..., None]  # Lanczos overshoots
        return np.repeat(arr, channels, axis=-1) if channels == 3 else arr
    if img.mode in ("P", "PA"):
        img = img.convert("RGBA")  # the palette may carry transparency, dropped below
    mode = "L" if channels == 1 else "RGB"  # RGBA and LA lose alpha; RGB to L uses ITU-R 601-2 luma
    arr = np.asarray(img.convert(mode).resize(size, lanczos), dtype=np.float32) / 255.0
    return arr.reshape(size[1], size[0], channels)


def full_size(width: int, height: int, resolution: int, max_size: int | None) -> tuple[int, int] | None:
    """The size (width, height) captures of width x height are kept at: their own, the long side
    capped at `max_size`; None when that is no larger than the model's square `resolution`."""
    if not max_size:
        return None
    scale = min(1.0, max_size / max(width, height))
    w, h = max(1, round(width * scale)), max(1, round(height * scale))
    return None if max(w, h) <= resolution else (w, h)


def load_scene(root: str | Path, resolution: int = 64, min_samples: int = 8, channels: int | None = None,
               *, max_image_pixels: int = 40_000_000, max_size: int | None = 1024) -> Scene:
    """Load a scene folder; every image is resized to resolution x resolution pixels. Captures larger
    than that are also kept at their own size (the first image's, aspect kept, long side capped at
    `max_size`; None keeps none) as `full`, for frames at full size.

    channels=None keeps the images' own channel count (all must agree); 1 or 3 converts.
    Non-square images are resized straight to the square (aspect ratio not kept), so crop first
    if that matters. Raises SceneError naming the file, row, column and value at fault.
    """
    if not isinstance(resolution, int) or resolution < 1:
        raise ValueError(f"resolution must be a positive number of pixels, got {resolution!r}")
    if channels not in (None, 1, 3):
        raise ValueError(f"channels must be None, 1 or 3, got {channels!r}")
    if not isinstance(min_samples, int) or min_samples < 1:
        raise ValueError(f"min_samples must be an integer >= 1, got {min_samples!r}")
    root = Path(root)
    name, space = load_spec(root)
    numbers, files, params = _read_samples(root, space)
    if len(files) < min_samples:
        raise SceneError(f"has {len(files)} samples, fewer than min_samples={min_samples}", file=SAMPLES_FILE)
    wheres = [dict(file=SAMPLES_FILE, row=r, column=IMAGE_COLUMN, value=f) for r, f in zip(numbers, files)]
    paths = [_image_path(root, f, w) for f, w in zip(files, wheres)]
    arrays, full, first, big = [], [], None, None
    for path, where in zip(paths, wheres):
        with _open_image(path, where, max_image_pixels) as img:
            found = native_channels(img)
            if first is None:
                first, want = where, channels or found
                big = full_size(img.width, img.height, resolution, max_size)
            elif channels is None and found != want:
                raise SceneError(f"has {found} channel(s) but {first['value']!r} (row {first['row']}) has "
                                 f"{want}; pass channels=1 or 3 to convert", **where)
            arrays.append(image_to_array(img, resolution, want))
            if big is not None:
                full.append(np.round(image_to_array(img, big, want) * 255.0).astype(np.uint8))
    images = np.stack(arrays).astype(np.float32, copy=False)
    return Scene(name=name, space=space, images=images, params=params, files=files, root=root,
                 full=np.stack(full) if full else None)


# -- writing ---------------------------------------------------------------------------------
def save_scene(root: str | Path, name: str, space: ParamSpace, images: np.ndarray, params: np.ndarray,
               *, image_dir: str = "images") -> Path:
    """Write images (N, H, W, C), C in {1, 3}, float in [0, 1], as an 8-bit PNG scene folder."""
    images = np.asarray(images, dtype=np.float64)
    params = np.asarray(params, dtype=np.float64)
    if images.ndim != 4 or images.shape[3] not in (1, 3):
        raise ValueError(f"images must have shape (N, H, W, C) with C in {{1, 3}}, got {images.shape}")
    if params.shape != (len(images), len(space)):
        raise ValueError(f"params must have shape {(len(images), len(space))}, got {params.shape}")
    if not np.all(np.isfinite(params)):
        raise ValueError("params must be finite numbers")
    # wrap only out-of-range periodic values so in-range ones are written bit for bit
    outside = space.periodic & ((params < space.lo) | (params >= space.hi))
    params = np.where(outside, space.wrap(params), params)
    low, high = params < space.lo, (params > space.hi) & ~space.periodic
    if np.any(low | high):
        i, k = np.argwhere(low | high)[0]
        raise ValueError(f"params[{i}, {k}] ({space.names[k]}) = {params[i, k]:g} is outside "
                         f"[{space.lo[k]:g}, {space.hi[k]:g}]")
    root = Path(root)
    (root / image_dir).mkdir(parents=True, exist_ok=True)
    (root / SPEC_FILE).write_text(json.dumps({"name": name, "parameters": space.to_list()}, indent=2) + "\n",
                                  encoding="utf-8")
    width = max(4, len(str(len(images) - 1)))
    pixels = np.round(np.clip(images, 0.0, 1.0) * 255.0).astype(np.uint8)
    with (root / SAMPLES_FILE).open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow((IMAGE_COLUMN,) + space.names)
        for i, (img, vec) in enumerate(zip(pixels, params)):
            rel = f"{image_dir}/{i:0{width}d}.png"
            Image.fromarray(img[..., 0] if img.shape[2] == 1 else img).save(root / rel)
            out.writerow([rel] + [repr(float(v)) for v in vec])  # repr round-trips a float exactly
    return root
