"""The one bounded executor for torch work.

``InferencePool`` is the only place torch runs in the service: an executor with a fixed number of
workers, so requests and jobs together never take more threads than configured. Work runs under
``torch.inference_mode()`` unless it trains. Jobs themselves are durable workflows
(service/durable.py) whose torch parts go through this pool.

Torch keeps one team of intra-op (OpenMP) threads per thread that calls it, and a second team makes
both wait more lazily. A free worker is therefore chosen last idle, first used, and a worker idle
for ``idle_s`` seconds ends (its team with it) while another is idle: one request after another
runs on one thread with one warm team, as in a plain process. ThreadPoolExecutor's idle threads
take turns, so a lone stream of requests woke a sleeping team every time (measured on 2 cores: a
16-frame answer through HTTP in 19.1 ms against 14.9 ms on one thread, p50).
"""
from __future__ import annotations

import asyncio
import logging
import queue
import threading
from collections import deque
from concurrent.futures import Future
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


IDLE_S = 2.0  # seconds a worker may stay idle while another is idle too, before it ends


class InferencePool:
    """One bounded executor for every piece of torch work; `workers` threads at most, started on
    demand. The worker that went idle last takes the next piece of work; work that finds every
    worker busy waits in arrival order. A worker idle for `idle_s` seconds ends while another one
    is idle too."""

    def __init__(self, workers: int = 2, *, name: str = "geotween-infer", idle_s: float = IDLE_S):
        if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
            raise ValueError(f"workers: {workers!r} is not allowed; expected an integer >= 1")
        if not idle_s > 0.0:
            raise ValueError(f"idle_s: {idle_s!r} is not allowed; expected seconds > 0")
        self.workers, self.name, self.idle_s = workers, name, float(idle_s)
        self._lock = threading.Lock()
        self._idle: list[queue.SimpleQueue] = []  # inboxes of idle workers, the latest idle last
        self._backlog: deque[tuple] = deque()     # work waiting for a worker, oldest first
        self._threads: set[threading.Thread] = set()
        self._started = 0
        self._closed = False
        self._pending = 0  # submitted and not yet finished

    @property
    def pending(self) -> int:
        return self._pending

    @property
    def threads(self) -> int:
        """Worker threads alive now (at most `workers`)."""
        return len(self._threads)

    def submit(self, fn: Callable, *args, inference: bool = True, **kwargs) -> Future:
        """Run fn(*args, **kwargs) on a worker; its Future. Cancelling the Future before the work
        starts drops the work."""
        future: Future = Future()
        item = (future, fn, args, kwargs, inference)
        with self._lock:
            if self._closed:
                raise RuntimeError("the inference pool is shut down; it takes no new work")
            self._pending += 1
            future.add_done_callback(self._done)
            if self._idle:
                self._idle.pop().put(item)
            elif len(self._threads) < self.workers:
                inbox: queue.SimpleQueue = queue.SimpleQueue()
                inbox.put(item)
                thread = threading.Thread(target=self._serve, args=(inbox,), name=f"{self.name}_{self._started}",
                                          daemon=True)  # daemon: an unclosed pool does not hold the interpreter
                self._started += 1
                self._threads.add(thread)
                thread.start()
            else:
                self._backlog.append(item)
        return future

    def _serve(self, inbox: queue.SimpleQueue) -> None:
        """One worker: run what it is handed; then, with no work waiting, idle until handed more."""
        try:
            item = inbox.get()
            while item is not None:
                future, fn, args, kwargs, inference = item
                ok, outcome = None, None
                if not self._closed and future.set_running_or_notify_cancel():  # False: cancelled while it waited
                    try:
                        ok, outcome = True, _call(fn, args, kwargs, inference)
                    except BaseException as exc:  # the caller gets it from the Future
                        ok, outcome = False, exc
                elif self._closed:
                    future.cancel()
                with self._lock:  # free again before the caller hears back, so its next request comes here
                    item = self._backlog.popleft() if self._backlog else None
                    if item is None and not self._closed:
                        self._idle.append(inbox)
                if ok is not None:
                    future.set_result(outcome) if ok else future.set_exception(outcome)
                del future, fn, args, kwargs, outcome
                if item is None and not self._closed:
                    item = self._next(inbox)
        finally:
            with self._lock:
                self._threads.discard(threading.current_thread())

    def _next(self, inbox: queue.SimpleQueue):
        """Wait for work; None on shutdown, or once `idle_s` seconds have passed while another
        worker is idle too (it went idle later: its team is the warmer one)."""
        while True:
            try:
                return inbox.get(timeout=self.idle_s)
            except queue.Empty:
                with self._lock:
                    if inbox in self._idle and len(self._idle) > 1:
                        self._idle.remove(inbox)
                        self._threads.discard(threading.current_thread())  # room for a new one at once
                        return None
                    # otherwise it stays: the only idle worker, or just handed work (now in its inbox)

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
        """Take no more work, cancel work still waiting, let running work end, stop the workers."""
        with self._lock:
            self._closed = True
            waiting, self._backlog = list(self._backlog), deque()
            idle, self._idle = self._idle, []
            threads = list(self._threads)
        for future, *_ in waiting:
            future.cancel()
        for inbox in idle:
            inbox.put(None)
        for thread in threads:
            if thread is not threading.current_thread():
                thread.join()
