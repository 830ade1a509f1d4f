"""What the route modules share: answers (frames as PNG) rendered as JSON or ZIP, content
negotiation, and the documented error responses."""
from __future__ import annotations

import io
import json
import zipfile
from dataclasses import dataclass, field
from typing import Sequence

from fastapi import Request
from fastapi.responses import JSONResponse, Response

from ...models.engine import FrameCounts

from ..imaging import encode_png, png_base64
from ..schemas import NOTICE, ErrorOut

ZIP = "application/zip"
JSON = "application/json"

_ERROR_TEXT = {
    400: "the body is not valid JSON, or a header is malformed",
    401: "missing or wrong API key (writes only)",
    404: "no such model, version, job or endpoint",
    405: "the endpoint does not take this method",
    409: "the job is not in a state that allows this",
    413: "the body or an image is over a named limit (max_body_bytes, max_image_pixels)",
    422: "a value breaks the contract (type, range, unknown parameter, bad image)",
    503: "the registry is not readable, or the job queue is full",
}


def errors(*statuses: int) -> dict:
    """OpenAPI `responses` entries in the one error shape."""
    return {s: {"model": ErrorOut, "description": _ERROR_TEXT[s]} for s in statuses}


def media(description: str, example: dict | None = None, *, zip_too: bool = False) -> dict:
    """OpenAPI 200 entry: JSON (with an example) and, for frame answers, a ZIP of PNGs."""
    content = {JSON: {"example": example} if example else {}}
    if zip_too:
        content[ZIP] = {"schema": {"type": "string", "format": "binary"}}
    return {"description": description, "content": content}


@dataclass
class FrameData:
    """One answered frame, its image already PNG-encoded."""
    index: int
    t: float
    png: bytes
    confidence: float | None
    accepted: bool
    params: dict[str, float]
    target: dict[str, float] | None = None
    code: list[float] | None = None   # between frames: the latent code the frame was decoded from
    detail: float | None = None       # share of pixels from real bank images (None: the model does not refine)


@dataclass
class Answer(FrameCounts):
    """A between or fill answer, independent of how it is sent."""
    kind: str                      # "between" | "fill"
    model: str
    version: int
    frames: list[FrameData]
    route: str | None = None
    start_params: dict[str, float] = field(default_factory=dict)
    end_params: dict[str, float] = field(default_factory=dict)
    start_code: list[float] | None = None
    end_code: list[float] | None = None


def frame_data(frames: Sequence, targets: Sequence[dict] | None = None, *, offset: int = 0,
               codes: Sequence | None = None) -> list[FrameData]:
    """Engine frames to FrameData (PNG encoding is CPU work: call it on the pool)."""
    out = []
    for k, f in enumerate(frames):
        out.append(FrameData(index=offset + k + 1, t=float(f.t), png=encode_png(f.image),
                             confidence=None if f.confidence is None else float(f.confidence),
                             accepted=bool(f.accepted), params={n: float(v) for n, v in f.params.items()},
                             target=None if targets is None else dict(targets[k]),
                             code=None if codes is None else [float(c) for c in codes[k]],
                             detail=None if f.detail is None else float(f.detail)))
    return out


def _frame_json(f: FrameData, kind: str, image: dict) -> dict:
    base = {"index": f.index}
    if kind == "between":
        base["t"] = f.t
    else:
        base["target"] = f.target
    body = {**base, **image, "confidence": f.confidence, "accepted": f.accepted, "params": f.params,
            "detail": f.detail}
    if f.code is not None:
        body["code"] = f.code
    return body


def to_json(answer: Answer, *, files: Sequence[str] | None = None) -> dict:
    """The JSON body (BetweenOut or FillOut); with `files`, images are named files instead."""
    frames = [_frame_json(f, answer.kind, {"file": files[i]} if files else {"image": png_base64(f.png)})
              for i, f in enumerate(answer.frames)]
    body = {"model": answer.model, "version": answer.version}
    if answer.kind == "between":
        body["route"] = answer.route
    body.update(frames=frames, accepted=answer.accepted, rejected=answer.rejected)
    if answer.kind == "between":
        body.update(start_params=answer.start_params, end_params=answer.end_params)
        if answer.start_code is not None:
            body.update(start_code=answer.start_code, end_code=answer.end_code)
    body.update(synthesized=True, notice=NOTICE)
    return body


def to_zip(answer: Answer) -> bytes:
    """A ZIP of PNG frames (every frame; manifest.json says which are accepted)."""
    prefix = "frame" if answer.kind == "between" else "target"
    files = [f"{prefix}_{f.index:04d}.png" for f in answer.frames]
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as zf:  # PNGs are compressed already
        for name, f in zip(files, answer.frames):
            zf.writestr(name, f.png)
        zf.writestr("manifest.json", json.dumps(to_json(answer, files=files), indent=1))
    return buf.getvalue()


def _quality(accept: str, media_type: str) -> float:
    best = 0.0
    major = media_type.split("/")[0]
    for part in accept.split(","):
        bits = [b.strip() for b in part.split(";")]
        kind = bits[0].lower()
        if kind not in (media_type, f"{major}/*", "*/*"):
            continue
        q = 1.0
        for b in bits[1:]:
            if b.startswith("q="):
                try:
                    q = float(b[2:])
                except ValueError:
                    q = 0.0
        # an exact match outranks a wildcard at the same q
        best = max(best, q + (0.001 if kind == media_type else 0.0))
    return best


def wants_zip(request: Request) -> bool:
    """True when the Accept header prefers application/zip over JSON."""
    accept = request.headers.get("accept", "")
    if not accept:
        return False
    return _quality(accept, ZIP) > _quality(accept, JSON)


def respond(request: Request, answer: Answer, *, status_code: int = 200) -> Response:
    if wants_zip(request):
        filename = f"{answer.model}-v{answer.version}-{answer.kind}.zip"
        return Response(to_zip(answer), status_code=status_code, media_type=ZIP,
                        headers={"Content-Disposition": f'attachment; filename="{filename}"'})
    return JSONResponse(to_json(answer), status_code=status_code)


def end_codes(answer) -> dict:
    """start_code / end_code of an engine answer, as JSON lists (empty when it has none)."""
    ends = getattr(answer, "ends", None)
    if ends is None:
        return {}
    return {"start_code": [float(c) for c in ends[0]], "end_code": [float(c) for c in ends[1]]}
