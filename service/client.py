"""Typed HTTP client of the geotween service (httpx).

    with Client("http://127.0.0.1:8000") as c:
        result = c.between("relief-tile", {"lamp_azimuth": 30, "lamp_elevation": 40}, "end.png", frames=8)
        for f in result.frames:
            f.pil().save(f"frame_{f.index}.png") if f.accepted else None

Every failure raises ClientError(status, code, message, field); status is None when the server
could not be reached. Pass `transport=httpx.MockTransport(handler)` to test without a server.
Frames are synthesized by a learned model, not captured.
"""
from __future__ import annotations

import base64
import io
import time
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

from urllib.parse import quote

import httpx
import numpy as np
from PIL import Image

DEFAULT_TIMEOUT = httpx.Timeout(30.0, connect=5.0)  # seconds

__all__ = ["BetweenResult", "Client", "ClientError", "FillResult", "Frame", "JobStatus", "ModelDetail",
           "ModelSummary", "DEFAULT_TIMEOUT"]


class ClientError(Exception):
    """A request that failed: HTTP status (None if unreachable), error code, message, field."""

    def __init__(self, status: int | None, code: str, message: str, field: str | None = None):
        super().__init__(f"{status or 'no answer'} {code}: {message}" + (f" (field {field})" if field else ""))
        self.status, self.code, self.message, self.field = status, code, message, field


@dataclass
class Frame:
    """One synthesized frame; `image` is (H, W, C) float32 in [0, 1]."""
    index: int
    image: np.ndarray
    confidence: float | None
    accepted: bool
    params: dict[str, float]
    t: float | None = None                    # between frames: fraction of the route's length
    target: dict[str, float] | None = None    # fill frames: the settings asked for
    # share of pixels, [0, 1], carried over from real training images by detail transfer (moved by an
    # estimated optical flow; the frame is still synthesized); None when the model does not refine
    detail: float | None = None

    def pil(self) -> Image.Image:
        arr = np.round(np.clip(self.image, 0.0, 1.0) * 255.0).astype(np.uint8)
        return Image.fromarray(arr[..., 0] if arr.shape[-1] == 1 else arr)


@dataclass
class BetweenResult:
    model: str
    version: int
    route: str
    frames: list[Frame]
    accepted: int
    rejected: int
    start_params: dict[str, float]
    end_params: dict[str, float]
    notice: str


@dataclass
class FillResult:
    model: str
    version: int
    frames: list[Frame]
    accepted: int
    rejected: int
    notice: str
    job_id: str | None = None                 # set when the server ran the fill as a job


@dataclass
class JobStatus:
    id: str
    kind: str
    state: str
    done: int
    total: int
    model: str | None
    version: int | None
    error: dict | None
    raw: dict = field(repr=False, default_factory=dict)

    @property
    def finished(self) -> bool:
        return self.state in ("done", "failed", "cancelled")

    @classmethod
    def from_json(cls, d: Mapping) -> "JobStatus":
        p = d.get("progress") or {}
        return cls(id=d["id"], kind=d["kind"], state=d["state"], done=int(p.get("done", 0)),
                   total=int(p.get("total", 0)), model=d.get("model"), version=d.get("version"),
                   error=d.get("error"), raw=dict(d))


@dataclass
class ModelSummary:
    name: str
    latest_version: int
    versions: int
    latest_created: str


@dataclass
class ModelDetail:
    name: str
    latest_version: int
    version: int
    versions: list[dict]
    parameters: list[dict]
    resolution: int
    channels: int
    metrics: dict
    calibration: dict
    # detail transfer: {"on", "chosen", "config", "holdout": {"decoded": {psnr, ssim}, "refined": {psnr,
    # ssim, detail}} | None, "skippable"}; empty from a server that does not report it
    refine: dict = field(default_factory=dict)

    @property
    def parameter_names(self) -> list[str]:
        return [p["name"] for p in self.parameters]

    @property
    def refines(self) -> bool:
        """True when this model's frames are refined with detail from real training images."""
        return bool(self.refine.get("on", False))


def _known(cls, d: Mapping) -> dict:
    """The keys of `d` that `cls` declares (a newer server may send more)."""
    names = {f.name for f in fields(cls)}
    return {k: v for k, v in d.items() if k in names}


def _seg(value: object) -> str:
    """One path segment, with '/' and '.' escaped so '..' reaches the server as a name, not a hop."""
    return quote(str(value), safe="").replace(".", "%2E")


def _decode_png(text: str) -> np.ndarray:
    with Image.open(io.BytesIO(base64.b64decode(text))) as img:
        arr = np.asarray(img.convert("L" if img.mode in ("L", "I", "I;16") else "RGB"), dtype=np.float32) / 255.0
    return arr[..., None] if arr.ndim == 2 else arr


