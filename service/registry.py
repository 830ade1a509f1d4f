"""Versioned model store: an index (SQLite, or PostgreSQL shared by replicas) plus one bundle per
version (a folder, or content-addressed objects in an S3-compatible store: service/store.py).

Layout under ROOT (each replica's own local folder)::

    ROOT/index.sqlite              tables `versions` (one row per published version) and `meta`
                                   (in PostgreSQL: the same tables in schema `geotween`)
    ROOT/models/<name>/<version>/  a complete bundle (manifest.json, weights, config, arrays)
    ROOT/staging/<tmp>/            publishes in progress; renamed into models/ when complete
    ROOT/cache/<digest>/           with an object store: local copies of the bundles served

A row is inserted only after its folder has been renamed into place, so readers never see a
half-written bundle. Folders under models/ without a row (a crash between rename and insert) are
ignored. Version numbers only grow: deleted versions keep their row (status 'deleted').

Errors::

    RegistryError(Exception)                 any registry failure (bad manifest, unreadable index)
    ├── ModelNotFound(RegistryError, LookupError)   no ready version of that name
    │   └── VersionNotFound                  the model exists, that version does not (or was deleted)
    └── InvalidName(RegistryError, ValueError)      a model name or version number breaks the rules

No PublishConflict is needed: the next version number is chosen under the write lock.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import sqlite3
import tempfile
import threading
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Callable, Iterator

from .pg_index import PgIndex
from .store import S3_PREFIX, ObjectStore

ENV_VAR = "GEOTWEEN_REGISTRY"
DEFAULT_ROOT = Path("~/.local/share/geotween/registry")  # expanded at call time, so $HOME is honoured
NAME_RULE = r"[a-z0-9][a-z0-9._-]{0,63}"
_NAME_RE = re.compile(NAME_RULE)

_SCHEMA = [  # the same SQL for SQLite and PostgreSQL
    """CREATE TABLE IF NOT EXISTS versions (
    name TEXT NOT NULL, version INTEGER NOT NULL, created TEXT NOT NULL, hash TEXT NOT NULL,
    metrics TEXT NOT NULL, status TEXT NOT NULL CHECK (status IN ('ready', 'deleted')),
    path TEXT NOT NULL, PRIMARY KEY (name, version))""",
    "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value INTEGER NOT NULL)",
    "INSERT INTO meta (key, value) VALUES ('generation', 0) ON CONFLICT (key) DO NOTHING",
]
_COLUMNS = "name, version, created, hash, metrics, path"


class RegistryError(Exception):
    """Base of every registry failure."""


class ModelNotFound(RegistryError, LookupError):
    """No ready version of the requested model."""


class VersionNotFound(ModelNotFound):
    """The model exists but the requested version does not, or was deleted."""


class InvalidName(RegistryError, ValueError):
    """A model name or version number that breaks the naming rules."""


@dataclass(frozen=True)
class ModelVersion:
    """One published bundle; `created` is ISO-8601 UTC, `path` the bundle folder."""
    name: str
    version: int
    created: str
    hash: str
    metrics: dict = field(hash=False)
    path: Path

    def to_dict(self) -> dict:
        return {**asdict(self), "path": str(self.path)}


@dataclass(frozen=True)
class ModelSummary:
    """One model name: its latest ready version, how many are ready, when the latest was made."""
    name: str
    latest_version: int
    n_versions: int
    latest_created: str

    def to_dict(self) -> dict:
        return asdict(self)


def resolve_root(explicit: str | Path | None = None) -> Path:
    """Registry folder: `explicit`, else $GEOTWEEN_REGISTRY, else DEFAULT_ROOT (empty = unset)."""
    if explicit is not None and str(explicit) != "":
        return Path(explicit).expanduser()
    env = os.environ.get(ENV_VAR, "")
    return Path(env).expanduser() if env else DEFAULT_ROOT.expanduser()


def check_name(name: object) -> str:
    """Return `name` if it is a valid model name, else raise InvalidName."""
    if not isinstance(name, str) or _NAME_RE.fullmatch(name) is None or ".." in name:
        raise InvalidName(f"name must match {NAME_RULE} (1 to 64 characters, lowercase a-z, 0-9, "
                          f"'.', '_', '-', starting with a letter or digit) and not contain '..'; "
                          f"got {name!r}")
    return name


def check_version(version: object) -> int:
    """Return `version` if it is a positive int, else raise InvalidName."""
    if isinstance(version, bool) or not isinstance(version, int) or version < 1:
        raise InvalidName(f"version must be a positive integer (>= 1); got {version!r}")
    return version


class Registry:
    """Versioned bundles under one root folder; safe across threads and processes.

    Every operation opens its own SQLite connection (WAL: concurrent readers, one writer).
    `busy_timeout_s` is how long a writer waits for another writer, in seconds;
    staging folders older than `stale_staging_s` seconds are removed when the registry is opened.
    """

    def __init__(self, root: str | Path, *, busy_timeout_s: float = 10.0,
                 stale_staging_s: float = 3600.0, index_url: str | None = None, store: ObjectStore | None = None):
        for key, value in (("busy_timeout_s", busy_timeout_s), ("stale_staging_s", stale_staging_s)):
            if not value > 0:
                raise ValueError(f"{key} must be > 0 seconds; got {value!r}")
        self.root = Path(root).expanduser().absolute()
        self.index = self.root / "index.sqlite"
        self.busy_timeout_s = float(busy_timeout_s)
        self.stale_staging_s = float(stale_staging_s)
        self._setup_lock = threading.Lock()
        self._is_setup = False
        self.store = store  # None: bundles in ROOT/models
        self._local_con = threading.local()  # each thread's connection for generation()
        self._pg = None
        if index_url is not None:  # the index in PostgreSQL, shared by every replica
            self._pg = PgIndex(index_url, timeout_s=busy_timeout_s)

    @classmethod
    def open(cls, root: str | Path | None = None, *, create: bool = True, **settings) -> "Registry":
        """Open (and with `create`, initialise) the registry at resolve_root(root)."""
        registry = cls(resolve_root(root), **settings)
        if not create and registry._pg is None and not registry.index.is_file():
            raise RegistryError(f"no registry at {registry.root} (index.sqlite missing); "
                                f"open it with create=True to make one")
        registry._setup()
        return registry

    def readable(self) -> bool:
        """True when the index opens and answers a query (a readiness probe; creates nothing)."""
        if self._pg is not None:
            try:
                with self._connect() as con:
                    con.execute("SELECT count(*) FROM versions").fetchone()
                return True
            except RegistryError:
                return False
        uri = self.index.as_uri() + "?mode=rw"  # rw, not rwc: a missing index stays missing
        try:
            with contextlib.closing(sqlite3.connect(uri, uri=True, timeout=self.busy_timeout_s)) as con:
                con.execute("SELECT count(*) FROM versions").fetchone()
            return True
        except sqlite3.Error:
            return False

    def list_models(self) -> list[ModelSummary]:
        """Every name with at least one ready version, sorted by name."""
        self._setup()
        with self._connect() as con:
            rows = con.execute(
                "SELECT v.name, v.version, c.n, v.created FROM versions v JOIN (SELECT name, max(version) AS "
                "latest, count(*) AS n FROM versions WHERE status = 'ready' GROUP BY name) c ON v.name = c.name "
                "AND v.version = c.latest ORDER BY v.name").fetchall()
        return [ModelSummary(*row) for row in rows]

    def versions(self, name: str) -> list[ModelVersion]:
        """Ready versions of `name`, ascending; ModelNotFound when there are none."""
        name = check_name(name)
        self._setup()
        with self._connect() as con:
            rows = _ready(con, "name = ? ORDER BY version", name).fetchall()
        if not rows:
            raise ModelNotFound(f"no model named {name!r} in the registry at {self.root}")
        return [self._to_version(row) for row in rows]

    def get(self, name: str, version: int | None = None) -> ModelVersion:
        """The given version of `name`, or its latest ready version when `version` is None."""
        name = check_name(name)
        version = None if version is None else check_version(version)
        self._setup()
        with self._connect() as con:
            if version is None:
                row = _ready(con, "name = ? ORDER BY version DESC LIMIT 1", name).fetchone()
            else:
                row = _ready(con, "name = ? AND version = ?", name, version).fetchone()
            if row is None:
                raise self._missing(con, name, version)
        if self.store is not None:
            self.store.local(row[-1])  # the bundle served is a local copy
        return self._to_version(row)

    def generation(self) -> int:
        """A counter bumped by every publish and delete; compare it to notice changes cheaply. Asked on
        every request, so with SQLite each thread keeps one connection for it (opening one costs
        0.4 ms; the read itself 0.01 ms); a failed read drops that connection."""
        self._setup()
        if self._pg is not None:
            with self._connect() as con:
                return int(con.execute("SELECT value FROM meta WHERE key = 'generation'").fetchone()[0])
        con = getattr(self._local_con, "con", None)
        try:
            if con is None:
                con = self._local_con.con = sqlite3.connect(self.index, timeout=self.busy_timeout_s,
                                                            isolation_level=None, check_same_thread=True)
            return int(con.execute("SELECT value FROM meta WHERE key = 'generation'").fetchone()[0])
        except sqlite3.Error as exc:
            self._local_con.con = None
            raise RegistryError(f"registry index {self.index}: {exc}") from exc

    def publish(self, name: str, build: Callable[[Path], None]) -> ModelVersion:
        """Run build(folder) in a fresh staging folder, then make it the next version of `name`.

        The folder must end up holding manifest.json with "hash" (str) and "metrics" (object).
        On any failure the staging folder is removed and the registry is left as it was.
        """
        name = check_name(name)
        self._setup()
        staging = Path(tempfile.mkdtemp(prefix=f"{name}-", dir=self.root / "staging"))
        try:
            build(staging)
            manifest = _read_manifest(staging)
            if self.store is not None:  # uploaded before the row is written: a version exists once its row commits
                stored = self.store.put(staging)
                with self._connect(write=True) as con:
                    version = (con.execute("SELECT max(version) FROM versions WHERE name = ?",
                                           (name,)).fetchone()[0] or 0) + 1
                    entry = ModelVersion(name, version, _utc_now(), manifest["hash"], manifest["metrics"],
                                         self._local(stored))
                    _insert_row(con, entry, stored)
                    _bump_generation(con)
                with contextlib.suppress(OSError):  # the local copy is the staging folder itself
                    self.store.cache.mkdir(parents=True, exist_ok=True)
                    os.rename(staging, entry.path)
                return entry
            _fsync_tree(staging)  # contents are final: flush them before taking the write lock
            with self._connect(write=True) as con:
                last = con.execute("SELECT max(version) FROM versions WHERE name = ?",
                                   (name,)).fetchone()[0]
                parent = self.root / "models" / name
                parent.mkdir(parents=True, exist_ok=True)
                version = (last or 0) + 1
                while (parent / str(version)).exists():  # orphan of a crashed publish: keep it
                    version += 1
                final = parent / str(version)
                entry = ModelVersion(name, version, _utc_now(), manifest["hash"],
                                     manifest["metrics"], final)
                os.rename(staging, final)
                try:
                    _fsync(parent)
                    _insert_row(con, entry, final.relative_to(self.root).as_posix())
                    _bump_generation(con)
                    con.commit()
                except BaseException:
                    _move_back(final, staging)  # so index and disk agree
                    raise
            return entry
        finally:
            shutil.rmtree(staging, ignore_errors=True)

    def delete(self, name: str, version: int) -> None:
        """Mark a version deleted and remove its folder; its number is never reused."""
        name, version = check_name(name), check_version(version)
        self._setup()
        with self._connect(write=True) as con:
            row = _ready(con, "name = ? AND version = ?", name, version).fetchone()
            if row is None:
                raise self._missing(con, name, version)
            con.execute("UPDATE versions SET status = 'deleted' WHERE name = ? AND version = ?",
                        (name, version))
            _bump_generation(con)
            shared = con.execute("SELECT count(*) FROM versions WHERE status = 'ready' AND path = ?",
                                 (row[-1],)).fetchone()[0]
        # Only after the commit: until then readers may still be handed this folder.
        if self.store is None:
            shutil.rmtree(self._to_version(row).path, ignore_errors=True)
        elif not shared:  # content-addressed: another version may hold the same bundle
            self.store.remove(row[-1])

    def _setup(self) -> None:
        with self._setup_lock:
            if self._is_setup:
                return
            for sub in ("models", "staging"):
                (self.root / sub).mkdir(parents=True, exist_ok=True)
            if self._pg is not None:
                with self._connect(schema=True) as con:
                    for statement in _SCHEMA:
                        con.execute(statement)
            else:
                with self._connect() as con:
                    con.execute("PRAGMA journal_mode=WAL")  # persistent: readers never block the writer
                    for statement in _SCHEMA:
                        con.execute(statement)
            self._clean_staging()
            self._is_setup = True

    def _clean_staging(self) -> None:
        cutoff = time.time() - self.stale_staging_s
        for entry in (self.root / "staging").iterdir():
            with contextlib.suppress(OSError):  # another process may be cleaning too
                if entry.lstat().st_mtime < cutoff:
                    shutil.rmtree(entry, ignore_errors=True)

    @contextlib.contextmanager
    def _connect(self, *, write: bool = False, schema: bool = False) -> Iterator:
        if self._pg is not None:
            with self._pg.connect(write=write, schema=schema, error=RegistryError,
                                  passing=(RegistryError, InvalidName, ModelNotFound)) as con:
                yield con
            return
        try:
            con = sqlite3.connect(self.index, timeout=self.busy_timeout_s, isolation_level=None)
        except sqlite3.Error as exc:
            raise RegistryError(f"cannot open registry index {self.index}: {exc}") from exc
        try:
            if write:
                con.execute("BEGIN IMMEDIATE")  # take the write lock now, not at the first write
            yield con
            if con.in_transaction:
                con.execute("COMMIT")
        except BaseException as exc:
            if con.in_transaction:
                with contextlib.suppress(sqlite3.Error):
                    con.execute("ROLLBACK")
            if isinstance(exc, sqlite3.Error):
                raise RegistryError(f"registry index {self.index}: {exc}") from exc
            raise
        finally:
            con.close()

    def _local(self, path: str) -> Path:
        return self.store.cache / path.removeprefix(S3_PREFIX) if path.startswith(S3_PREFIX) else self.root / path

    def _missing(self, con, name: str, version: int | None) -> ModelNotFound:
        ready = [v for (v,) in con.execute("SELECT version FROM versions WHERE name = ? AND "
                                           "status = 'ready' ORDER BY version", (name,))]
        if not ready:
            return ModelNotFound(f"no model named {name!r} in the registry at {self.root}")
        deleted = con.execute("SELECT 1 FROM versions WHERE name = ? AND version = ?",
                              (name, version)).fetchone()
        why = "was deleted" if deleted else "does not exist"
        return VersionNotFound(f"version {version} of model {name!r} {why}; "
                               f"ready versions: {', '.join(map(str, ready))}")

    def _to_version(self, row: tuple) -> ModelVersion:
        name, version, created, hash_, metrics, path = row
        return ModelVersion(name, version, created, hash_, json.loads(metrics), self._local(path))


def _read_manifest(folder: Path) -> dict:
    path = folder / "manifest.json"
    if not path.is_file():
        raise RegistryError("the bundle has no manifest.json; build() must write one holding "
                            "'hash' and 'metrics'")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise RegistryError(f"manifest.json is not readable JSON: {exc}") from exc
    if not isinstance(manifest, dict):
        raise RegistryError(f"manifest.json must hold a JSON object; got {type(manifest).__name__}")
    for key, kind, label in (("hash", str, "string"), ("metrics", dict, "JSON object")):
        if key not in manifest:
            raise RegistryError(f"manifest.json lacks the key {key!r} (required: 'hash', 'metrics')")
        if not isinstance(manifest[key], kind) or manifest[key] == "":
            raise RegistryError(f"manifest.json key {key!r} must be a non-empty {label}; "
                                f"got {manifest[key]!r}")
    return manifest


def _ready(con, where: str, *args: object):
    return con.execute(f"SELECT {_COLUMNS} FROM versions WHERE status = 'ready' AND {where}", args)


def _insert_row(con, entry: ModelVersion, rel_path: str) -> None:
    con.execute("INSERT INTO versions (name, version, created, hash, metrics, status, path) "
                "VALUES (?, ?, ?, ?, ?, 'ready', ?)", (entry.name, entry.version, entry.created,
                                                       entry.hash, json.dumps(entry.metrics), rel_path))


def _bump_generation(con) -> None:
    con.execute("UPDATE meta SET value = value + 1 WHERE key = 'generation'")


def _move_back(final: Path, staging: Path) -> None:
    try:
        os.rename(final, staging)
    except OSError:
        shutil.rmtree(final, ignore_errors=True)


def _fsync_tree(root: Path) -> None:
    for folder, _, files in os.walk(root):
        for file in files:
            _fsync(os.path.join(folder, file), strict=True)
        _fsync(folder)


def _fsync(path: str | Path, *, strict: bool = False) -> None:
    # Some platforms refuse fsync on a directory (strict=False); a data file must sync.
    try:
        fd = os.open(path, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        if strict:
            raise


def _utc_now() -> str:
    now = time.time()
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(now)) + f".{int(now % 1 * 1000):03d}Z"
