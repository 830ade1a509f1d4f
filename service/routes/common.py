"""What the route modules share: frame answers (service.answers) sent as JSON or as a ZIP of
PNGs with its manifest.json, content negotiation, the manifests' place in the OpenAPI document,
and the documented error responses."""
from __future__ import annotations

import io
import zipfile

from fastapi import FastAPI, Request
from fastapi.responses import Response
from pydantic import BaseModel
from pydantic.json_schema import models_json_schema

from ..answers import Answer, frame_file, manifest_json, to_wire
from ..schemas import BetweenManifestOut, ErrorOut, FillManifestOut

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
    429: "max_inflight inference requests are in flight already; nothing was computed, retry after Retry-After "
         "seconds",
    503: "the registry is not readable, the job queue is full, the service is draining, or the request's work "
         "did not start within request_deadline (then nothing was computed, and Retry-After says when to retry)",
}
# Refusals for load carry Retry-After in delay-seconds (RFC 9110, section 10.2.3); 503s for other causes do not.
_RETRY_AFTER = {"Retry-After": {"description": "whole seconds to wait before retrying (an estimate, >= 1)",
                                "schema": {"type": "integer", "minimum": 1}}}


def errors(*statuses: int) -> dict:
    """OpenAPI `responses` entries in the one error shape. An operation that can answer 429 does
    inference work under admission (service.admission): its 429 and 503 document Retry-After."""
    out = {}
    for s in statuses:
        out[s] = {"model": ErrorOut, "description": _ERROR_TEXT[s]}
        if s in (429, 503) and 429 in statuses:
            out[s]["headers"] = _RETRY_AFTER
    return out


# Models that describe files rather than JSON bodies (the manifest.json inside a ZIP answer): no
# route returns them as JSON, so add_file_schemas puts them into the OpenAPI components.
FILE_MODELS: tuple[type[BaseModel], ...] = (BetweenManifestOut, FillManifestOut)
_COMPONENTS = "#/components/schemas/{model}"


def media(description: str, example: dict | None = None, *, manifest: type[BaseModel] | None = None) -> dict:
    """OpenAPI 200 entry: JSON (with an example) and, for frame answers, a ZIP of PNGs whose
    manifest.json follows `manifest` (named by the extension x-manifest, a JSON pointer into the
    components)."""
    content = {JSON: {"example": example} if example else {}}
    if manifest is not None:
        if manifest not in FILE_MODELS:
            raise ValueError(f"manifest: {manifest.__name__} is not one of FILE_MODELS")
        content[ZIP] = {"schema": {"type": "string", "format": "binary"},
                        "x-manifest": _COMPONENTS.format(model=manifest.__name__)}
    return {"description": description, "content": content}


def add_file_schemas(app: FastAPI) -> None:
    """Make the app's OpenAPI document carry FILE_MODELS under components/schemas as well."""
    build = app.openapi

    def openapi() -> dict:
        if app.openapi_schema is None:
            doc = build()  # cached on app.openapi_schema: the additions below stay
            _, defs = models_json_schema([(m, "serialization") for m in FILE_MODELS], ref_template=_COMPONENTS)
            doc.setdefault("components", {}).setdefault("schemas", {}).update(defs["$defs"])
        return app.openapi_schema

    app.openapi = openapi


def to_zip(answer: Answer) -> bytes:
    """A ZIP of PNG frames (every frame; manifest.json, a BetweenManifestOut or FillManifestOut,
    says which are accepted)."""
    files = [frame_file(answer.kind, f.fields["index"], answer.format) for f in answer.frames]
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_STORED) as zf:  # PNGs and JPEGs are compressed already
        for name, f in zip(files, answer.frames):
            zf.writestr(name, f.png)
        zf.writestr("manifest.json", manifest_json(to_wire(answer, files)))
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
    """The answer as JSON (BetweenOut or FillOut, serialised by the model that validated it: the
    route's response_model is not applied a second time) or as a ZIP."""
    if wants_zip(request):
        filename = f"{answer.model}-v{answer.version}-{answer.kind}.zip"
        return Response(to_zip(answer), status_code=status_code, media_type=ZIP,
                        headers={"Content-Disposition": f'attachment; filename="{filename}"'})
    return Response(to_wire(answer).model_dump_json(), status_code=status_code, media_type=JSON)
