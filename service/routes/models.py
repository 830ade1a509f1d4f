"""Model routes: list, describe, delete, and the frame answers (between, upload form, fill)."""
from __future__ import annotations

from typing import Annotated, Literal, Mapping

from fastapi import APIRouter, File, Form, Query, Request, UploadFile
from fastapi import Path as PathParam
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from ...models.engine import Endpoint
from ...models.fullsize import sized
from ...models.params import ParamSpace
from ..answers import Answer, between_answer, fill_answer, fill_chunk
from ..deps import ApiKeyDep, ModelName, Services, ServicesDep, note
from ..errors import BadInput, TooLarge
from ..imaging import decode_base64, open_image, to_model_array
from ..registry import ModelVersion
from ..schemas import (
    MAX_VERSION,
    REFINE_REQUEST,
    SIZE,
    BetweenManifestOut,
    BetweenOut,
    BetweenRequest,
    DeletedOut,
    FillManifestOut,
    FillOut,
    FillRequest,
    JobOut,
    ModelListOut,
    ModelOut,
)
from .common import errors, media, respond

router = APIRouter(prefix="/v1", tags=["models"])

_FRAME_EXAMPLE = {"index": 1, "t": 0.1111, "image": "iVBORw0KGgo...", "confidence": 0.93, "accepted": True,
                  "params": {"lamp_azimuth": 40.1, "lamp_elevation": 42.3}}


# -- helpers (blocking ones run on a thread, torch ones on the inference pool) -----------------
def _check_params(space: ParamSpace, values: Mapping[str, float], field: str) -> None:
    try:
        space.vector(values)
    except ValueError as exc:
        raise BadInput(f"{field}: {exc}", field=field, code="invalid_params") from None


def _resolve_end(end, field: str, space: ParamSpace, max_image_pixels: int):
    """One end as a decoded PIL image or as its checked settings mapping. `end` is an EndRequest
    (JSON body) or the bytes of an uploaded file."""
    if isinstance(end, bytes):
        return open_image(end, field=field, max_image_pixels=max_image_pixels)
    if end.image is None:
        _check_params(space, end.params, f"{field}.params")
        return end.params
    data = decode_base64(end.image, field=f"{field}.image")
    return open_image(data, field=f"{field}.image", max_image_pixels=max_image_pixels)


def _endpoint(end, engine) -> Endpoint:
    if isinstance(end, Mapping):
        return Endpoint(params=dict(end))
    return Endpoint(image=to_model_array(end, engine.resolution, engine.channels))


def _output_pixels(services: Services, entry: ModelVersion, size, frames: int, limit: str) -> int:
    """Pixels of `frames` frames at `size`; 422 for a size the model cannot make, 413 over `limit`."""
    try:
        width, height = services.cache.frame_size(entry, size)
    except ValueError as exc:
        raise BadInput(str(exc), field="size", code="invalid_size") from None
    pixels = frames * width * height
    top = getattr(services.settings, limit)
    if pixels > top:
        raise TooLarge(f"{frames} frames of {width} x {height} px are {pixels} pixels, over the limit {limit}={top}; "
                       f"ask for a smaller size or fewer frames", field="size",
                       code="output_too_large")
    return pixels


def _between(services: Services, name: str, version: int | None, start, end, frames: int, route: str,
             min_confidence: float, refine: bool = True, size="full", fmt: str = "png", quality: int = 90) -> Answer:
    """The whole answer on the inference pool, in one hop from the event loop (measured: each
    extra hop through a worker thread added about a millisecond under load on 2 cores): the model
    version, both ends, the frames at their size and their files."""
    cache = services.cache
    entry = cache.lookup(name, version)
    _output_pixels(services, entry, size, frames, "max_output_pixels")
    space = cache.space(entry)
    limit = services.settings.max_image_pixels
    start, end = _resolve_end(start, "start", space, limit), _resolve_end(end, "end", space, limit)
    engine = cache.engine(entry)
    ans = engine.between(_endpoint(start, engine), _endpoint(end, engine), frames=frames, route=route,
                         min_confidence=min_confidence, refine=refine)
    sized(engine, ans.frames, size)
    return between_answer(ans, entry.name, entry.version, fmt, quality)


