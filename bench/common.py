"""Shared set-up for the benchmark scripts: the scenes, rendered once into a cache folder."""
from __future__ import annotations

import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CACHE = Path(os.environ.get("GEOTWEEN_BENCH_CACHE", ROOT / "bench" / ".cache"))


# grey relief tile, its colour variant, the photo window, the turntable and the camera move (each of the
# last two also with scattered samples; their truth pairs stay on the grid)
SCENES = ("demo", "colour", "photo", "turntable", "turntable-scattered", "camera", "camera-scattered")


def scene_folders(kind: str = "demo", size: int = 64, pairs: int = 90,
                  long_pairs: int | None = None) -> tuple[Path, Path]:
    """(scene folder, truth folder) of one scene at `size` px with `pairs` truth pairs and
    `long_pairs` long ones (None: the scene writer's default), written on first use into
    GEOTWEEN_BENCH_CACHE (default bench/.cache). "photo" is scikit-image's "coffee" photograph
    (it ships inside the scikit-image wheel) through the panning, zooming window; "camera" is its
    "astronaut" photograph (also in the wheel) under a camera that rolls and zooms; "turntable" is
    the rendered turntable. A "-scattered" kind trains on scattered settings."""
    from geotween.models.render import write_demo

    if kind not in SCENES:
        raise ValueError(f"scene kind {kind!r}: expected one of {SCENES}")
    cache = Path(os.environ.get("GEOTWEEN_BENCH_CACHE", CACHE))
    extra = {} if long_pairs is None else {"long_pairs": long_pairs}
    # the long count is in the name, so a cache written before truth sets had long pairs is not reused
    out = cache / f"{kind}-{size}-{pairs}-long{'default' if long_pairs is None else long_pairs}"
    if not (out / "truth" / "truth.json").is_file():
        scattered = kind.endswith("-scattered")
        if kind == "photo":
            from skimage.data import coffee

            from geotween.models.photo import write_photo_scene

            write_photo_scene(coffee(), out, size=size, pairs=pairs, **extra)
        elif kind.startswith("turntable"):
            from geotween.models.turntable import write_turntable_scene

            write_turntable_scene(out, size=size, pairs=pairs, scattered=scattered, **extra)
        elif kind.startswith("camera"):
            from skimage.data import astronaut

            from geotween.models.camera_move import write_camera_scene

            write_camera_scene(astronaut(), out, size=size, pairs=pairs, scattered=scattered, **extra)
        else:
            write_demo(out, size=size, pairs=pairs, colour=kind == "colour", **extra)
    return out / "scene", out / "truth"


def demo_folders(size: int = 64, pairs: int = 90) -> tuple[Path, Path]:
    """The grey demo scene's folders (`scene_folders("demo", ...)`)."""
    return scene_folders("demo", size, pairs)


def set_threads() -> None:
    """torch threads: GEOTWEEN_BENCH_THREADS, else all cores (at most 4)."""
    import torch

    torch.set_num_threads(int(os.environ.get("GEOTWEEN_BENCH_THREADS", 0)) or min(4, os.cpu_count() or 1))
