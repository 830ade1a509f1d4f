"""The viewer page at `/`: static HTML, CSS and plain JavaScript modules shipped in `service/static`.

No build step and nothing fetched from elsewhere: the page talks only to this service's /v1
endpoints, and its Content-Security-Policy says so (scripts, styles and requests from this
origin only; images also from data: and blob: URLs, which is how frames arrive).
"""
from __future__ import annotations

from functools import lru_cache
from importlib.resources import files

from fastapi import APIRouter
from fastapi.responses import Response

from ..errors import NotFound

router = APIRouter(include_in_schema=False)

PAGE = "index.html"
# viewer.js is an ES module that imports the other three (core: state, requests and helpers;
# model: the model panel; map: the latent map and its tooltips)
_JS = "text/javascript; charset=utf-8"
ASSETS = {"viewer.css": "text/css; charset=utf-8", "viewer.js": _JS, "viewer-core.js": _JS, "viewer-model.js": _JS,
          "viewer-map.js": _JS}
POLICY = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data: blob:; "
          "connect-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'")
HEADERS = {"Content-Security-Policy": POLICY, "X-Content-Type-Options": "nosniff", "Cache-Control": "no-cache"}


@lru_cache(maxsize=None)
def _read(name: str) -> bytes:
    return (files("geotween.service") / "static" / name).read_bytes()


@router.get("/")
def page() -> Response:
    return Response(_read(PAGE), media_type="text/html; charset=utf-8", headers=HEADERS)


@router.get("/viewer/{asset}")
def asset(asset: str) -> Response:
    if asset not in ASSETS:
        raise NotFound(f"no viewer file named {asset!r}; expected one of {sorted(ASSETS)}", field="asset")
    return Response(_read(asset), media_type=ASSETS[asset], headers=HEADERS)
