"""In-between quality on a scene's truth set, against baselines, with confidence calibration.

    python bench/quality.py [--scene KIND] [--resolution 64] [--steps N]
                            [--latent-dim D] [--w-ssim W] [--budget-seconds S] [--out DIR]

KIND is one of common.SCENES: demo, colour, photo, turntable, turntable-scattered, camera,
camera-scattered. Trains the scene's model (default settings unless told), with calibration, then
runs the eval report: cross-dissolve, optical-flow warping, nearest capture, straight route,
geodesic route (as served, refined when the model refines, plus the decoded frames before
refinement), the model's ceiling;
PSNR, SSIM, p10, pacing, confidence ECE / AUROC / confusion, all of it overall and per span bucket
(the truth set's short and long pairs); and route and 16-frame answer times.
"""
from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import numpy as np
from common import scene_folders, set_threads


def measure(resolution: int = 64, *, steps: int | None = None, budget_seconds: float | None = None,
            out: Path | None = None, pairs: int = 90, long_pairs: int | None = None, scene_kind: str = "demo",
            latent_dim: int | None = None, w_ssim: float = 0.0) -> dict:
    from geotween.models.engine import Endpoint, Engine
    from geotween.models.evaluate import evaluate
    from geotween.models.pipeline import train_bundle
    from geotween.models.scene import load_scene
    from geotween.models.train import TrainConfig, default_model_config

    scene_dir, truth_dir = scene_folders(scene_kind, resolution, pairs=pairs, long_pairs=long_pairs)
    scene = load_scene(scene_dir, resolution=resolution)
    out = Path(out or tempfile.mkdtemp(prefix="geotween-bench-"))
    mcfg = default_model_config(scene, latent_dim=latent_dim)
    cfg = TrainConfig(budget_seconds=budget_seconds, w_ssim=w_ssim)
    if steps is not None:
        cfg.steps = steps
    t0 = time.perf_counter()
    manifest = train_bundle(scene, out / "bundle", name=scene.name, model_config=mcfg, train_config=cfg,
                            progress=None)
    train_wall = time.perf_counter() - t0
    engine = Engine.load(out / "bundle")
    report = evaluate(engine, truth_dir, sheet=out / "contact_sheet.png")
    # scattered samples: the truth set's end images are grid views, none of them a capture, and an end the
    # model cannot place leaves its frames unjudged; the routes between the pairs' true settings show the
    # frames made from the captures apart from placing
    by_settings = (evaluate(engine, truth_dir, sheet_pairs=0, ends="settings")
                   if scene_kind.endswith("-scattered") else None)
    # timings on the demo bank
    rng = np.random.default_rng(0)
    ends = rng.integers(0, len(engine.bundle.codes), size=(50, 2))
    codes, params = engine.bundle.codes, engine.bundle.params
    t = time.perf_counter()
    for a, b in ends:
        engine.route(codes[a], params[a], codes[b], params[b]).codes_at(np.linspace(0, 1, 18)[1:-1])
    route_ms = (time.perf_counter() - t) / len(ends) * 1e3
    imgs = engine.bundle.images()
    # a 16-frame answer with image ends, side by side in one run: as served with no flows kept from
    # earlier answers ("cold": every frame's capture pair estimated afresh), first answers of a model
    # whose likely pairs were estimated in the background after its load, as the service does
    # ("loaded"), as served again with the flows kept ("warm"), and decoded only (refine false)
    from geotween.models.engine import ServingConfig

    cold = Engine.load(out / "bundle", ServingConfig(flow_cache_mb=0))
    loaded = Engine.load(out / "bundle")
    t = time.perf_counter()
    warmed_pairs = loaded.warm_flows()
    warm_load_s = time.perf_counter() - t
    ends = [(Endpoint(image=imgs[i]), Endpoint(image=imgs[-1 - i])) for i in range(min(30, len(imgs) // 2))]
    for a, b in ends:
        engine.between(a, b, frames=16)
    timed = {"cold": [], "loaded": [], "warm": [], "decoded": []}
    for a, b in ends:
        for key, eng, refine in (("cold", cold, True), ("loaded", loaded, True), ("warm", engine, True),
                                 ("decoded", cold, False)):
            t = time.perf_counter()
            eng.between(a, b, frames=16, refine=refine)
            timed[key].append((time.perf_counter() - t) * 1e3)
    times = timed["cold"]
    p50 = {k: float(np.median(v)) for k, v in timed.items()}
    cal = manifest.metrics.calibration
    summary = {"scene": scene_kind, "latent_dim": mcfg.latent_dim, "w_ssim": w_ssim, "resolution": resolution,
               "train_seconds_incl_calibration": round(train_wall, 1), "refine": manifest.refine.to_dict(),
               "fit": dict(manifest.metrics.fit),
               "calibration": {k: None if cal is None else getattr(cal, k)
                               for k in ("status", "rows", "ece", "auroc", "method")},
               "route": manifest.route.to_dict(),
               "graph": {"k": engine.graph.k, "pruned": engine.graph.pruned, "components": engine.graph.components,
                         "bridges": engine.graph.bridges},
               "route_ms_mean": round(route_ms, 3), "answer16_ms_p50": round(float(np.median(times)), 2),
               "answer16_ms_p99": round(float(np.percentile(times, 99)), 2),
               "answer16_p50_ms": {k: round(v, 2) for k, v in p50.items()},
               "answer16_ratio_to_decoded": {k: round(p50[k] / p50["decoded"], 2) for k in ("cold", "loaded", "warm")},
               "flows_at_load": {"pairs": warmed_pairs, "seconds": round(warm_load_s, 2),
                                 "mb": round(loaded.flow_cache.used / 2 ** 20, 1)},
               "report": report, "report_settings_ends": by_settings,
               "bundle": str(out / "bundle")}
    (out / "quality.json").write_text(json.dumps(summary, indent=1))
    return summary


def main() -> None:
    from common import SCENES

    from geotween.models.evaluate import format_table

    p = argparse.ArgumentParser()
    p.add_argument("--scene", choices=SCENES, default="demo")
    p.add_argument("--latent-dim", type=int, default=None, help="default: parameters + periodic parameters")
    p.add_argument("--w-ssim", type=float, default=0.0, help="weight of the SSIM term beside the pixel loss")
    p.add_argument("--resolution", type=int, default=64)
    p.add_argument("--steps", type=int, default=None)
    p.add_argument("--budget-seconds", type=float, default=None)
    p.add_argument("--out", default=None)
    args = p.parse_args()
    set_threads()
    summary = measure(args.resolution, steps=args.steps, budget_seconds=args.budget_seconds,
                      out=Path(args.out) if args.out else None, scene_kind=args.scene,
                      latent_dim=args.latent_dim, w_ssim=args.w_ssim)
    print(format_table(summary["report"]))
    print(json.dumps({k: v for k, v in summary.items() if k != "report"}, indent=1))


if __name__ == "__main__":
    main()
