"""`geotween` command line. Exit codes: 0 ok, 2 bad input (message on stderr), 3 frames rejected
under --strict."""
from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path

EXIT_OK, EXIT_BAD_INPUT, EXIT_REJECTED = 0, 2, 3


class UsageError(ValueError):
    """Bad command-line input that no lower layer reports."""


def configure_torch(threads: int | None = None) -> None:
    """Set torch's intra-op threads once per process (default: all cores, at most 4)."""
    import torch

    torch.set_num_threads(threads or min(4, os.cpu_count() or 1))


def _registry(args):
    from .registry import Registry

    return Registry.open(args.registry)


def _print_json(obj) -> None:
    print(json.dumps(obj, indent=1, default=str))


# -- commands ---------------------------------------------------------------------------------
def cmd_render_demo(args) -> int:
    from models.render import write_demo

    scene_dir, truth_dir = write_demo(args.out, size=args.size, pairs=args.pairs, seed=args.seed)
    print(f"scene: {scene_dir}\ntruth: {truth_dir}")
    return EXIT_OK


def train_into_registry(scene_dir: Path, name: str, registry, *, resolution: int, latent_dim: int | None,
                        steps: int | None, budget: float | None, seed: int, quiet: bool = False,
                        on_step=None):
    """Load a scene folder, train, and publish the bundle; returns the ModelVersion."""
    from models.pipeline import train_bundle
    from models.scene import load_scene
    from models.train import TrainConfig, default_model_config
    from .registry import check_name

    check_name(name)  # fail before minutes of training, not after
    scene = load_scene(scene_dir, resolution=resolution)
    tcfg = TrainConfig(seed=seed, budget_seconds=budget)
    if steps is not None:
        tcfg.steps = steps
    mcfg = default_model_config(scene, latent_dim=latent_dim)
    progress = None if quiet else sys.stderr
    return registry.publish(name, lambda folder: train_bundle(
        scene, folder, name=name, model_config=mcfg, train_config=tcfg, progress=progress,
        on_step=on_step))


def cmd_train(args) -> int:
    entry = train_into_registry(Path(args.scene), args.name, _registry(args), resolution=args.resolution,
                                latent_dim=args.latent_dim, steps=args.steps, budget=args.budget_seconds,
                                seed=args.seed)
    print(f"registered {entry.name}@{entry.version}")
    _print_json(entry.metrics)
    return EXIT_OK


def cmd_models(args) -> int:
    reg = _registry(args)
    rows = reg.list_models()
    if not rows:
        print(f"no models in {reg.root}")
    for row in rows:
        latest = reg.get(row.name)
        m = latest.metrics
        print(f"{row.name}@{latest.version}  versions {row.n_versions}  created {latest.created}  "
              f"holdout PSNR {m.get('holdout_psnr', float('nan')):.2f} dB  "
              f"SSIM {m.get('holdout_ssim', float('nan')):.4f}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from models.render import write_demo

    out = Path(args.out or tempfile.mkdtemp(prefix="geotween-demo-"))
    print(f"1/2 rendering the demo scene (relief tile under a moving lamp) into {out}")
    scene_dir, truth_dir = write_demo(out)
    print("2/2 training the demo model (CPU)")
    entry = train_into_registry(scene_dir, "relief-tile", _registry(args), resolution=64, latent_dim=None,
                                steps=args.steps, budget=None, seed=0)
    print(f"registered {entry.name}@{entry.version}")
    _print_json({k: v for k, v in entry.metrics.items() if k != "confidence"})
    return EXIT_OK


# -- parser -----------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="geotween", description="In-between frames along latent geodesics, "
                                "each with a calibrated confidence. Frames are synthesized, not captured.")
    p.add_argument("--registry", help="registry folder (else $GEOTWEEN_REGISTRY, else ~/.local/share/geotween/registry)")
    p.add_argument("--threads", type=int, default=None, help="torch threads (default: cores, at most 4)")
    sub = p.add_subparsers(dest="command", required=True)

    s = sub.add_parser("demo", help="render the demo scene, train it, register it, show in-betweens")
    s.add_argument("--out", help="working folder (default: a new temporary folder)")
    s.add_argument("--steps", type=int, default=None, help="training steps (default: the full schedule)")
    s.set_defaults(func=cmd_demo)

    s = sub.add_parser("render-demo", help="write the demo training scene and its truth set")
    s.add_argument("out")
    s.add_argument("--size", type=int, default=64, help="pixels per side")
    s.add_argument("--pairs", type=int, default=90, help="truth pairs")
    s.add_argument("--seed", type=int, default=0)
    s.set_defaults(func=cmd_render_demo)

    s = sub.add_parser("train", help="train a model on a scene folder and register it")
    s.add_argument("scene")
    s.add_argument("--name", required=True)
    s.add_argument("--resolution", type=int, default=64, help="pixels per side (power of two)")
    s.add_argument("--latent-dim", type=int, default=None, help="default: parameters + periodic parameters")
    s.add_argument("--steps", type=int, default=None)
    s.add_argument("--budget-seconds", type=float, default=None, help="wall-clock cap on training")
    s.add_argument("--seed", type=int, default=0)
    s.set_defaults(func=cmd_train)

    s = sub.add_parser("models", help="list the registry")
    s.set_defaults(func=cmd_models)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    configure_torch(args.threads)
    from models.bundle import BundleError
    from models.scene import SceneError
    from .registry import RegistryError

    try:
        return args.func(args)
    except (SceneError, BundleError, RegistryError, UsageError, ValueError, LookupError) as exc:
        print(f"geotween: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
