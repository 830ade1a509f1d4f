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