def _frame_limit(services: Services, frames: int) -> None:
    limit = services.settings.max_frames
    if frames > limit:
        raise BadInput(f"frames: {frames} is over the limit; allowed 1 to max_frames={limit}", field="frames",
                       code="too_many_frames")


async def _answer_between(request: Request, services: Services, name: str, start, end, *, frames: int,
                          route: str, min_confidence: float, version: int | None, refine: bool = True,
                          size="full", fmt: str = "png", quality: int = 90):
    answer = await services.admission.run(_between, services, name, version, start, end, frames, route,
                                          min_confidence, refine, size, fmt, quality)
    services.metrics.frames(answer.model, len(answer.frames), answer.rejected)
    note(request, model=answer.model, version=answer.version, frames=len(answer.frames), rejected=answer.rejected)
    return respond(request, answer)


# -- routes -------------------------------------------------------------------------------------
@router.get("/models", operation_id="list_models", response_model=ModelListOut,
            responses=errors(503), summary="Every registered model and its latest version")
def list_models(services: ServicesDep) -> ModelListOut:
    rows = services.registry().list_models()
    return ModelListOut(models=[{"name": r.name, "latest_version": r.latest_version, "versions": r.n_versions,
                                 "latest_created": r.latest_created} for r in rows])


@router.get("/models/{name}", operation_id="get_model", response_model=ModelOut,
            responses=errors(404, 422, 503),
            summary="Versions, parameter spec, metrics, calibration, detail transfer")
def get_model(name: ModelName, services: ServicesDep,
              version: Annotated[int | None, Query(ge=1, le=MAX_VERSION, description="version to describe (default: latest)")]
              = None) -> ModelOut:
    registry = services.registry()
    versions = registry.versions(name)
    chosen = registry.get(name, version)
    manifest = services.cache.manifest(chosen)
    return ModelOut(name=name, latest_version=versions[-1].version, version=chosen.version,
                    versions=[{"version": v.version, "created": v.created, "hash": v.hash, "metrics": v.metrics}
                              for v in versions],
                    parameters=manifest.space.to_list(), resolution=manifest.resolution, channels=manifest.channels,
                    metrics=chosen.metrics, calibration=manifest.calibration_summary(),
                    refine=manifest.refine.summary())


@router.delete("/models/{name}/{version}", operation_id="delete_model_version", response_model=DeletedOut,
               responses=errors(401, 404, 422, 503), summary="Delete one version (API key)")
def delete_model_version(key: ApiKeyDep, name: ModelName, version: Annotated[int, PathParam(ge=1, le=MAX_VERSION)],
                         services: ServicesDep, request: Request) -> DeletedOut:
    # the key comes first in the signature, so an unauthenticated caller learns nothing else
    services.registry().delete(name, version)
    note(request, model=name, version=version, key=key)
    return DeletedOut(model=name, version=version)


@router.post("/models/{name}/between", operation_id="between", response_model=BetweenOut,
             responses={200: media("in-between frames (JSON, or a ZIP of PNGs with manifest.json on "
                                   "Accept: application/zip)", manifest=BetweenManifestOut),
                        **errors(400, 404, 413, 422, 429, 503)},
             summary="Frames between two ends (images or settings)")
async def between(name: ModelName, body: BetweenRequest, request: Request, services: ServicesDep):
    _frame_limit(services, body.frames)
    return await _answer_between(request, services, name, body.start, body.end, frames=body.frames, route=body.route,
                                 min_confidence=body.min_confidence, version=body.version, refine=body.refine,
                                 size=body.size, fmt=body.format, quality=body.quality)


_UPLOAD_EXAMPLE = {"start": "(PNG or JPEG file)", "end": "(PNG or JPEG file)", "frames": 8, "route": "geodesic",
                   "min_confidence": 0.5}


@router.post("/models/{name}/between/upload", operation_id="between_upload", response_model=BetweenOut,
             responses={200: media("as for between", manifest=BetweenManifestOut),
                        **errors(400, 404, 413, 422, 429, 503)},
             summary="Frames between two uploaded image files (multipart form)",
             openapi_extra={"requestBody": {"content": {"multipart/form-data": {"example": _UPLOAD_EXAMPLE}}}})
