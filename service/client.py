"""Typed HTTP client of the geotween service (httpx).

    from geotween.service.answers import frame_file

    with Client("http://127.0.0.1:8000") as c:
        answer = c.between("relief-tile", {"lamp_azimuth": 30, "lamp_elevation": 40}, "end.png", frames=8,
                           size="full", format="jpeg", quality=90)
        for f in answer.frames:
            if f.accepted:   # frame_0001.jpg, ...: answers.frame_file names files as the service's ZIP does
                Path(frame_file("between", f.index, answer.format)).write_bytes(f.png())
        # f.pil(), f.array(): (H, W, C) float32 in [0, 1]; answer.size: [width, height] of every frame

Answers are parsed into the service's own wire models (service/schemas.py, re-exported here):
BetweenOut, FillOut, ModelOut, JobOut, LatentMapOut, ... are what /openapi.json documents. Keys a
newer server adds are ignored; an answer that breaks the contract raises ClientError with code
'invalid_answer'. Every failure raises ClientError(status, code, message, field); status is None
when the server could not be reached. Pass `transport=httpx.MockTransport(handler)` to test
without a server. Frames are synthesized by a learned model, not captured.

`size` ("working", "full" or a long side in pixels), `format` ("png" or "jpeg") and `quality`
(1-100, JPEG only) are sent only when given, so the service's defaults (full size, PNG, 90) apply
otherwise and a service from before frames at full size is still answered; its answers carry no
`size` (None).
"""
from __future__ import annotations

import base64
import io
import time
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence, TypeVar
from urllib.parse import quote

import httpx
import numpy as np
from PIL import Image
from pydantic import BaseModel, TypeAdapter, ValidationError

from .schemas import (
    BetweenOut,
    DeletedOut,
    FillFrameOut,
    FillOut,
    FrameOut,
    HealthOut,
    JobOut,
    LatentMapOut,
    MapPointsOut,
    ModelListOut,
    ModelOut,
    ModelSummaryOut,
    ReadyOut,
    TrainingOut,
)

DEFAULT_TIMEOUT = httpx.Timeout(30.0, connect=5.0)  # seconds
FINISHED = ("done", "failed", "cancelled")  # job states that no longer change

__all__ = ["BetweenOut", "Client", "ClientError", "DeletedOut", "FillFrameOut", "FillOut", "FrameOut", "JobOut",
           "LatentMapOut", "MapPointsOut", "ModelOut", "ModelSummaryOut", "TrainingOut", "DEFAULT_TIMEOUT",
           "FINISHED"]

Model = TypeVar("Model", bound=BaseModel)
_JOB_RESULT = TypeAdapter(FillOut | TrainingOut)


class ClientError(Exception):
    """A request that failed: HTTP status (None if unreachable), error code, message, field."""

    def __init__(self, status: int | None, code: str, message: str, field: str | None = None):
        super().__init__(f"{status or 'no answer'} {code}: {message}" + (f" (field {field})" if field else ""))
        self.status, self.code, self.message, self.field = status, code, message, field


def _seg(value: object) -> str:
    """One path segment, with '/' and '.' escaped so '..' reaches the server as a name, not a hop."""
    return quote(str(value), safe="").replace(".", "%2E")


def _png_of_array(arr: np.ndarray) -> bytes:
    arr = np.asarray(arr)
    if arr.ndim == 3 and arr.shape[-1] == 1:
        arr = arr[..., 0]
    if arr.ndim not in (2, 3) or (arr.ndim == 3 and arr.shape[-1] != 3):
        raise ValueError(f"image array: shape {arr.shape} not allowed; expected (H, W), (H, W, 1) or (H, W, 3)")
    if arr.dtype != np.uint8:
        arr = np.round(np.clip(arr.astype(np.float64), 0.0, 1.0) * 255.0).astype(np.uint8)
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="PNG")
    return buf.getvalue()


