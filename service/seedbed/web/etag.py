"""Strong entity tags for generated responses, and If-None-Match matching (RFC 9110 sec. 8.8.3,
13.1.2).

The tag is a hash of everything the body's bytes depend on, so it can be computed and compared
before any value is generated: the canonical request (not its spelling), the algorithm version,
the format, the selected tensor and rows, the numpy version (recorded in manifests), and the
service version (which fixes the container layouts).
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import numpy as np

from seedbed import __version__


def strong_etag(kind: str, **parts: Any) -> str:
    doc = {"kind": kind, "numpy": np.__version__, "service": __version__, **parts}
    text = json.dumps(
        doc, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
    )
    return '"' + hashlib.sha256(text.encode("ascii")).hexdigest() + '"'


def body_etag(body: bytes) -> str:
    """For small fixed documents (the catalog): the hash of the bytes themselves."""
    return '"' + hashlib.sha256(body).hexdigest() + '"'


def none_match(header: str | None, etag: str) -> bool:
    """True when If-None-Match says the caller already holds `etag` (weak comparison)."""
    if header is None:
        return False
    if header.strip() == "*":
        return True
    ours = etag.removeprefix("W/")
    return any(item.strip().removeprefix("W/") == ours for item in header.split(","))
