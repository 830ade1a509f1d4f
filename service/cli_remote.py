"""`geotween serve` and `geotween fill`, registered into the CLI by `add_commands(subparsers)`.

`fill NAME TARGETS.csv --out DIR` answers one frame per CSV row (header = parameter names) with
the local engine from the registry, or with a running service when --url is given; it writes the
accepted frames at --size as PNG (target_0001.png, ...) or, with --format jpeg, JPEG (target_0001.jpg,
...) plus report.csv and report.json (confidence and detail share per target; report.json is the
manifest of the service's ZIP answer, schemas.FillManifestOut).
Exit 2 on bad input.
"""
from __future__ import annotations

import csv
import json
import logging
import math
import sys
from pathlib import Path
from typing import Callable, Mapping, Sequence, TextIO

from .cli_common import (
    EXIT_BAD_INPUT,
    EXIT_OK,
    NO_REFINE_HELP,
    UsageError,
    add_output_options,
    check_size,
    output_options,
    registry_of,
)

NOTICE = "frames are synthesized by a learned model, not captured"
EXIT_SERVICE = 1  # the service could not be reached, or failed on its side


# -- helpers other commands reuse ---------------------------------------------------------------
def open_engine(registry, name: str, version: int | None = None):
    """(Engine, ModelVersion) of a registered model, latest version when `version` is None."""
    from ..models.engine import Engine

    entry = registry.get(name, version)
    return Engine.load(entry.path), entry


class ProgressBar:
    """A one-line text progress bar (default on stderr); `width` in characters."""

    def __init__(self, label: str, *, stream: TextIO | None = None, width: int = 30):
        self.label, self.stream, self.width = label, stream or sys.stderr, width
        self._last: tuple[int, int] | None = None

    def __call__(self, done: int, total: int) -> None:
        if (done, total) == self._last:
            return
        self._last = (done, total)
        filled = self.width * done // total if total else 0
        self.stream.write(f"\r{self.label} [{'#' * filled}{'.' * (self.width - filled)}] {done}/{total}")
        self.stream.flush()

    def close(self) -> None:
        if self._last is not None:
            self.stream.write("\n")
            self.stream.flush()


