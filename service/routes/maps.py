"""Latent map routes: the bank's codes on a 2-D map (PCA fitted on the bank), and any codes placed
on the same map.

    GET  /v1/models/{name}/map     every bank code as a point, with its sample's settings
    POST /v1/models/{name}/map     {"codes": [[...], ...]} -> the same map's coordinates of each code

A between answer carries each frame's `code` and the `start_code` / `end_code`, so a caller draws
a route by posting them here. Both answers come from `models.latent_map`, the one place the
projection is computed.
"""
from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request
from starlette.concurrency import run_in_threadpool

from ..cache import ModelCache
from ..deps import ModelName, ServicesDep, note
from ..errors import BadInput
from ..registry import ModelVersion
from ..schemas import MAX_VERSION, LatentMapOut, MapPointsOut, MapRequest
from .common import errors

router = APIRouter(prefix="/v1", tags=["models"])


def _bank_map(cache: ModelCache, entry: ModelVersion) -> dict:
    engine = cache.engine(entry)
    codes, params = engine.bundle.codes, engine.bundle.params
    lmap = engine.latent_map
    xy = lmap.project(codes)
    bank = [{"index": i + 1, "x": float(x), "y": float(y), "params": engine.space.named(p)}
            for i, ((x, y), p) in enumerate(zip(xy, params))]
    return {"model": entry.name, "version": entry.version, "latent_dim": lmap.latent_dim,
            "explained": [float(e) for e in lmap.explained], "bank": bank}


def _place(cache: ModelCache, entry: ModelVersion, codes: list[list[float]]) -> list[dict]:
    engine = cache.engine(entry)
    d = engine.bundle.codes.shape[1]
    for i, code in enumerate(codes):
        if len(code) != d:
            raise BadInput(f"codes[{i}]: {len(code)} values; model {entry.name!r} has latent_dim={d}",
                           field=f"codes[{i}]", code="invalid_codes")
    xy = engine.latent_map.project(codes)
    return [{"x": float(x), "y": float(y)} for x, y in xy]


@router.get("/models/{name}/map", operation_id="latent_map", response_model=LatentMapOut,
            responses=errors(404, 422, 429, 503), summary="The bank's latent codes on a 2-D map (PCA of the bank)")
async def latent_map(name: ModelName, services: ServicesDep, request: Request,
                     version: Annotated[int | None, Query(ge=1, le=MAX_VERSION, description="model version (default: latest)")]
                     = None) -> LatentMapOut:
    entry = await run_in_threadpool(services.cache.lookup, name, version)
    body = await services.admission.run(_bank_map, services.cache, entry)
    note(request, model=entry.name, version=entry.version)
    return LatentMapOut(**body)


@router.post("/models/{name}/map", operation_id="place_on_map", response_model=MapPointsOut,
             responses=errors(400, 404, 413, 422, 429, 503),
             summary="Place latent codes (a route's frames and ends) on the bank's map")
async def place_on_map(name: ModelName, body: MapRequest, services: ServicesDep, request: Request) -> MapPointsOut:
    limit = services.settings.max_map_codes
    if len(body.codes) > limit:
        raise BadInput(f"codes: {len(body.codes)} codes is over the limit; allowed 1 to max_map_codes={limit}",
                       field="codes", code="too_many_codes")
    entry = await run_in_threadpool(services.cache.lookup, name, body.version)
    points = await services.admission.run(_place, services.cache, entry, body.codes)
    note(request, model=entry.name, version=entry.version)
    return MapPointsOut(model=entry.name, version=entry.version, points=points)
