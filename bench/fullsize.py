"""Frames at full size: a model at its working size (64 px), its captures kept at SIZE px, scored
against true SIZE px views, beside what a user could do without it at that size.

    python bench/fullsize.py KIND [--bundle BUNDLE_DIR] [--size 512] [--pairs 20] [--out DIR]

Without --bundle (as bench/run measures) the model is trained here from scene KIND's SIZE px
captures, as `geotween train` does with them (`train_full`). With --bundle, a bundle bench/quality.py
trained on scene KIND at the working size gets the SIZE px render's captures kept beside its own
(same weights, same choices; quicker, but its working images are a 64 px render, not the large one
brought down). On a SIZE px truth set (image ends) every frame is scored at the working size and at
SIZE against its true view: the geodesic as served at full size, the same frames only enlarged
(bicubic), a cross-dissolve and dense flow (Farneback) between the full-size ends, and the nearest
capture at full size. PSNR and SSIM from scikit-image (Gaussian SSIM, sigma 1.5).
"""
from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import numpy as np
from common import scene_folders, set_threads


def _ssim(a: np.ndarray, b: np.ndarray) -> float:
    from skimage.metrics import structural_similarity

    # scikit-image's SSIM with the Gaussian window of Wang et al. 2004 (sigma 1.5)
    return float(structural_similarity(a, b, channel_axis=2, data_range=1.0, gaussian_weights=True, sigma=1.5,
                                       use_sample_covariance=False))


def _psnr(a: np.ndarray, b: np.ndarray) -> float:
    from skimage.metrics import peak_signal_noise_ratio

    # capped at 60 dB: a frame equal to its truth (at a capture) would count as infinitely good
    return min(60.0, float(peak_signal_noise_ratio(b, a, data_range=1.0)))


def with_full_captures(bundle: Path, scene_dir: Path, out: Path) -> Path:
    """`bundle` rewritten into `out` with the captures of `scene_dir` (the same settings, larger) kept
    at full size: each bank and held-out sample matched to the scene's image at its settings."""
    from geotween.models.bundle import load_bundle, save_bundle
    from geotween.models.scene import load_scene

    b = load_bundle(bundle)
    scene = load_scene(scene_dir, resolution=b.manifest.model_config.resolution, max_size=4096)
    if scene.full is None:
        raise ValueError(f"{scene_dir}: its images are no larger than the model's")
    arrays = {k: b.arrays[k] for k in ("codes", "params", "holdout_codes", "holdout_params")}
    for prefix in ("", "holdout_"):
        arrays[prefix + "images"] = b.images(prefix + "images")
        want = b.arrays[prefix + "params"]
        match = [int(np.argmin(np.abs(scene.params - p).sum(axis=1))) for p in want]
        if not np.allclose(scene.params[match], want):
            raise ValueError(f"{scene_dir}: some {prefix or 'bank '}settings have no image in the scene")
        arrays[prefix + "full_images"] = scene.full[match]
    save_bundle(out, b.manifest, b.model, arrays)
    return out


def train_full(scene_dir: Path, size: int, out: Path, *, resolution: int = 64, steps: int | None = None) -> Path:
    """A model trained at `resolution` px from the SIZE px captures of `scene_dir`, kept at full size in its bundle,
    as `geotween train` does with such captures (the working images are the full ones brought down:
    a bundle trained on a 64 px render of the scene would be judged against another picture, since a
    renderer at 64 px does not draw its scene as the 512 px render brought down)."""
    from geotween.models.pipeline import train_bundle
    from geotween.models.scene import load_scene
    from geotween.models.train import TrainConfig, default_model_config

    scene = load_scene(scene_dir, resolution=resolution, max_size=size)
    cfg = TrainConfig()
    if steps is not None:
        cfg.steps = steps
    train_bundle(scene, out / "trained", name=scene.name, model_config=default_model_config(scene), train_config=cfg,
                 progress=None)
    return out / "trained"


