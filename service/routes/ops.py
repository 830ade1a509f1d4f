"""Operations routes: liveness, readiness, Prometheus metrics."""
from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import Response
from prometheus_client import CONTENT_TYPE_LATEST

from ..deps import ServicesDep
from ..errors import Unavailable
from ..schemas import HealthOut, ReadyOut
from .common import errors

router = APIRouter(tags=["operations"])


@router.get("/healthz", operation_id="healthz", response_model=HealthOut, summary="The process is alive")
def healthz() -> HealthOut:
    return HealthOut(status="ok")


@router.get("/readyz", operation_id="readyz", response_model=ReadyOut, responses=errors(503),
            summary="The registry is readable (503 until it is, and from SIGTERM on)")
def readyz(services: ServicesDep, request: Request) -> ReadyOut:
    if request.app.state.draining:  # requests are still served; a load balancer should send no new ones
        raise Unavailable("the service is draining before it stops (SIGTERM): requests in flight finish, new "
                          "ones belong on another replica", code="draining")
    return ReadyOut(status="ready", generation=services.readiness())


@router.get("/metrics", operation_id="metrics", summary="Prometheus metrics (text format)",
            responses={200: {"description": "Prometheus text exposition format",
                             "content": {CONTENT_TYPE_LATEST.split(";")[0]: {"schema": {"type": "string"}}}}})
def metrics(request: Request) -> Response:
    return Response(request.app.state.metrics.render(), media_type=CONTENT_TYPE_LATEST)
