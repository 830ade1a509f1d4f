"""`geotween` command line. Exit codes: 0 ok, 2 bad input (message on stderr), 3 frames rejected
under --strict."""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING

from .cli_common import (
    EXIT_BAD_INPUT,
    EXIT_OK,
    EXIT_REJECTED,
    NO_REFINE_HELP,
    UsageError,
    add_global_options,
    add_output_options,
    check_size,
    configure_torch,
    output_options,
    registry_of,
)
from .cli_remote import add_commands

if TYPE_CHECKING:  # for the annotation only: the engine imports torch, which --help does not need
    from ..models.engine import Endpoint

LATENT_MAP = "latent_map.png"  # bank codes (PCA) with the route(s) drawn, beside the frames or report


def _registry(args):
    return registry_of(args)


def _print_json(obj) -> None:
    print(json.dumps(obj, indent=1, default=str))


# -- commands ---------------------------------------------------------------------------------
def cmd_render_demo(args) -> int:
    from ..models.render import write_demo

    if args.pairs < 0 or args.long_pairs < 0:
        raise UsageError(f"--pairs, --long-pairs: {args.pairs}, {args.long_pairs} not allowed; expected counts >= 0")
    scene_dir, truth_dir = write_demo(args.out, size=args.size, pairs=args.pairs, long_pairs=args.long_pairs,
                                      seed=args.seed, colour=args.colour)
    print(f"scene: {scene_dir}\ntruth: {truth_dir}")
    return EXIT_OK


def cmd_train(args) -> int:
    from .training import train_into_registry

    entry = train_into_registry(Path(args.scene), args.name, _registry(args), resolution=args.resolution,
                                latent_dim=args.latent_dim, steps=args.steps, budget=args.budget_seconds,
                                seed=args.seed, tau=args.tau, max_size=args.max_size or None)
    print(f"registered {entry.name}@{entry.version}")
    _print_json(entry.metrics)
    _warn_calibration(entry)
    return EXIT_OK


def _warn_calibration(entry) -> None:
    from .training import calibration_warning

    warning = calibration_warning(entry)
    if warning:
        print(f"geotween: warning: {entry.name}@{entry.version}: {warning}", file=sys.stderr)


UNPLACED = ("geotween: warning: an image end could not be placed among the captures (the frame made at the "
            "settings read for it does not match it), so no frame was judged and every one is rejected; give "
            "that end as settings, or as a captured image")


def refine_line(manifest) -> str:
    """Whether a model refines its frames from real training images (detail transfer, or frames made
    from the captures around each), and the held-out
    in-betweens behind that choice (decoded -> refined), from its bundle manifest (a Manifest)."""
    chosen = manifest.refine
    if not chosen.chosen:
        return "detail transfer off (no choice made at training time)"
    pair = chosen.on and chosen.config.mode == "pair"
    text = ("frames from the captures around each" if pair else "detail transfer") + (" on" if chosen.on else " off")
    if chosen.on:
        text += f" (flow {chosen.config.flow})"
    if chosen.holdout is not None:
        dec, ref = chosen.holdout.decoded, chosen.holdout.refined
        text += (f"; held-out in-betweens PSNR {dec.psnr:.2f} -> {ref.psnr:.2f} dB, "
                 f"SSIM {dec.ssim:.4f} -> {ref.ssim:.4f} when refined")
        if ref.detail is not None:
            text += f", {100 * ref.detail:.0f} % of pixels from real images"
    return text


def cmd_models(args) -> int:
    from ..models.bundle import read_manifest

    reg = _registry(args)
    rows = reg.list_models()
    if not rows:
        print(f"no models in {reg.root}")
    for row in rows:
        latest = reg.get(row.name)
        manifest = read_manifest(latest.path)
        fit = manifest.metrics.fit
        print(f"{row.name}@{latest.version}  versions {row.n_versions}  created {latest.created}  "
              f"holdout PSNR {fit.get('holdout_psnr', float('nan')):.2f} dB  "
              f"SSIM {fit.get('holdout_ssim', float('nan')):.4f}")
        print(f"  {refine_line(manifest)}")
        print(f"  {confidence_line(manifest)}")
    return EXIT_OK


