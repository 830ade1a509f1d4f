"""Job routes: status and progress, result (JSON or ZIP), cancel. Jobs are kept in the jobs database
(service/durable.py), so they outlive a restart."""
from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Request
from fastapi import Path as PathParam
from fastapi.responses import JSONResponse

from ..answers import Answer
from ..deps import OfferedKey, ServicesDep, authorize
from ..schemas import FillManifestOut, FillOut, JobOut, TrainingOut
from .common import errors, media, respond

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])

JobId = Annotated[str, PathParam(pattern=r"^[0-9a-f]{32}$", description="job id, as returned with 202")]


@router.get("/{job_id}", operation_id="get_job", response_model=JobOut, responses=errors(404, 422),
            summary="State and progress of a job")
def get_job(job_id: JobId, services: ServicesDep) -> dict:
    return services.jobs.get(job_id)


@router.get("/{job_id}/result", operation_id="get_job_result", response_model=FillOut | TrainingOut,
            responses={200: media("a fill job's frames (JSON, or a ZIP on Accept: application/zip), or a "
                                  "training job's registered version", manifest=FillManifestOut),
                       **errors(404, 409, 422)},
            summary="The result of a done job")
def get_job_result(job_id: JobId, services: ServicesDep, request: Request):
    result = services.jobs.result(job_id)
    if isinstance(result, Answer):
        return respond(request, result)
    return JSONResponse(result)


@router.delete("/{job_id}", operation_id="cancel_job", response_model=JobOut,
               responses=errors(401, 404, 409, 422),
               summary="Cancel a job (a training job needs an API key)")
def cancel_job(job_id: JobId, services: ServicesDep, offered: OfferedKey) -> dict:
    if services.jobs.kind(job_id) == "training":  # it was started with a key; stopping it needs one too
        authorize(services.settings, offered)
    return services.jobs.cancel(job_id)
