"""What the `geotween` command's modules share: exit codes, the usage error, the global options
and the torch thread setting."""
from __future__ import annotations

import argparse
import os

EXIT_OK, EXIT_BAD_INPUT, EXIT_REJECTED = 0, 2, 3

NO_REFINE_HELP = ("skip detail transfer on a model that refines: the decoded frames only, faster and softer, "
                  "scored by the confidence fitted on decoded frames")


class UsageError(ValueError):
    """Bad command-line input that no lower layer reports."""


def add_global_options(parser: argparse.ArgumentParser, *, after_verb: bool = False) -> None:
    """--registry and --threads, accepted before or after the verb. After the verb they default to
    SUPPRESS, so a verb's parser leaves a value given before the verb as it is."""
    default = argparse.SUPPRESS if after_verb else None
    parser.add_argument("--registry", default=default,
                        help="registry folder (else $GEOTWEEN_REGISTRY, else ~/.local/share/geotween/registry)")
    parser.add_argument("--threads", type=int, default=default,
                        help="torch threads (default: cores, at most 4)")


def registry_of(args):
    """The registry the service would use: --registry (else $GEOTWEEN_REGISTRY), and the shared index
    and object store when GEOTWEEN_DATABASE_URL / GEOTWEEN_STORE_URL say so."""
    from .settings import Settings

    return Settings.load(**({"registry": args.registry} if args.registry else {})).open_registry()


def configure_torch(threads: int | None = None) -> None:
    """Set torch's intra-op threads once per process (default: all cores, at most 4)."""
    import torch

    torch.set_num_threads(threads or min(4, os.cpu_count() or 1))


def size_arg(text: str) -> str | int:
    """--size as given: 'working', 'full' or a long side in pixels (its range is the model's to say)."""
    if text in ("working", "full"):
        return text
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not allowed; expected working, full or a long side in "
                                         f"pixels") from None


def add_output_options(parser: argparse.ArgumentParser) -> None:
    """--size, --format and --quality of the frames a command writes. They default to None, so a
    service asked with --url applies its own defaults (the same: full, png, 90) and one from before
    frames at full size is not sent fields it does not know."""
    parser.add_argument("--size", type=size_arg, default=None,
                        help="the frames' size: working (the model's resolution), full (the captures' own size, "
                             "kept at training up to train --max-size; the model's resolution when it kept none) "
                             "or a long side in pixels up to full's (default full)")
    parser.add_argument("--format", choices=["png", "jpeg"], default=None,
                        help="png (lossless; the default) or jpeg (smaller at full size; lossy; files .jpg)")
    parser.add_argument("--quality", type=int, default=None, help="JPEG quality, 1 to 100 (default 90)")


def output_options(args) -> tuple[str | int, str, int]:
    """(size, format, quality) from --size, --format, --quality, with their defaults; UsageError for
    a quality out of range or given without --format jpeg."""
    if args.quality is not None:
        if not 1 <= args.quality <= 100:
            raise UsageError(f"--quality: {args.quality} is out of range; allowed 1 to 100")
        if args.format != "jpeg":
            raise UsageError("--quality: only --format jpeg has a quality; PNG frames are lossless")
    size = "full" if args.size is None else args.size
    return size, args.format or "png", 90 if args.quality is None else args.quality


def check_size(engine, size: str | int) -> tuple[int, int]:
    """(width, height) of `engine`'s frames at `size`; UsageError for a size the model cannot make."""
    from ..models.fullsize import captures_size, frame_size

    try:
        return frame_size(size, engine.resolution, captures_size(engine))
    except ValueError as exc:
        raise UsageError(str(exc)) from None  # names `size`, the value and the model's range