def read_targets(path: str | Path, *, max_targets: int = 100_000) -> tuple[list[str], list[dict[str, float]]]:
    """(names, targets) from a CSV whose header row names the parameters; UsageError names row and column."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageError(f"{path}: cannot read the targets file ({exc})") from None
    rows = list(csv.reader(text.splitlines()))
    if not rows or not any(c.strip() for c in rows[0]):
        raise UsageError(f"{path}: the header row (parameter names) is missing")
    names = [c.strip() for c in rows[0]]
    if any(not n for n in names) or len(set(names)) != len(names):
        raise UsageError(f"{path}: header {names!r} must hold distinct, non-empty parameter names")
    targets = []
    for r, row in enumerate(rows[1:], start=1):
        if not any(c.strip() for c in row):
            continue  # blank lines carry no target
        if len(row) != len(names):
            raise UsageError(f"{path}: row {r} has {len(row)} values; the header names {len(names)}")
        target = {}
        for name, cell in zip(names, row):
            try:
                value = float(cell)
            except ValueError:
                raise UsageError(f"{path}: row {r}, column {name!r}: {cell!r} is not a number") from None
            if not math.isfinite(value):
                raise UsageError(f"{path}: row {r}, column {name!r}: {cell!r} is not a finite number")
            target[name] = value
        targets.append(target)
    if not targets:
        raise UsageError(f"{path}: no targets below the header")
    if len(targets) > max_targets:
        raise UsageError(f"{path}: {len(targets)} targets is over max_targets={max_targets}")
    return names, targets


# -- fill ---------------------------------------------------------------------------------------
def _fill_local(args, targets: Sequence[Mapping[str, float]], progress: Callable[[int, int], None],
                chunk: int = 32):
    """The fill answered by the local engine, as the service would answer it (answers.Answer), its
    frames judged at the working size and their pictures at --size."""
    from ..models.fullsize import sized
    from .answers import fill_answer, fill_frames

    size, fmt, quality = output_options(args)
    engine, entry = open_engine(registry_of(args), args.name, args.version)
    check_size(engine, size)
    for i, target in enumerate(targets):  # every bad row is named before any work starts
        try:
            engine.space.vector(target)
        except ValueError as exc:
            raise UsageError(f"{args.targets}: row {i + 1}: {exc}") from None
    frames = []
    progress(0, len(targets))
    for lo in range(0, len(targets), chunk):
        part = targets[lo:lo + chunk]
        made = sized(engine, engine.fill(part, min_confidence=args.min_confidence, refine=not args.no_refine), size)
        frames += fill_frames(made, part, offset=lo, fmt=fmt, quality=quality)
        progress(len(frames), len(targets))
    return fill_answer(frames, entry.name, entry.version, engine.tau, fmt)


def _fill_remote(args, targets: Sequence[Mapping[str, float]], progress: Callable[[int, int], None]):
    """The fill answered by a running service (its files kept byte for byte). Only the options given
    are sent: the service's defaults are the command's."""
    from .answers import from_wire
    from .client import Client

    output_options(args)  # a bad --quality is named before anything is sent
    with Client(args.url) as client:
        return from_wire(client.fill(args.name, targets, min_confidence=args.min_confidence, version=args.version,
                                     progress=progress, refine=not args.no_refine, size=args.size,
                                     format=args.format, quality=args.quality))


def _write_fill(out: Path, names: Sequence[str], answer, *, keep_rejected: bool = False):
    """Accepted frames (PNG, or .jpg for a JPEG answer), report.json (the ZIP answer's manifest, a
    FillManifestOut) and report.csv; returns the manifest."""
    from .answers import frame_file, manifest_json, to_wire

    out.mkdir(parents=True, exist_ok=True)
    files = []
    for f in answer.frames:
        file = frame_file("fill", f.fields["index"], answer.format) if f.accepted or keep_rejected else None
        if file:
            (out / file).write_bytes(f.png)
        files.append(file)
    report = to_wire(answer, files)
    (out / "report.json").write_text(manifest_json(report))
    with open(out / "report.csv", "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        # detail last, so the columns before it keep their places; empty when the model does not refine
        w.writerow(["index", *names, "confidence", "accepted", "file", *[f"shown_{n}" for n in names], "detail"])
        for r in report.frames:
            conf = "" if r.confidence is None else f"{r.confidence:.6f}"
            detail = "" if r.detail is None else f"{r.detail:.6f}"
            w.writerow([r.index, *[r.target.get(n, "") for n in names], conf, int(r.accepted), r.file or "",
                        *[f"{r.params.get(n, float('nan')):.6g}" for n in names], detail])
    return report


def cmd_fill(args) -> int:
    from .client import ClientError

    if not 0.0 <= args.min_confidence <= 1.0:
        raise UsageError(f"--min-confidence: {args.min_confidence!r} is outside [0, 1]")
    if args.version is not None and args.version < 1:
        raise UsageError(f"--version: {args.version!r} is not allowed; expected an integer >= 1")
    names, targets = read_targets(args.targets)
    bar = ProgressBar(f"fill {args.name}")
    try:
        answer = (_fill_remote if args.url else _fill_local)(args, targets, bar)
    except ClientError as exc:
        bar.close()
        print(f"geotween: {args.url}: {exc}", file=sys.stderr)
        # a 429 says the service is busy: not the caller's input at fault
        bad_input = exc.status is not None and 400 <= exc.status < 500 and exc.status != 429
        return EXIT_BAD_INPUT if bad_input else EXIT_SERVICE
    bar.close()
    report = _write_fill(Path(args.out), names, answer, keep_rejected=args.keep_rejected)
    print(f"{report.accepted} of {len(report.frames)} frames accepted, written to {args.out} "
          f"(report.csv, report.json); {NOTICE}")
    return EXIT_OK


# -- serve --------------------------------------------------------------------------------------
class JsonLines(logging.Formatter):
    """One JSON object per line; access lines are already JSON and pass through."""

    def format(self, record: logging.LogRecord) -> str:
        if record.name == "geotween.access":
            return record.getMessage()
        line = {"level": record.levelname.lower(), "logger": record.name, "message": record.getMessage()}
        if record.exc_info:
            line["exception"] = self.formatException(record.exc_info)
        return json.dumps(line)


def log_config(level: str = "INFO") -> dict:
    """logging.config dict: geotween's and uvicorn's loggers as JSON lines on stderr."""
    handler = {"class": "logging.StreamHandler", "formatter": "json", "stream": "ext://sys.stderr"}
    quiet = {"handlers": ["stderr"], "level": level, "propagate": False}
    return {"version": 1, "disable_existing_loggers": False,
            "formatters": {"json": {"()": JsonLines}}, "handlers": {"stderr": handler},
            "loggers": {"geotween": quiet, "uvicorn": quiet, "uvicorn.error": {"level": level},
                        "uvicorn.access": {**quiet, "level": "WARNING"}}}


def cmd_serve(args) -> int:
    from .api import create_app
    from .drain import serve
    from .settings import Settings

    settings = Settings.load(**({"registry": args.registry} if args.registry else {}))
    # the access log is ours (JSON, one line per request); uvicorn's would repeat it
    started = serve(create_app(settings), host=args.host, port=args.port, drain_s=settings.drain_seconds,
                    grace_s=settings.shutdown_grace, access_log=False, log_config=log_config())
    return EXIT_OK if started else EXIT_SERVICE


def cmd_worker(args) -> int:
    from .errors import ServiceError
    from .settings import Settings
    from .worker import run_worker

    overrides = {"registry": args.registry} if args.registry else {}
    if args.id:
        overrides["worker_id"] = args.id
    try:
        run_worker(Settings.load(**overrides))
    except ServiceError as exc:  # the registry or the jobs' database cannot be opened
        print(f"geotween worker: {exc.message}", file=sys.stderr)
        return EXIT_SERVICE
    return EXIT_OK


def add_commands(subparsers) -> None:
    """Register `serve`, `worker` and `fill` on the CLI's subparsers."""
    s = subparsers.add_parser("serve", help="run the HTTP service (settings from GEOTWEEN_* variables)")
    s.add_argument("--host", default="127.0.0.1", help="interface to listen on (default: loopback only)")
    s.add_argument("--port", type=int, default=8000)
    s.set_defaults(func=cmd_serve)

    s = subparsers.add_parser("worker", help="run queued jobs (fills, trainings) without serving HTTP; "
                                             "settings from GEOTWEEN_* variables")
    s.add_argument("--id", default=None, help="this worker's id (else $GEOTWEEN_WORKER_ID, else 'local'): a "
                                              "restarted worker with the same id resumes its jobs")
    s.set_defaults(func=cmd_worker)

    s = subparsers.add_parser("fill", help="frames at the settings of each CSV row (missing views)")
    s.add_argument("name", help="model name")
    s.add_argument("targets", help="CSV file; header = parameter names, one target per row")
    s.add_argument("--out", required=True, help="folder for the frames (PNG, or JPEG with --format jpeg), "
                                                "report.csv and report.json")
    s.add_argument("--url", default=None, help="use a running service instead of the local registry")
    s.add_argument("--min-confidence", type=float, default=0.5, help="frames below it are rejected")
    s.add_argument("--keep-rejected", action="store_true", help="write rejected frames too (marked in the report)")
    s.add_argument("--version", type=int, default=None, help="model version (default: the latest)")
    s.add_argument("--no-refine", action="store_true", help=NO_REFINE_HELP)
    add_output_options(s)
    s.set_defaults(func=cmd_fill)
