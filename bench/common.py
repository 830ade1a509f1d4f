"""Shared set-up for the benchmark scripts: the demo scene rendered once into a cache folder."""
from __future__ import annotations

import os
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CACHE = Path(os.environ.get("GEOTWEEN_BENCH_CACHE", ROOT / "bench" / ".cache"))


def demo_folders(size: int = 64, pairs: int = 90) -> tuple[Path, Path]:
    """(scene folder, truth folder) of the demo at `size` px with `pairs` truth pairs, rendered
    on first use into GEOTWEEN_BENCH_CACHE (default bench/.cache)."""
    from models.render import write_demo

    cache = Path(os.environ.get("GEOTWEEN_BENCH_CACHE", CACHE))
    out = cache / (f"demo-{size}" if pairs == 90 else f"demo-{size}-{pairs}")
    if not (out / "truth" / "truth.json").is_file():
        write_demo(out, size=size, pairs=pairs)
    return out / "scene", out / "truth"


def set_threads() -> None:
    """torch threads: GEOTWEEN_BENCH_THREADS, else all cores (at most 4)."""
    import torch

    torch.set_num_threads(int(os.environ.get("GEOTWEEN_BENCH_THREADS", 0)) or min(4, os.cpu_count() or 1))
