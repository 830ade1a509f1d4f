"""`geotween worker`: a process that runs queued jobs and nothing else (no HTTP).

It is the service's own job runtime (service/durable.py) without the web side: start as many as
the machine has room for, each with its own GEOTWEEN_WORKER_ID, over the same jobs database and
registry as `geotween serve`. It is a process of its own, started fresh (never forked from one
that has imported torch). SIGTERM or Ctrl-C: it stops taking jobs and finishes the step it is in;
a job cut short is resumed by the next worker started with the same id.
"""
from __future__ import annotations

import logging
import signal
import sys
import threading

from .settings import Settings

log = logging.getLogger("geotween.worker")


def run_worker(settings: Settings, stop: threading.Event | None = None) -> None:
    """Run jobs until `stop` is set (by SIGTERM/SIGINT when it is not given)."""
    from .deps import Services

    if stop is None:
        stop = threading.Event()
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, lambda *_: stop.set())
    services = Services(settings.model_copy(update={"run_jobs": True}))
    try:
        services.registry()
        services.jobs.active()  # raises Unavailable while the jobs' database is down: no silent idle worker
        print(f"geotween worker {settings.worker_id}: running jobs ({settings.job_workers} at a time, "
              f"{settings.inference_workers} torch workers) from {settings.registry_root}", file=sys.stderr, flush=True)
        stop.wait()
    finally:
        services.close()
