"""The model cache: one Engine per name@version, its latent graph built once.

It asks the registry for its generation counter on each lookup (one small SQLite read) and only
re-reads versions after a publish or delete bumped it, so a newly registered version is served
without a restart and nothing is reloaded per request.
"""
from __future__ import annotations

import logging
import threading
from collections import OrderedDict
from pathlib import Path
from typing import Callable

from ..models.bundle import full_capture_size, read_manifest
from ..models.engine import Engine
from ..models.fullsize import frame_size
from ..models.manifest import Manifest
from ..models.params import ParamSpace
from .registry import ModelVersion, Registry, RegistryError

log = logging.getLogger("geotween.cache")
MANIFESTS_KEPT = 256  # parsed manifests memoised; a few KB each


class ModelCache:
    """Up to `capacity` engines, least recently used dropped first; each loaded once."""

    def __init__(self, registry: Callable[[], Registry], *, capacity: int = 4,
                 loader: Callable[[Path], Engine] = Engine.load, warm: bool = True):
        if isinstance(capacity, bool) or not isinstance(capacity, int) or capacity < 1:
            raise ValueError(f"capacity: {capacity!r} is not allowed; expected an integer >= 1")
        self._registry, self.capacity, self._loader = registry, capacity, loader
        self._lock = threading.Lock()
        self._engines: OrderedDict[tuple[str, int, str], Engine] = OrderedDict()
        self._key_locks: dict[tuple[str, int, str], threading.Lock] = {}
        self._versions: dict[tuple[str, int | None], ModelVersion] = {}
        self._manifests: dict[tuple[str, int, str], Manifest] = {}
        self._full_sizes: dict[tuple[str, int, str], tuple[int, int] | None] = {}
        self._generation: int | None = None
        self.loads = 0  # engines built since start (a reload per request would show here)
        self.warm = warm
        self._warming: dict[int, threading.Event] = {}  # engines whose flows are being estimated

    @property
    def size(self) -> int:
        return len(self._engines)

    def lookup(self, name: str, version: int | None = None) -> ModelVersion:
        """The registered version (latest when None); ModelNotFound / VersionNotFound / InvalidName."""
        registry = self._registry()
        generation = registry.generation()
        with self._lock:
            changed = generation != self._generation
            if changed:
                self._generation = generation
                self._versions.clear()
            hit = self._versions.get((name, version))
        if changed:
            self._drop_stale(registry)
        if hit is not None:
            return hit
        entry = registry.get(name, version)
        with self._lock:
            if self._generation == generation:
                self._versions[(name, version)] = entry
        return entry

    def engine(self, entry: ModelVersion) -> Engine:
        """The engine of a registered version, built on first use (blocking: call it on the pool)."""
        key = (entry.name, entry.version, entry.hash)
        with self._lock:
            if key in self._engines:
                self._engines.move_to_end(key)
                return self._engines[key]
            key_lock = self._key_locks.setdefault(key, threading.Lock())
        with key_lock:  # concurrent first requests for one model build it once
            with self._lock:
                if key in self._engines:
                    self._engines.move_to_end(key)
                    return self._engines[key]
            engine = self._loader(entry.path)
            with self._lock:
                self.loads += 1
                self._engines[key] = engine
                while len(self._engines) > self.capacity:
                    _, dropped = self._engines.popitem(last=False)
                    self._warming.pop(id(dropped), threading.Event()).set()
                self._key_locks.pop(key, None)
                stop = self._warming[id(engine)] = threading.Event()
            if self.warm:  # later answers find the flows of likely capture pairs already estimated
                threading.Thread(target=self._warm, args=(engine, stop), name="geotween-flows", daemon=True).start()
        return engine

    def _warm(self, engine: Engine, stop: threading.Event) -> None:
        try:
            engine.warm_flows(stop)
        except Exception:  # a warm-up is only a head start: answers estimate what is missing
            log.exception("estimating capture-pair flows after a load failed")
        finally:
            with self._lock:
                self._warming.pop(id(engine), None)

    def manifest(self, entry: ModelVersion) -> Manifest:
        """The bundle's manifest, parsed (JSON only, no weights), memoised per version."""
        key = (entry.name, entry.version, entry.hash)
        with self._lock:
            hit = self._manifests.get(key)
        if hit is None:
            hit = read_manifest(entry.path)
            with self._lock:
                if len(self._manifests) >= MANIFESTS_KEPT:
                    self._manifests.clear()
                self._manifests[key] = hit
        return hit

    def frame_size(self, entry: ModelVersion, size: str | int) -> tuple[int, int]:
        """(width, height) of this version's frames at `size` ("working", "full", or a long side);
        ValueError for a size the version cannot make."""
        key = (entry.name, entry.version, entry.hash)
        with self._lock:
            full = self._full_sizes.get(key, False)
        if full is False:
            full = full_capture_size(entry.path)
            with self._lock:
                self._full_sizes[key] = full
        return frame_size(size, self.manifest(entry).model_config.resolution, full)

    def space(self, entry: ModelVersion) -> ParamSpace:
        """The model's parameter space, without loading its weights."""
        return self.manifest(entry).space

    def _drop_stale(self, registry: Registry) -> None:
        # rare (after a publish or delete): drop engines whose version was deleted or replaced
        with self._lock:
            keys = list(self._engines)
        for name, version, hash_ in keys:
            try:
                alive = registry.get(name, version).hash == hash_
            except (LookupError, RegistryError):
                alive = False
            if not alive:
                with self._lock:
                    self._engines.pop((name, version, hash_), None)
