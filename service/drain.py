"""Serving with a clean stop. On SIGTERM the app is marked draining (/readyz answers 503) while the
server goes on accepting and serving for ``drain_s`` seconds, long enough for a load balancer that
polls readiness to stop sending; then uvicorn's own shutdown runs: it stops accepting, gives the
requests in flight ``grace_s`` seconds to finish (uvicorn's ``timeout_graceful_shutdown``), runs
the app's lifespan shutdown, and the process exits 0.

SIGINT (Ctrl+C) keeps uvicorn's behaviour: a graceful stop at once, forced by a second one. A
second SIGTERM during the drain ends the drain early; the graceful stop still runs.
"""
from __future__ import annotations

import logging
import signal
import time
from types import FrameType
from typing import Callable

import uvicorn

log = logging.getLogger("geotween.drain")


class DrainingServer(uvicorn.Server):
    """A uvicorn Server that answers SIGTERM with a drain of `drain_s` seconds before its shutdown;
    `on_drain()` runs at the signal (keep it to setting a flag: it runs in the signal handler)."""

    def __init__(self, config: uvicorn.Config, *, on_drain: Callable[[], None], drain_s: float,
                 clock: Callable[[], float] = time.monotonic):
        super().__init__(config)
        self.on_drain, self.drain_s, self.clock = on_drain, float(drain_s), clock
        self.drain_ends: float | None = None
        self._announced = False

    def handle_exit(self, sig: int, frame: FrameType | None) -> None:
        if sig != signal.SIGTERM:
            return super().handle_exit(sig, frame)
        # Not passed to uvicorn: it records the signals it handled and raises them again once the
        # server has stopped, and a SIGTERM raised then ends the process by the signal, not with 0.
        if self.drain_ends is None:
            self.drain_ends = self.clock() + self.drain_s
            self.on_drain()
        else:
            self.should_exit = True

    async def on_tick(self, counter: int) -> bool:
        # uvicorn's main loop calls this every 0.1 s; once it returns True the shutdown begins
        if self.drain_ends is not None:
            if not self._announced:  # logged here, not in the signal handler (logging takes locks)
                self._announced = True
                log.info("SIGTERM: draining for %.1f s (/readyz answers 503), then stopping with %.1f s "
                         "for requests in flight", self.drain_s, self.config.timeout_graceful_shutdown or 0.0)
            if self.clock() >= self.drain_ends:
                self.should_exit = True
        return await super().on_tick(counter)


def serve(app, *, host: str, port: int, drain_s: float, grace_s: float, **config) -> bool:
    """Run `app` on uvicorn until SIGTERM (drained) or SIGINT; `config` goes to uvicorn.Config.
    True when the server started (False: it could not, e.g. the port was taken)."""
    cfg = uvicorn.Config(app, host=host, port=port, timeout_graceful_shutdown=grace_s, **config)

    def mark_draining() -> None:
        app.state.draining = True

    server = DrainingServer(cfg, on_drain=mark_draining, drain_s=drain_s)
    try:
        server.run()
    except KeyboardInterrupt:  # uvicorn raises a handled SIGINT again once it has stopped
        pass
    return server.started