def confidence_line(manifest) -> str:
    """What the model's confidence speaks about and how far it can be trusted, from its manifest."""
    c = manifest.calibration_summary()
    reach = c["ssim_quantiles"]
    reach_text = (f"; held-out geodesic SSIM p10 {reach['p10']:.3f}, p50 {reach['p50']:.3f}, p90 {reach['p90']:.3f}"
                  if reach else "")
    if c["kind"] == "none":
        return f"confidence: none -- {c['warning']}"
    head = f"confidence: P(SSIM >= {c['tau']:g}), {c['method']}"
    if c["kind"] == "fitted" and c["ece"] is not None:
        head += f", ECE {c['ece']:.3f}, AUROC {c['auroc']:.3f}"
    s = c["straight"]
    chord = ("" if s is None else "; straight route: one conservative rate" if s["kind"] == "bound"
             else f"; straight route: its own curve, ECE {s['ece']:.3f}, AUROC {s['auroc']:.3f}"
             if s["ece"] is not None else "; straight route: its own curve")
    return head + reach_text + chord + (f" -- warning: {c['warning']}" if c["warning"] else "")


def parse_end(text: str, engine) -> "Endpoint":
    """An end from the command line: an image path, or settings as name=value,name=value."""
    from PIL import Image

    from ..models.engine import Endpoint
    from ..models.scene import image_to_array, native_channels

    if "=" in text and not Path(text).exists():
        values = {}
        for part in text.split(","):
            name, sep, value = part.partition("=")
            if not sep or not name.strip():
                raise UsageError(f"end {text!r}: expected name=value pairs separated by commas")
            try:
                values[name.strip()] = float(value)
            except ValueError:
                raise UsageError(f"end {text!r}: value {value!r} of {name.strip()!r} is not a number") from None
        engine.space.vector(values)  # names every unknown, missing or out-of-range parameter
        return Endpoint(params=values)
    path = Path(text)
    if not path.is_file():
        raise UsageError(f"end {text!r}: no such image file, and not name=value settings")
    try:
        with Image.open(path) as img:
            img.load()
            native = native_channels(img)
            if native != engine.channels:
                raise UsageError(f"end {text!r}: image has {native} channel(s); model {engine.manifest.name!r} "
                                 f"expects {engine.channels}")
            return Endpoint(image=image_to_array(img, engine.resolution, engine.channels))
    except (OSError, SyntaxError) as exc:
        raise UsageError(f"end {text!r}: not a readable image ({exc})") from None


def _local_engine(args):
    from ..models.engine import Engine

    entry = _registry(args).get(args.name, args.version)
    return Engine.load(entry.path), entry


def cmd_between(args) -> int:
    if args.frames < 1:
        raise UsageError(f"--frames: {args.frames} is out of range; expected >= 1")
    if not 0.0 <= args.min_confidence <= 1.0:
        raise UsageError(f"--min-confidence: {args.min_confidence} is outside [0, 1]")
    size, fmt, quality = output_options(args)
    engine, entry = _local_engine(args)
    check_size(engine, size)
    start, end = parse_end(args.start, engine), parse_end(args.end, engine)
    answer = engine.between(start, end, frames=args.frames, route=args.route, min_confidence=args.min_confidence,
                            refine=not args.no_refine)
    from ..models.fullsize import sized
    from ..models.latent_map import engine_map_png
    from .answers import between_answer, frame_file, manifest_json, to_wire

    sized(engine, answer.frames, size)  # judged at the working size; the pictures at `size`, as the service does
    wire = between_answer(answer, entry.name, entry.version, fmt, quality)  # the files and fields it would send
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    files = []
    for f in wire.frames:
        name = frame_file("between", f.fields["index"], fmt) if f.accepted or args.keep_rejected else None
        if name:
            (out / name).write_bytes(f.png)
        files.append(name)
    engine_map_png(engine, [answer], out / LATENT_MAP,
                   title=f"{entry.name}@{entry.version}: bank codes and the {answer.route} route")
    # the ZIP answer's manifest (BetweenManifestOut), naming the latent map too
    (out / "manifest.json").write_text(manifest_json(to_wire(wire, files, latent_map=LATENT_MAP)))
    print(f"{entry.name}@{entry.version} {answer.route}: {answer.accepted} accepted, {answer.rejected} rejected "
          f"-> {out}")
    if answer.ends_placed is False:
        print(UNPLACED, file=sys.stderr)
    return EXIT_REJECTED if args.strict and answer.rejected else EXIT_OK


