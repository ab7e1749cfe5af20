"""How a published recipe version is written down: canonical JSON text and its digest."""

from __future__ import annotations

import hashlib
import json
from datetime import UTC, datetime
from typing import Any


def canonical_text(value: Any) -> str:
    """One spelling per meaning: sorted keys, no spaces, UTF-8 kept, NaN refused."""
    return json.dumps(
        value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    )


def content_digest(
    *,
    name: str,
    version: int,
    description: str,
    algorithm: str,
    publisher: str,
    request_json: str,
    plan_json: str,
    fingerprints_json: str,
) -> str:
    """SHA-256 over everything a stored version says except its time: a row whose digest does
    not match was altered or half-written. The texts are hashed as stored (not re-serialised),
    each length-prefixed so no two different rows can produce the same byte string."""
    sha = hashlib.sha256(b"seedbed-recipe-v1\n")
    for part in (
        name,
        str(version),
        description,
        algorithm,
        publisher,
        request_json,
        plan_json,
        fingerprints_json,
    ):
        data = part.encode("utf-8")
        sha.update(len(data).to_bytes(8, "big"))
        sha.update(data)
    return sha.hexdigest()


def utc(moment: datetime) -> datetime:
    """Timestamps read back from SQLite have no zone; every one we write is UTC."""
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def now_utc() -> datetime:
    return datetime.now(UTC)


def iso(moment: datetime) -> str:
    """RFC 3339 with a Z, to the microsecond."""
    return utc(moment).isoformat(timespec="microseconds").replace("+00:00", "Z")
