"""The one bounded executor for torch work.

``InferencePool`` is the only place torch runs in the service: a ThreadPoolExecutor with a fixed
number of workers, so requests and jobs together never take more threads than configured. Work
runs under ``torch.inference_mode()`` unless it trains. Jobs themselves are durable workflows
(service/durable.py) whose torch parts go through this pool.
"""
from __future__ import annotations

import asyncio
import logging
import threading
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import torch

log = logging.getLogger("geotween.jobs")

STATES = ("queued", "running", "done", "failed", "cancelled")
FINISHED = ("done", "failed", "cancelled")


class Cancelled(Exception):
    """Raised inside a job's work when its cancel flag is set (stops training at the next step)."""


def _call(fn: Callable, args: tuple, kwargs: dict, inference: bool):
    if inference:
        with torch.inference_mode():
            return fn(*args, **kwargs)
    return fn(*args, **kwargs)


class InferencePool:
    """One bounded executor for every piece of torch work; `workers` threads at most."""

    def __init__(self, workers: int = 2, *, name: str = "geotween-infer"):
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
            raise ValueError(f"workers: {workers!r} is not allowed; expected an integer >= 1")
        self.workers = workers
        self._executor = ThreadPoolExecutor(max_workers=workers, thread_name_prefix=name)
        self._lock = threading.Lock()
        self._pending = 0  # submitted and not yet finished

    @property
    def pending(self) -> int:
        return self._pending

    def submit(self, fn: Callable, *args, inference: bool = True, **kwargs):
        with self._lock:
            self._pending += 1
        future = self._executor.submit(_call, fn, args, kwargs, inference)
        future.add_done_callback(self._done)
        return future

    def _done(self, _future) -> None:
        with self._lock:
            self._pending -= 1

    async def run(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Await fn(*args, **kwargs) on the pool, from the event loop."""
        return await asyncio.wrap_future(self.submit(fn, *args, inference=inference, **kwargs))

    def call(self, fn: Callable, *args, inference: bool = True, **kwargs):
        """Run fn on the pool and wait for it, from a thread that is not a pool worker."""
        return self.submit(fn, *args, inference=inference, **kwargs).result()

    def shutdown(self) -> None:
        self._executor.shutdown(wait=True, cancel_futures=True)