def cmd_eval(args) -> int:
    from ..models.evaluate import evaluate, format_table

    engine, entry = _local_engine(args)
    out = Path(args.out or f"eval-{entry.name}-{entry.version}")
    out.mkdir(parents=True, exist_ok=True)
    report = evaluate(engine, args.truth, min_confidence=args.min_confidence, sheet=out / "contact_sheet.png",
                      latent_map=out / LATENT_MAP, ends=args.ends)
    report.update({"model": entry.name, "version": entry.version})
    (out / "report.json").write_text(json.dumps(report, indent=1))
    print(format_table(report))
    print(f"report: {out / 'report.json'}  contact sheet: {out / 'contact_sheet.png'}  latent map: {out / LATENT_MAP}"
          f"  longest pair's route: {report['latent_map_long']}")
    return EXIT_OK


def cmd_demo(args) -> int:
    from ..models.render import write_demo
    from .training import train_into_registry

    out = Path(args.out or tempfile.mkdtemp(prefix="geotween-demo-"))
    print(f"1/3 rendering the demo scene (relief tile under a moving lamp) into {out}")
    scene_dir, truth_dir = write_demo(out)
    print("2/3 training the demo model (CPU)")
    entry = train_into_registry(scene_dir, "relief-tile", _registry(args), resolution=64, latent_dim=None,
                                steps=args.steps, budget=None, seed=0)
    m = entry.metrics
    print(f"registered {entry.name}@{entry.version}: held-out reconstruction {m['holdout_psnr']:.2f} dB, "
          f"SSIM {m['holdout_ssim']:.4f}, trained in {m['train_seconds']:.0f} s")
    print("3/3 in-betweens against the true renders")
    from ..models.engine import Engine
    from ..models.evaluate import evaluate, format_table

    engine = Engine.load(entry.path)
    report = evaluate(engine, truth_dir, sheet=out / "contact_sheet.png", latent_map=out / LATENT_MAP)
    (out / "report.json").write_text(json.dumps(report, indent=1))
    print(format_table(report))
    example = out / "between"
    # through the parser, so the example keeps every option `between` has, with its default
    args_between = build_parser().parse_args(
        ["between", entry.name, "lamp_azimuth=300,lamp_elevation=30", "lamp_azimuth=60,lamp_elevation=60",
         "--frames", "8", "--out", str(example), "--version", str(entry.version), "--keep-rejected"])
    args_between.registry = args.registry
    cmd_between(args_between)
    print(f"report: {out / 'report.json'}, contact sheet: {out / 'contact_sheet.png'}, latent maps: "
          f"{out / LATENT_MAP} and {report['latent_map_long']} (the longest pair), frames: {example}")
    print("frames are synthesized by a learned model, not captured")
    return EXIT_OK


