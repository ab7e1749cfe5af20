"""/docs: the interactive API reference on Swagger UI files shipped inside an installed Python
package (swagger-ui-bundle-v2, Apache-2.0), so the page renders on a network with no internet."""

from __future__ import annotations

from functools import lru_cache
from importlib import resources

from fastapi import APIRouter, Request, Response
from fastapi.openapi.docs import get_swagger_ui_html

from seedbed.web.errors import ApiError
from seedbed.web.etag import body_etag, none_match

router = APIRouter(include_in_schema=False)

PREFIX = "/docs/assets"
# The only files the page needs; nothing else from the bundle is served.
_FILES = {
    "swagger-ui-bundle.js": "text/javascript; charset=utf-8",
    "swagger-ui.css": "text/css; charset=utf-8",
    "favicon-32x32.png": "image/png",
}


@lru_cache(maxsize=len(_FILES))
def _read(name: str) -> tuple[bytes, str]:
    import swagger_ui_bundle  # a runtime dependency; imported here so the app starts fast

    data = (resources.files(swagger_ui_bundle) / "vendor").iterdir()
    folder = next(p for p in data if p.name.startswith("swagger-ui-"))
    raw = (folder / name).read_bytes()
    return raw, body_etag(raw)


@router.api_route("/docs", methods=["GET", "HEAD"])
async def api_docs(request: Request) -> Response:
    openapi_url = request.app.openapi_url or "/openapi.json"
    return get_swagger_ui_html(
        openapi_url=openapi_url,
        title=f"{request.app.title} API",
        swagger_js_url=f"{PREFIX}/swagger-ui-bundle.js",
        swagger_css_url=f"{PREFIX}/swagger-ui.css",
        swagger_favicon_url=f"{PREFIX}/favicon-32x32.png",
        # No online validator badge: it would send the document to a public server.
        swagger_ui_parameters={"validatorUrl": None},
    )


@router.api_route(PREFIX + "/{name}", methods=["GET", "HEAD"])
async def api_docs_asset(request: Request, name: str) -> Response:
    media = _FILES.get(name)
    if media is None:
        raise ApiError.one(404, "(path)", "not_found", f"no docs asset named {name[:80]!r}")
    data, etag = _read(name)
    headers = {"ETag": etag, "Cache-Control": "no-cache"}
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers=headers)
    return Response(data, media_type=media, headers=headers)
