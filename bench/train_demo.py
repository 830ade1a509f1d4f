"""Demo model: training time, held-out reconstruction, and what the collinearity term buys.

    python bench/train_demo.py [--resolution 64] [--steps N] [--skip-ablation]

Prints one JSON line per run: default settings, and the same model trained without the
collinearity term (w_collinear = 0), with the triplet-loss ratio between them, over all triplets
and over those that do not move along the periodic azimuth. Triplets that do keep a floor no
model can remove (a closed loop cannot be straight): the floor printed is the triplet loss of the
exact isometric embedding of the settings, a circle per periodic parameter and a line per other
one, one sample spacing per code unit.
"""
from __future__ import annotations

import argparse
import json

from common import demo_folders, set_threads


def run(scene, steps: int | None, **overrides) -> dict:
    from geotween.models.train import TrainConfig, train

    cfg = TrainConfig(**overrides)
    if steps is not None:
        cfg.steps = steps
    res = train(scene, train_config=cfg, progress=None)
    return res.metrics


def cylinder_floor(scene) -> float:
    """Triplet loss of the settings' exact isometric embedding over the training triplets."""
    import numpy as np
    import torch

    from geotween.models import losses
    from geotween.models.spacing import balanced_spacing
    from geotween.models.train import TrainConfig, split_holdout
    from geotween.models.triplets import mine_triplets

    cfg, space = TrainConfig(), scene.space
    train_idx, _ = split_holdout(len(scene.params), cfg.holdout, cfg.seed)
    params, scale = scene.params[train_idx], balanced_spacing(space, scene.params, scene.images)
    trip = mine_triplets(params, space, scale=scale, span=cfg.triplet_span, tolerance=cfg.triplet_tolerance)
    cols = []
    for j in range(params.shape[1]):
        x = (params[:, j] - space.lo[j]) / scale[j]  # spacing units
        if space.periodic[j]:
            r = (space.span[j] / scale[j]) / (2 * np.pi)  # circumference: the loop's sample count
            cols += [r * np.cos(x / r), r * np.sin(x / r)]
        else:
            cols.append(x)
    z = torch.from_numpy(np.stack(cols, 1).astype(np.float32))
    a = torch.from_numpy(trip.a.astype(np.float32))
    return round(float(losses.collinearity(z[trip.s], z[trip.m], z[trip.t], a)), 6)


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--resolution", type=int, default=64)
    p.add_argument("--steps", type=int, default=None)
    p.add_argument("--skip-ablation", action="store_true")
    p.add_argument("--only-ablation", action="store_true", help="train only the no-collinearity model")
    args = p.parse_args()
    set_threads()
    from geotween.models.scene import load_scene

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
    out = {"triplet_loss_ratio": round(plain["collinearity"] / shaped["collinearity"], 2),
           "holdout_psnr_change_db": round(shaped["holdout_psnr"] - plain["holdout_psnr"], 3),
           "isometric_cylinder_triplet_loss": cylinder_floor(scene)}
    if shaped.get("collinearity_other"):
        out["triplet_loss_ratio_off_the_loop"] = round(plain["collinearity_other"] / shaped["collinearity_other"], 2)
    print(json.dumps(out))


if __name__ == "__main__":
    main()
