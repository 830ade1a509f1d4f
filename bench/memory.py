"""Resident memory of the service: with the demo model loaded, and with a large bank added.

    python bench/memory.py BUNDLE_DIR [--bank 100000] [--port 8766]

A `geotween serve` process starts over a temporary registry. RSS (VmRSS) and its peak (VmHWM)
are read from /proc after the process is ready, after one between request on the demo model
(model and graph loaded), and after one request on a second model whose bank holds --bank codes.
That bank is made from the demo model: settings drawn uniformly over the scene's box, their codes
from the model's settings-to-code head (near the learned manifold), and each sample's image
decoded from its code (the pixels only feed the graph's pruning test).
"""
from __future__ import annotations

import argparse
import json
import shutil
import tempfile
from pathlib import Path

import httpx
import numpy as np
import torch
from common import set_threads
from latency import _ends, serving


def _status_kb(pid: int, key: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1])
    raise KeyError(key)


def large_bank(bundle: Path, out: Path, size: int, seed: int = 0) -> Path:
    """A copy of `bundle` whose bank holds `size` samples on the demo model's manifold."""
    from geotween.models.bundle import BANK, load_bundle
    from geotween.models.engine import Engine

    engine = Engine.load(bundle)
    b = engine.bundle
    rng = np.random.default_rng(seed)
    lo, hi = b.space.lo, b.space.hi
    params = lo + rng.uniform(size=(size, len(lo))) * (hi - lo)
    with torch.inference_mode():
        codes = engine.model.to_code(torch.as_tensor(b.space.features(params), dtype=torch.float32)).double().numpy()
    pixels = np.concatenate([np.round(engine.decode(codes[i:i + 512]) * 255).astype(np.uint8)
                             for i in range(0, size, 512)])
    shutil.copytree(bundle, out, dirs_exist_ok=True)
    arrays = {k: v for k, v in b.arrays.items()}
    arrays.update(codes=codes, params=params, images=pixels, holdout_images=b.pixels("holdout_images"))
    np.savez(out / BANK, **arrays)
    manifest = json.loads((out / "manifest.json").read_text())
    manifest["bank_size"] = size
    (out / "manifest.json").write_text(json.dumps(manifest, indent=1))
    load_bundle(out)  # it must load
    return out


def measure(bundle: Path, *, bank: int = 100_000, port: int = 8766) -> dict:
    work = Path(tempfile.mkdtemp(prefix="geotween-mem-"))
    try:
        big = large_bank(bundle, work / "big", bank)
        out = {"bank_codes": bank}
        with serving({"demo": bundle, "big": big}, port) as (url, proc):
            out["ready_rss_mb"] = round(_status_kb(proc.pid, "VmRSS") / 1024, 1)
            rng = np.random.default_rng(0)
            with httpx.Client(base_url=url, timeout=300) as c:
                for _ in range(3):
                    c.post("/v1/models/demo/between", json=_ends(rng)).raise_for_status()
                out["demo_rss_mb"] = round(_status_kb(proc.pid, "VmRSS") / 1024, 1)
                for _ in range(3):
                    c.post("/v1/models/big/between", json=_ends(rng)).raise_for_status()
                out["with_big_bank_rss_mb"] = round(_status_kb(proc.pid, "VmRSS") / 1024, 1)
                out["peak_rss_mb"] = round(_status_kb(proc.pid, "VmHWM") / 1024, 1)
        out["big_bank_adds_mb"] = round(out["with_big_bank_rss_mb"] - out["demo_rss_mb"], 1)
        return out
    finally:
        shutil.rmtree(work, ignore_errors=True)


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("bundle")
    p.add_argument("--bank", type=int, default=100_000)
    p.add_argument("--port", type=int, default=8766)
    args = p.parse_args()
    set_threads()
    print(json.dumps(measure(Path(args.bundle), bank=args.bank, port=args.port), indent=1))


if __name__ == "__main__":
    main()
