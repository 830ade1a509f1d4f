"""Training route: train a model from a scene folder on the server, as a job (API key)."""
from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse

from ..deps import ApiKeyDep, Services, ServicesDep, note
from ..errors import BadInput
from ..registry import check_name
from ..schemas import JobOut, TrainingRequest
from .common import errors

router = APIRouter(prefix="/v1", tags=["trainings"])


def _scene_dir(services: Services, raw: str) -> Path:
    """The scene folder, checked before the job is queued (so bad input never starts a job)."""
    scene = Path(raw).expanduser()
    if not scene.is_absolute():
        raise BadInput(f"scene: {raw!r} must be an absolute path on the server", field="scene",
                       code="invalid_scene")
    scene = scene.resolve()  # follows symlinks, so a link out of scene_root is caught too
    root = services.settings.scene_root
    if root is not None and not scene.is_relative_to(Path(root).expanduser().resolve()):
        raise BadInput(f"scene: {raw!r} is outside the allowed folder scene_root={root}", field="scene",
                       code="invalid_scene")
    if not (scene / "scene.json").is_file():
        raise BadInput(f"scene: {raw!r} is not a scene folder (no scene.json)", field="scene",
                       code="invalid_scene")
    return scene


@router.post("/trainings", operation_id="start_training", status_code=202, response_model=JobOut,
             responses={202: {"description": "a training job was queued; poll Location"},
                        **errors(400, 401, 404, 413, 422, 503)},
             summary="Train and register a model from a scene folder on the server (API key)")
def start_training(key: ApiKeyDep, body: TrainingRequest, services: ServicesDep, request: Request):
    s = services.settings
    name = check_name(body.name)
    if body.steps is not None and body.steps > s.max_train_steps:
        raise BadInput(f"steps: {body.steps} is over the limit; allowed 1 to max_train_steps={s.max_train_steps}",
                       field="steps", code="too_many_steps")
    if body.budget_seconds is not None and body.budget_seconds > s.max_train_seconds:
        raise BadInput(f"budget_seconds: {body.budget_seconds:g} is over the limit; allowed up to "
                       f"max_train_seconds={s.max_train_seconds:g}", field="budget_seconds",
                       code="budget_too_large")
    scene = _scene_dir(services, body.scene)
    services.registry()  # 503 now, not in the job, while the registry cannot be opened
    # max_train_seconds always caps the wall clock, whatever the caller asked for
    budget = body.budget_seconds if body.budget_seconds is not None else s.max_train_seconds

    spec = {"scene": str(scene), "name": name, "resolution": body.resolution, "steps": body.steps,
            "budget": budget, "seed": body.seed, "tau": body.tau, "max_size": body.max_size or None}
    job = services.jobs.submit("training", spec, total=body.steps or 0, model=name)
    note(request, model=name, job=job["id"], key=key)
    return JSONResponse(job, status_code=202, headers={"Location": f"/v1/jobs/{job['id']}"})