def _frames(items: Sequence[Mapping]) -> list[Frame]:
    return [Frame(index=int(f["index"]), image=_decode_png(f["image"]), confidence=f.get("confidence"),
                  accepted=bool(f["accepted"]), params=dict(f.get("params") or {}), t=f.get("t"),
                  target=f.get("target"), detail=None if f.get("detail") is None else float(f["detail"]))
            for f in items]


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

    def _json(self, method: str, path: str, **kw) -> Any:
        return self._request(method, path, **kw).json()

    # -- service ------------------------------------------------------------------------------
    def health(self) -> bool:
        return self._json("GET", "/healthz").get("status") == "ok"

    def ready(self) -> bool:
        try:
            return self._json("GET", "/readyz").get("status") == "ready"
        except ClientError as exc:
            if exc.status == 503:
                return False
            raise

    def models(self) -> list[ModelSummary]:
        return [ModelSummary(**_known(ModelSummary, m)) for m in self._json("GET", "/v1/models")["models"]]

    def model(self, name: str, version: int | None = None) -> ModelDetail:
        params = {"version": version} if version is not None else None
        d = _known(ModelDetail, self._json("GET", f"/v1/models/{_seg(name)}", params=params))
        d["refine"] = dict(d.get("refine") or {})
        return ModelDetail(**d)

    def delete(self, name: str, version: int) -> None:
        self._json("DELETE", f"/v1/models/{_seg(name)}/{_seg(version)}")

    # -- frames -------------------------------------------------------------------------------
    def between(self, name: str, start: Any, end: Any, frames: int = 8, route: str = "geodesic",
                min_confidence: float = 0.5, version: int | None = None, refine: bool = True) -> BetweenResult:
        """Frames between two ends; each end is an image path, PIL image, array, or a settings dict.
        refine=False skips detail transfer on a model that refines (faster, softer frames)."""
        body = {"start": end_json(start), "end": end_json(end), "frames": frames, "route": route,
                "min_confidence": min_confidence, "refine": bool(refine)}
        if version is not None:
            body["version"] = version
        d = self._json("POST", f"/v1/models/{_seg(name)}/between", json=body)
        return BetweenResult(model=d["model"], version=d["version"], route=d["route"], frames=_frames(d["frames"]),
                             accepted=d["accepted"], rejected=d["rejected"], start_params=d["start_params"],
                             end_params=d["end_params"], notice=d["notice"])

    def fill(self, name: str, targets: Sequence[Mapping[str, float]], *, min_confidence: float = 0.5,
             version: int | None = None, as_job: bool = False,
             progress: Callable[[int, int], None] | None = None, wait_timeout: float = 600.0,
             refine: bool = True) -> FillResult:
        """One frame per target; when the server answers 202 the job is polled until it is done."""
        body = {"targets": [{str(k): float(v) for k, v in t.items()} for t in targets],
                "min_confidence": min_confidence, "as_job": as_job, "refine": bool(refine)}
        if version is not None:
            body["version"] = version
        response = self._request("POST", f"/v1/models/{_seg(name)}/fill", json=body)
        job_id = None
        if response.status_code == 202:
            status = self.wait(response.json()["id"], progress=progress, timeout=wait_timeout)
            self._raise_unless_done(status)
            job_id = status.id
            d = self._json("GET", f"/v1/jobs/{_seg(job_id)}/result")
        else:
            d = response.json()
            if progress is not None:
                progress(len(d["frames"]), len(d["frames"]))
        return FillResult(model=d["model"], version=d["version"], frames=_frames(d["frames"]),
                          accepted=d["accepted"], rejected=d["rejected"], notice=d["notice"], job_id=job_id)

    # -- jobs ---------------------------------------------------------------------------------
    def job(self, job_id: str) -> JobStatus:
        return JobStatus.from_json(self._json("GET", f"/v1/jobs/{_seg(job_id)}"))

    def cancel(self, job_id: str) -> JobStatus:
        return JobStatus.from_json(self._json("DELETE", f"/v1/jobs/{_seg(job_id)}"))

    def result(self, job_id: str) -> dict:
        return self._json("GET", f"/v1/jobs/{_seg(job_id)}/result")

    def wait(self, job_id: str, *, progress: Callable[[int, int], None] | None = None,
             timeout: float = 600.0) -> JobStatus:
        """Poll a job until it is done, failed or cancelled (at most `timeout` seconds)."""
        deadline = time.monotonic() + timeout
        while True:
            status = self.job(job_id)
            if progress is not None:
                progress(status.done, status.total)
            if status.finished:
                return status
            if time.monotonic() > deadline:
                raise ClientError(None, "timeout", f"job {job_id} still {status.state} after {timeout:g} s "
                                                   f"({status.done}/{status.total})")
            time.sleep(self.poll_interval)

    @staticmethod
    def _raise_unless_done(status: JobStatus) -> None:
        if status.state == "done":
            return
        err = status.error or {}
        raise ClientError(None, str(err.get("code") or f"job_{status.state}"),
                          str(err.get("message") or f"job {status.id} was {status.state}"), err.get("field"))

    def train(self, scene: str, name: str, *, steps: int | None = None, budget_seconds: float | None = None,
              seed: int = 0, resolution: int = 64, wait: bool = False,
              progress: Callable[[int, int], None] | None = None, timeout: float = 3600.0) -> JobStatus | dict:
        """Start a training job on a scene folder on the server (API key); with `wait`, the
        registered version {"model", "version", "created", "hash", "metrics"} once it is done."""
        body: dict[str, Any] = {"scene": str(scene), "name": name, "seed": seed, "resolution": resolution}
        if steps is not None:
            body["steps"] = steps
        if budget_seconds is not None:
            body["budget_seconds"] = budget_seconds
        status = JobStatus.from_json(self._json("POST", "/v1/trainings", json=body))
        if not wait:
            return status
        status = self.wait(status.id, progress=progress, timeout=timeout)
        self._raise_unless_done(status)
        return self.result(status.id)