def measure(bundle: str | Path | None, kind: str, *, size: int = 512, pairs: int = 20, long_pairs: int = 6,
            out: str | Path | None = None, steps: int | None = None, resolution: int = 64) -> dict:
    from geotween.models import flow as lflow
    from geotween.models import fullsize as lfull
    from geotween.models.engine import Endpoint, Engine
    from geotween.models.evaluate import load_truth, nearest_captures

    set_threads()
    scene_dir, truth_dir = scene_folders(kind, size=size, pairs=pairs, long_pairs=long_pairs)
    if out is None:
        out = (Path(bundle).parent if bundle is not None else Path.cwd()) / f"fullsize-{kind}-{size}"
    out = Path(out)
    if bundle is None:  # trained here from the full-size captures (train_full)
        t0 = time.perf_counter()
        full_bundle = train_full(scene_dir, size, out, resolution=resolution, steps=steps)
        train_s = time.perf_counter() - t0
    else:
        full_bundle, train_s = with_full_captures(Path(bundle), scene_dir, out / "bundle"), None
    engine = Engine.load(full_bundle)
    res, ch = engine.resolution, engine.channels
    small, big = load_truth(truth_dir, res, ch), load_truth(truth_dir, size, ch)
    scores = {m: {"psnr": [], "ssim": []} for m in ("geodesic_working", "geodesic_full", "geodesic_enlarged",
                                                    "dissolve", "flow", "nearest")}
    timing, away = [], []
    for s_pair, b_pair in zip(small, big):
        t = s_pair["t"]
        ans = engine.between(Endpoint(image=s_pair["start_image"]), Endpoint(image=s_pair["end_image"]),
                             frames=len(t))
        working = np.stack([f.image for f in ans.frames])
        clock = time.perf_counter()
        full = np.stack([f.image for f in lfull.sized(engine, ans.frames, "full")])
        timing.append(time.perf_counter() - clock)
        want = np.array([engine.space.vector(p) for p in b_pair["truth_params"]])
        a, z = b_pair["start_image"], b_pair["end_image"]
        near = nearest_captures(engine.space, engine.scale, engine.capture_params, want)
        # frames at a capture's own settings, where the nearest capture is the truth itself, are told apart
        away += list(engine.space.distance(want, engine.capture_params[near], engine.scale) > 0.05)
        outs = {"geodesic_full": full, "geodesic_enlarged": lfull.resize(working, size, size),
                "dissolve": (1 - t)[:, None, None, None] * a + t[:, None, None, None] * z,
                "flow": lflow.tween(a, z, t), "nearest": engine.captures(near, full=True)}
        for k in range(len(t)):
            scores["geodesic_working"]["psnr"].append(_psnr(working[k], s_pair["truth"][k]))
            scores["geodesic_working"]["ssim"].append(_ssim(working[k], s_pair["truth"][k]))
            for m, frames in outs.items():
                scores[m]["psnr"].append(_psnr(frames[k], b_pair["truth"][k]))
                scores[m]["ssim"].append(_ssim(frames[k], b_pair["truth"][k]))
    away = np.array(away, dtype=bool)
    table = {m: {"psnr": round(float(np.mean(v["psnr"])), 2), "ssim": round(float(np.mean(v["ssim"])), 4),
                 "psnr_between_captures": round(float(np.mean(np.array(v["psnr"])[away])), 2),
                 "ssim_between_captures": round(float(np.mean(np.array(v["ssim"])[away])), 4)}
             for m, v in scores.items()}
    summary = {"scene": kind, "size": size, "working": res, "pairs": len(small), "frames": len(scores["flow"]["ssim"]),
               "frames_between_captures": int(away.sum()),
               "methods": table, "enlarge_ms_per_frame": round(1e3 * sum(timing) / max(1, len(scores["flow"]["ssim"])), 1),
               "trained_here_s": None if train_s is None else round(train_s, 1), "bundle": str(full_bundle)}
    (out / "fullsize.json").write_text(json.dumps(summary, indent=1))
    return summary


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("kind")
    p.add_argument("--bundle", default=None, help="a bundle trained on KIND at the working size (default: train one)")
    p.add_argument("--size", type=int, default=512)
    p.add_argument("--pairs", type=int, default=20)
    p.add_argument("--out", default=None)
    args = p.parse_args()
    out = args.out or (None if args.bundle else f"fullsize-{args.kind}-{args.size}")
    print(json.dumps(measure(args.bundle, args.kind, size=args.size, pairs=args.pairs, out=out), indent=1))