def image_bytes(image: str | Path | Image.Image | np.ndarray) -> bytes:
    """PNG or JPEG bytes of an image given as a file path, a PIL image or an array in [0, 1] (or uint8)."""
    if isinstance(image, (str, Path)):
        return Path(image).read_bytes()
    if isinstance(image, Image.Image):
        buf = io.BytesIO()
        image.save(buf, format="PNG")
        return buf.getvalue()
    if isinstance(image, np.ndarray):
        return _png_of_array(image)
    raise TypeError(f"image: {type(image).__name__} not allowed; expected a path, a PIL image or a numpy array")


def output_fields(size: str | int | None, format: str | None, quality: int | None) -> dict:
    """The picture fields of a between or fill request (`size`, `format`, `quality`), those given only."""
    given = {"size": size, "format": format, "quality": quality}
    return {k: v for k, v in given.items() if v is not None}


def end_json(end: Any) -> dict:
    """The wire form of one end: a mapping is settings; anything else is an image."""
    if isinstance(end, Mapping):
        return {"params": {str(k): float(v) for k, v in end.items()}}
    return {"image": base64.b64encode(image_bytes(end)).decode("ascii")}


class Client:
    """Client of one geotween service. Writes (train, delete) need `api_key`."""

    def __init__(self, base_url: str, *, api_key: str | None = None, timeout: httpx.Timeout = DEFAULT_TIMEOUT,
                 transport: httpx.BaseTransport | None = None, poll_interval: float = 0.25):
        if not poll_interval > 0:
            raise ValueError(f"poll_interval: {poll_interval!r} is not allowed; expected seconds > 0")
        headers = {"Authorization": f"Bearer {api_key}"} if api_key else {}
        self.poll_interval = float(poll_interval)
        self._http = httpx.Client(base_url=base_url.rstrip("/"), timeout=timeout, transport=transport,
                                  headers=headers)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- plumbing -----------------------------------------------------------------------------
    def _request(self, method: str, path: str, **kw) -> httpx.Response:
        try:
            response = self._http.request(method, path, **kw)
        except httpx.TransportError as exc:
            raise ClientError(None, "unreachable", f"{method} {path}: {exc}") from exc
        if response.status_code >= 400:
            try:
                err = response.json()["error"]
                raise ClientError(response.status_code, str(err.get("code")), str(err.get("message")),
                                  err.get("field"))
            except (ValueError, KeyError, TypeError, AttributeError):
                raise ClientError(response.status_code, "http_error", response.text[:300]) from None
        return response

    def _parse(self, model: type[Model], response: httpx.Response) -> Model:
        """The answer as `model`, keys a newer server adds ignored; ClientError when it breaks the contract."""
        return self._validate(lambda: model.model_validate_json(response.content, extra="ignore"), model.__name__,
                              response)

    @staticmethod
    def _validate(parse: Callable[[], Any], name: str, response: httpx.Response) -> Any:
        try:
            return parse()
        except ValidationError as exc:
            first = exc.errors()[0]
            where = ".".join(str(x) for x in first["loc"]) or "(the body)"
            raise ClientError(response.status_code, "invalid_answer",
                              f"{response.request.method} {response.request.url.path}: the answer is not a {name} "
                              f"({where}: {first['msg']})") from None

    def _get(self, model: type[Model], method: str, path: str, **kw) -> Model:
        return self._parse(model, self._request(method, path, **kw))

    # -- service ------------------------------------------------------------------------------
    def health(self) -> bool:
        return self._get(HealthOut, "GET", "/healthz").status == "ok"

    def ready(self) -> bool:
        try:
            return self._get(ReadyOut, "GET", "/readyz").status == "ready"
        except ClientError as exc:
            if exc.status == 503:
                return False
            raise

    def metrics(self) -> str:
        """The service's Prometheus metrics, in the Prometheus text format."""
        return self._request("GET", "/metrics").text

    def models(self) -> list[ModelSummaryOut]:
        return self._get(ModelListOut, "GET", "/v1/models").models

    def model(self, name: str, version: int | None = None) -> ModelOut:
        """Versions, parameter spec, metrics, calibration and detail transfer (`refine.on`) of a model."""
        params = {"version": version} if version is not None else None
        return self._get(ModelOut, "GET", f"/v1/models/{_seg(name)}", params=params)

    def delete(self, name: str, version: int) -> DeletedOut:
        """Delete one version (needs `api_key`)."""
        return self._get(DeletedOut, "DELETE", f"/v1/models/{_seg(name)}/{_seg(version)}")

    # -- frames -------------------------------------------------------------------------------
    def between(self, name: str, start: Any, end: Any, frames: int = 8, route: str = "geodesic",
                min_confidence: float = 0.5, version: int | None = None, refine: bool = True, *,
                size: str | int | None = None, format: str | None = None, quality: int | None = None
                ) -> BetweenOut:
        """Frames between two ends; each end is an image path, PIL image, array, or a settings dict.
        refine=False skips detail transfer on a model that refines (faster, softer frames). `size`:
        "working", "full" or a long side in pixels (None: the service's default, full); `format`:
        "png" or "jpeg"; `quality`: JPEG quality 1-100."""
        body = {"start": end_json(start), "end": end_json(end), "frames": frames, "route": route,
                "min_confidence": min_confidence, "refine": bool(refine), **output_fields(size, format, quality)}
        if version is not None:
            body["version"] = version
        return self._get(BetweenOut, "POST", f"/v1/models/{_seg(name)}/between", json=body)

    def between_upload(self, name: str, start: Any, end: Any, frames: int = 8, route: str = "geodesic",
                       min_confidence: float = 0.5, version: int | None = None, refine: bool = True, *,
                       size: str | int | None = None, format: str | None = None, quality: int | None = None
                       ) -> BetweenOut:
        """As between, with both ends sent as image files in a multipart form (no base64); each end
        is an image path, PIL image or array."""
        files = {}
        for side, given in (("start", start), ("end", end)):
            if isinstance(given, Mapping):
                raise TypeError(f"{side}: settings cannot be uploaded as a file; use between() for settings ends")
            data = image_bytes(given)
            files[side] = (f"{side}.{_kind(data)}", data, f"image/{_kind(data)}")
        form = {"frames": str(frames), "route": route, "min_confidence": repr(float(min_confidence)),
                "refine": "true" if refine else "false"}
        if version is not None:
            form["version"] = str(version)
        form.update({k: str(v) for k, v in output_fields(size, format, quality).items()})
        return self._get(BetweenOut, "POST", f"/v1/models/{_seg(name)}/between/upload", files=files, data=form)

    @staticmethod
    def _fill_body(targets: Sequence[Mapping[str, float]], min_confidence: float, version: int | None,
                   as_job: bool, refine: bool, output: dict) -> dict:
        body = {"targets": [{str(k): float(v) for k, v in t.items()} for t in targets],
                "min_confidence": min_confidence, "as_job": as_job, "refine": bool(refine), **output}
        if version is not None:
            body["version"] = version
        return body

    def fill(self, name: str, targets: Sequence[Mapping[str, float]], *, min_confidence: float = 0.5,
             version: int | None = None, as_job: bool = False,
             progress: Callable[[int, int], None] | None = None, wait_timeout: float = 600.0,
             refine: bool = True, size: str | int | None = None, format: str | None = None,
             quality: int | None = None) -> FillOut:
        """One frame per target; when the server runs the fill as a job (202: too many targets, or
        more frame pixels than one answer may hold), the job is polled until it is done and its
        result returned (start_fill gives the job itself). `size`, `format`, `quality` as in between."""
        body = self._fill_body(targets, min_confidence, version, as_job, refine, output_fields(size, format, quality))
        response = self._request("POST", f"/v1/models/{_seg(name)}/fill", json=body)
        if response.status_code == 202:
            job = self.wait(self._parse(JobOut, response).id, progress=progress, timeout=wait_timeout)
            return self._job_answer(job, FillOut)
        answer = self._parse(FillOut, response)
        if progress is not None:
            progress(len(answer.frames), len(answer.frames))
        return answer

    def start_fill(self, name: str, targets: Sequence[Mapping[str, float]], *, min_confidence: float = 0.5,
                   version: int | None = None, refine: bool = True, size: str | int | None = None,
                   format: str | None = None, quality: int | None = None) -> JobOut:
        """Queue a fill as a job whatever its size; follow it with job / wait, collect it with result."""
        body = self._fill_body(targets, min_confidence, version, True, refine, output_fields(size, format, quality))
        response = self._request("POST", f"/v1/models/{_seg(name)}/fill", json=body)
        if response.status_code != 202:
            raise ClientError(response.status_code, "invalid_answer",
                              f"POST /v1/models/{name}/fill with as_job: expected 202 and a job, got "
                              f"{response.status_code}")
        return self._parse(JobOut, response)

    # -- latent map ---------------------------------------------------------------------------
    def latent_map(self, name: str, version: int | None = None) -> LatentMapOut:
        """Every bank code of the model on its 2-D latent map (PCA fitted on the bank)."""
        params = {"version": version} if version is not None else None
        return self._get(LatentMapOut, "GET", f"/v1/models/{_seg(name)}/map", params=params)

    def place_on_map(self, name: str, codes: Sequence[Sequence[float]] | np.ndarray,
                     version: int | None = None) -> MapPointsOut:
        """Latent codes (a between answer's `start_code`, frames' `code`, `end_code`) on the same map."""
        body: dict[str, Any] = {"codes": [[float(c) for c in code] for code in codes]}
        if version is not None:
            body["version"] = version
        return self._get(MapPointsOut, "POST", f"/v1/models/{_seg(name)}/map", json=body)

    # -- jobs ---------------------------------------------------------------------------------
    def job(self, job_id: str) -> JobOut:
        return self._get(JobOut, "GET", f"/v1/jobs/{_seg(job_id)}")

    def cancel(self, job_id: str) -> JobOut:
        return self._get(JobOut, "DELETE", f"/v1/jobs/{_seg(job_id)}")

    def result(self, job_id: str) -> FillOut | TrainingOut:
        """A done job's result: a fill's frames or a training's registered version."""
        response = self._request("GET", f"/v1/jobs/{_seg(job_id)}/result")
        return self._validate(lambda: _JOB_RESULT.validate_json(response.content, extra="ignore"),
                              "FillOut or TrainingOut", response)

    def wait(self, job_id: str, *, progress: Callable[[int, int], None] | None = None,
             timeout: float = 600.0) -> JobOut:
        """Poll a job until it is done, failed or cancelled (at most `timeout` seconds)."""
        deadline = time.monotonic() + timeout
        while True:
            status = self.job(job_id)
            if progress is not None:
                progress(status.progress.done, status.progress.total)
            if status.state in FINISHED:
                return status
            if time.monotonic() > deadline:
                raise ClientError(None, "timeout", f"job {job_id} still {status.state} after {timeout:g} s "
                                                   f"({status.progress.done}/{status.progress.total})")
            time.sleep(self.poll_interval)

    def _job_answer(self, job: JobOut, model: type[Model]) -> Model:
        """The result of a finished job as `model`; ClientError when it failed or was cancelled."""
        if job.state != "done":
            err = job.error
            raise ClientError(None, err.code if err else f"job_{job.state}",
                              err.message if err else f"job {job.id} was {job.state}", err.field if err else None)
        answer = self.result(job.id)
        if not isinstance(answer, model):
            raise ClientError(200, "invalid_answer", f"job {job.id}: the result is not a {model.__name__}")
        return answer

    def train(self, scene: str, name: str, *, steps: int | None = None, budget_seconds: float | None = None,
              seed: int = 0, resolution: int = 64, wait: bool = False,
              progress: Callable[[int, int], None] | None = None, timeout: float = 3600.0) -> JobOut | TrainingOut:
        """Start a training job on a scene folder on the server (API key): the job, or with `wait`
        the registered version once it is done."""
        body: dict[str, Any] = {"scene": str(scene), "name": name, "seed": seed, "resolution": resolution}
        if steps is not None:
            body["steps"] = steps
        if budget_seconds is not None:
            body["budget_seconds"] = budget_seconds
        job = self._get(JobOut, "POST", "/v1/trainings", json=body)
        if not wait:
            return job
        return self._job_answer(self.wait(job.id, progress=progress, timeout=timeout), TrainingOut)


def _kind(data: bytes) -> str:
    """'png' or 'jpeg' from an image file's first bytes (PNG and JPEG signatures, common practice)."""
    return "jpeg" if data[:3] == b"\xff\xd8\xff" else "png"