# -- parser -----------------------------------------------------------------------------------
class _GlobalOptionsParser(argparse.ArgumentParser):
    """A verb's parser that also takes the global options, so `geotween train SCENE --name N
    --registry DIR` works as well as `geotween --registry DIR train ...`."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        add_global_options(self, after_verb=True)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="geotween", description="In-between frames along latent geodesics, "
                                "each with a calibrated confidence. Frames are synthesized, not captured.")
    add_global_options(p)
    sub = p.add_subparsers(dest="command", required=True, parser_class=_GlobalOptionsParser)

    s = sub.add_parser("demo", help="render the demo scene, train it, register it, show in-betweens")
    s.add_argument("--out", help="working folder (default: a new temporary folder)")
    s.add_argument("--steps", type=int, default=None, help="training steps (default: the full schedule)")
    s.set_defaults(func=cmd_demo)

    s = sub.add_parser("render-demo", help="write the demo training scene and its truth set")
    s.add_argument("out")
    s.add_argument("--size", type=int, default=64, help="pixels per side")
    s.add_argument("--pairs", type=int, default=90, help="truth pairs 2 to 6 grid steps apart")
    s.add_argument("--long-pairs", type=int, default=40,
                   help="long truth pairs: lamp azimuth 105 to 165 deg apart, and the whole elevation range")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--colour", action="store_true",
                   help="the colour tile: each feature its own RGB albedo (RGB PNGs)")
    s.set_defaults(func=cmd_render_demo)

    s = sub.add_parser("train", help="train a model on a scene folder and register it")
    s.add_argument("scene")
    s.add_argument("--name", required=True)
    s.add_argument("--resolution", type=int, default=64, help="pixels per side (power of two)")
    s.add_argument("--max-size", type=int, default=1024,
                   help="keep the captures at their own size, long side capped at this many pixels, for frames at "
                        "full size (0: keep none; default 1024)")
    s.add_argument("--latent-dim", type=int, default=None, help="default: parameters + periodic parameters")
    s.add_argument("--steps", type=int, default=None)
    s.add_argument("--budget-seconds", type=float, default=None, help="wall-clock cap on training")
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--tau", type=float, default=0.90,
                   help="the SSIM against the true view a frame must reach to count as faithful; the confidence "
                        "is the probability of that (default 0.90; lower it for scenes the model cannot "
                        "reproduce that closely)")
    s.set_defaults(func=cmd_train)

    s = sub.add_parser("between", help="frames between two images or settings (synthesized, not captured)")
    s.add_argument("name")
    s.add_argument("start", help="image path, or settings such as lamp_azimuth=30,lamp_elevation=40")
    s.add_argument("end", help="image path, or settings")
    s.add_argument("--frames", type=int, default=8, help="in-between frames, ends excluded")
    s.add_argument("--out", required=True, help="folder for the frames (PNG, or JPEG with --format jpeg) and "
                                                "manifest.json")
    s.add_argument("--route", choices=["geodesic", "straight"], default="geodesic")
    s.add_argument("--min-confidence", type=float, default=0.5, help="frames below it are rejected")
    s.add_argument("--keep-rejected", action="store_true", help="write rejected frames too (marked in the manifest)")
    s.add_argument("--strict", action="store_true", help="exit 3 when any frame is rejected")
    s.add_argument("--version", type=int, default=None)
    s.add_argument("--no-refine", action="store_true", help=NO_REFINE_HELP)
    add_output_options(s)
    s.set_defaults(func=cmd_between)

    s = sub.add_parser("eval", help="quality report against a truth set, with baselines")
    s.add_argument("name")
    s.add_argument("truth", help="truth folder (truth.json + PNGs), as render-demo writes")
    s.add_argument("--out", default=None, help="folder for report.json and contact_sheet.png")
    s.add_argument("--min-confidence", type=float, default=0.5)
    s.add_argument("--ends", choices=("image", "settings"), default="image",
                   help="ask for routes between the pairs' end images (placed by the model) or their true settings")
    s.add_argument("--version", type=int, default=None)
    s.set_defaults(func=cmd_eval)

    s = sub.add_parser("models", help="list the registry")
    s.set_defaults(func=cmd_models)
    add_commands(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    configure_torch(args.threads)
    from ..models.bundle import BundleError
    from ..models.scene import SceneError
    from .registry import RegistryError

    try:
        return args.func(args)
    except (SceneError, BundleError, RegistryError, UsageError, ValueError, LookupError) as exc:
        print(f"geotween: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT


if __name__ == "__main__":
    sys.exit(main())
