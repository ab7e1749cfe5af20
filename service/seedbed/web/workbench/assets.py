"""Static files of the workbench, read from the installed package (setuptools package-data), so
an installed service ships them; only names present in the package are served."""

from __future__ import annotations

import hashlib
from functools import lru_cache
from importlib import resources

from fastapi import APIRouter, Request, Response

from seedbed.web.errors import ApiError
from seedbed.web.etag import none_match

router = APIRouter(include_in_schema=False)

PREFIX = "/workbench/assets"
_MEDIA = {
    ".css": "text/css; charset=utf-8",
    ".js": "text/javascript; charset=utf-8",
    ".svg": "image/svg+xml",
    ".txt": "text/plain; charset=utf-8",
}


@lru_cache(maxsize=1)
def bundled() -> dict[str, tuple[bytes, str]]:
    """name -> (bytes, strong ETag) of every file in the package's static folder."""
    folder = resources.files("seedbed.web.workbench") / "static"
    out: dict[str, tuple[bytes, str]] = {}
    for entry in folder.iterdir():
        suffix = "." + entry.name.rsplit(".", 1)[-1]
        if entry.is_file() and suffix in _MEDIA:
            data = entry.read_bytes()
            out[entry.name] = (data, '"' + hashlib.sha256(data).hexdigest()[:32] + '"')
    return out


def asset_url(name: str) -> str:
    """The URL of a bundled file, with its fingerprint so a browser never keeps a stale copy."""
    _, etag = bundled()[name]
    return f"{PREFIX}/{name}?v={etag.strip(chr(34))[:12]}"


@router.api_route(PREFIX + "/{name}", methods=["GET", "HEAD"])
async def workbench_asset(request: Request, name: str) -> Response:
    found = bundled().get(name)
    if found is None:
        raise ApiError.one(404, "(path)", "not_found", f"no workbench asset named {name[:80]!r}")
    data, etag = found
    headers = {"ETag": etag, "Cache-Control": "no-cache"}
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers=headers)
    suffix = "." + name.rsplit(".", 1)[-1]
    return Response(data, media_type=_MEDIA[suffix], headers=headers)
