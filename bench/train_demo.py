"""Demo model: training time, held-out reconstruction, and what the collinearity term buys.

    python bench/train_demo.py [--resolution 64] [--steps N] [--skip-ablation]

Prints one JSON line per run: default settings, and the same model trained without the
collinearity term (w_collinear = 0), with the triplet-loss ratio between them.
"""
from __future__ import annotations

import argparse
import json

from common import demo_folders, set_threads


def run(scene, steps: int | None, **overrides) -> dict:
    from models.train import TrainConfig, train

    cfg = TrainConfig(**overrides)
    if steps is not None:
        cfg.steps = steps
    res = train(scene, train_config=cfg, progress=None)
    return res.metrics


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--resolution", type=int, default=64)
    p.add_argument("--steps", type=int, default=None)
    p.add_argument("--skip-ablation", action="store_true")
    p.add_argument("--only-ablation", action="store_true", help="train only the no-collinearity model")
    args = p.parse_args()
    set_threads()
    from models.scene import load_scene

    scene_dir, _ = demo_folders(args.resolution)
    scene = load_scene(scene_dir, resolution=args.resolution)
    if not args.only_ablation:
        shaped = run(scene, args.steps)
        print(json.dumps({"run": "default", "resolution": args.resolution, **shaped}), flush=True)
    if args.skip_ablation:
        return
    plain = run(scene, args.steps, w_collinear=0.0)
    print(json.dumps({"run": "no-collinearity", "resolution": args.resolution, **plain}), flush=True)
    if args.only_ablation:
        return
    print(json.dumps({"triplet_loss_ratio": round(plain["collinearity"] / shaped["collinearity"], 2),
                      "holdout_psnr_change_db": round(shaped["holdout_psnr"] - plain["holdout_psnr"], 3)}))


if __name__ == "__main__":
    main()