def _random_ends(space, rng, frames: int = 16, **extra) -> dict:
    def one():
        return {n: float(rng.uniform(lo, hi)) for n, lo, hi in zip(space.names, space.lo, space.hi)}
    return {"start": {"params": one()}, "end": {"params": one()}, "frames": frames, **extra}


def throughput(bundle: str | Path, *, port: int = 8767, seconds: float = 5.0, clients: int = 4) -> dict:
    """Full-size frames per second: 16-frame answers (settings ends, PNG) from `clients` keep-alive
    clients through `geotween serve`, against the bare limit in this process (the same answer made
    without HTTP: bench/latency.py's answer_in_process), side by side in one run."""
    import threading

    import httpx
    from latency import answer_in_process, serving

    from geotween.models.engine import Engine

    engine = Engine.load(bundle)
    rng = np.random.default_rng(3)
    bodies = [_random_ends(engine.space, rng) for _ in range(12)]

    def bare_once(body):
        answer_in_process(engine, body)

    for body in bodies[:2]:
        bare_once(body)
    t0, n = time.perf_counter(), 0
    while time.perf_counter() - t0 < seconds:
        bare_once(bodies[n % len(bodies)])
        n += 1
    bare = 16 * n / (time.perf_counter() - t0)
    done, errors, lock = [0], [0], threading.Lock()
    with serving({"full": Path(bundle)}, port) as (url, _):
        with httpx.Client(base_url=url, timeout=60) as c:
            for body in bodies[:3]:
                c.post("/v1/models/full/between", json=body).raise_for_status()
        stop = time.time() + seconds

        def client(seed: int) -> None:
            r = np.random.default_rng(seed)
            with httpx.Client(base_url=url, timeout=60) as c:
                while time.time() < stop:
                    resp = c.post("/v1/models/full/between", json=_random_ends(engine.space, r))
                    with lock:
                        done[0] += 16 if resp.status_code == 200 else 0
                        errors[0] += resp.status_code != 200

        t1 = time.perf_counter()
        threads = [threading.Thread(target=client, args=(50 + k,)) for k in range(clients)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
        served = done[0] / (time.perf_counter() - t1)
    return {"clients": clients, "frames_per_s": round(served, 1), "bare_frames_per_s": round(bare, 1),
            "ratio_to_bare": round(served / bare, 3), "errors": errors[0]}


def memory(full_bundle: str | Path, small_bundle: str | Path, answers: int = 10) -> dict:
    """Peak resident memory (MB) of a process that loads a bundle and makes `answers` 16-frame
    answers at full size, for the bundle with full-size captures and the same model without them."""
    import subprocess
    import sys

    script = ("import sys, numpy as np\n"
              "from geotween.models.engine import Endpoint, Engine\n"
              "from geotween.models import fullsize as lfull\n"
              "e = Engine.load(sys.argv[1]); r = np.random.default_rng(0)\n"
              "one = lambda: {n: float(r.uniform(lo, hi)) for n, lo, hi in zip(e.space.names, e.space.lo, e.space.hi)}\n"
              f"for _ in range({answers}):\n"
              "    a = e.between(Endpoint(params=one()), Endpoint(params=one()), frames=16)\n"
              "    lfull.sized(e, a.frames, 'full')\n"
              # VmHWM, not ru_maxrss: a child's ru_maxrss starts from its parent's at fork
              "print([int(l.split()[1]) for l in open('/proc/self/status') if l.startswith('VmHWM')][0] / 1024)\n")
    peak = {}
    for key, path in (("full", full_bundle), ("working", small_bundle)):
        out = subprocess.run([sys.executable, "-c", script, str(path)], capture_output=True, text=True, check=True)
        peak[key] = round(float(out.stdout.strip().splitlines()[-1]), 1)
    return {"peak_rss_mb": peak, "extra_mb": round(peak["full"] - peak["working"], 1)}


if __name__ == "__main__":
    main()