async def between_upload(
        name: ModelName, request: Request, services: ServicesDep,
        start: Annotated[UploadFile, File(description="PNG or JPEG of the first end")],
        end: Annotated[UploadFile, File(description="PNG or JPEG of the last end")],
        frames: Annotated[int, Form(ge=1, description="in-between frames (at most max_frames)")] = 8,
        route: Annotated[Literal["geodesic", "straight"], Form()] = "geodesic",
        min_confidence: Annotated[float, Form(ge=0.0, le=1.0, allow_inf_nan=False)] = 0.5,
        version: Annotated[int | None, Form(ge=1, le=MAX_VERSION)] = None,
        refine: Annotated[bool, Form(description=REFINE_REQUEST)] = True,
        size: Annotated[str, Form(pattern=r"^(working|full|[0-9]{1,5})$", description=SIZE)] = "full",
        format: Annotated[Literal["png", "jpeg"], Form(description="picture format")] = "png",
        quality: Annotated[int, Form(ge=1, le=100, description="JPEG quality")] = 90):
    _frame_limit(services, frames)
    files = []
    for field, upload in (("start", start), ("end", end)):
        data = await upload.read()
        if not data:
            raise BadInput(f"{field}: the uploaded file is empty", field=field, code="invalid_image")
        files.append(data)
    return await _answer_between(request, services, name, files[0], files[1], frames=frames, route=route,
                                 min_confidence=min_confidence, version=version, refine=refine,
                                 size=int(size) if size.isdigit() else size, fmt=format, quality=quality)


@router.post("/models/{name}/fill", operation_id="fill", response_model=FillOut,
             responses={200: media("one frame per target (JSON, or a ZIP on Accept: application/zip)",
                                   manifest=FillManifestOut),
                        202: {"model": JobOut, "description": "too many targets to answer at once (or as_job): "
                                                              "a job was queued; poll Location"},
                        **errors(400, 404, 413, 422, 429, 503)},
             summary="Frames at given settings (missing views); large batches run as jobs")
async def fill(name: ModelName, body: FillRequest, request: Request, services: ServicesDep):
    s = services.settings
    n = len(body.targets)
    if n > s.max_fill_targets:
        raise BadInput(f"targets: {n} targets is over the limit; allowed 1 to max_fill_targets="
                       f"{s.max_fill_targets}", field="targets", code="too_many_targets")

    def checked() -> tuple[ModelVersion, float | None, bool]:  # one hop: the version, the size, every target
        entry = services.cache.lookup(name, body.version)
        space = services.cache.space(entry)
        for i, target in enumerate(body.targets):
            _check_params(space, target, f"targets[{i}]")
        try:  # answered at once only within max_output_pixels; a job within max_job_pixels
            _output_pixels(services, entry, body.size, n, "max_output_pixels")
            fits = True
        except TooLarge:
            _output_pixels(services, entry, body.size, n, "max_job_pixels")
            fits = False
        return entry, services.cache.manifest(entry).tau, fits

    entry, tau, fits = await run_in_threadpool(checked)
    targets, min_conf, refine = body.targets, body.min_confidence, body.refine
    out = (body.size, body.format, body.quality)
    if n <= s.max_fill_sync and fits and not body.as_job:
        frames = await services.admission.run(fill_chunk, services.cache, entry, targets, min_conf, 0, refine, *out)
        answer = fill_answer(frames, entry.name, entry.version, tau, body.format)
        services.metrics.frames(entry.name, len(frames), answer.rejected)
        note(request, model=entry.name, version=entry.version, frames=len(frames), rejected=answer.rejected)
        return respond(request, answer)

    spec = {"model": entry.name, "version": entry.version, "targets": [dict(t) for t in targets],
            "min_confidence": min_conf, "refine": refine, "chunk": s.max_fill_sync, "size": body.size,
            "format": body.format, "quality": body.quality}
    job = await run_in_threadpool(services.jobs.submit, "fill", spec, total=n, model=entry.name,
                                  version=entry.version, tau=tau)
    note(request, model=entry.name, version=entry.version, job=job["id"])
    return JSONResponse(job, status_code=202, headers={"Location": f"/v1/jobs/{job['id']}"})
