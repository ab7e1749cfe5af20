"""What goes on the wire: the request body, the query, and the key a response is cached under.

Pure functions, no I/O: the sync and async clients and the command line all build their calls
here, so they send byte-identical requests.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Literal, Protocol, runtime_checkable

from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.limits import RequestLimits, limit_problems

WeightFormat = Literal["json", "npz", "safetensors"]
FORMATS: tuple[WeightFormat, ...] = ("json", "npz", "safetensors")
SUFFIXES: Mapping[str, WeightFormat] = {
    ".json": "json",
    ".npz": "npz",
    ".safetensors": "safetensors",
}


@runtime_checkable
class RequestSource(Protocol):
    """Anything that can describe itself as a request dict (the layer helpers' NetworkSpec)."""

    def to_request(self) -> dict[str, Any]: ...


RequestLike = Mapping[str, Any] | RequestSource


def canonical_json(value: Any) -> bytes:
    """Sorted keys, no spaces, ASCII only, NaN refused: one spelling per JSON value."""
    try:
        text = json.dumps(
            value, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
        )
    except ValueError as exc:  # NaN or Infinity somewhere
        raise SpecInvalid([Problem("(body)", "non_finite_number", str(exc))]) from None
    except TypeError as exc:
        raise SpecInvalid(
            [Problem("(body)", "invalid_type", f"the request is not JSON-serialisable: {exc}")]
        ) from None
    return text.encode("ascii")


def request_dict(request: RequestLike, limits: RequestLimits | None) -> dict[str, Any]:
    """The request as a plain dict, checked against `limits` (None: leave it to the service)."""
    if isinstance(request, RequestSource):
        data = request.to_request()
    elif isinstance(request, Mapping):
        data = dict(request)
    else:
        raise SpecInvalid(
            [
                Problem(
                    "(body)",
                    "invalid_type",
                    f"got {type(request).__name__}; allowed: a dict in the request format or "
                    "a NetworkSpec",
                )
            ]
        )
    if limits is not None:
        problems = limit_problems(data, limits)
        if problems:
            raise SpecInvalid(problems)
    return data


def check_format(fmt: str) -> WeightFormat:
    if fmt not in FORMATS:
        raise SpecInvalid(
            [Problem("format", "not_allowed", f"got {fmt!r}; allowed: json, npz, safetensors")]
        )
    return fmt


def parse_rows(rows: object) -> tuple[int, int] | None:
    """`rows=` as (start, stop): a slice with both ends, a (start, stop) pair, or "START:STOP"."""
    if rows is None:
        return None
    start: object
    stop: object
    if isinstance(rows, slice):
        if rows.step not in (None, 1):
            raise _rows_problem(f"got a slice with step {rows.step}; blocks are contiguous")
        start, stop = rows.start, rows.stop
    elif isinstance(rows, str):
        parts = rows.split(":")
        if len(parts) != 2 or not all(p.strip().isdigit() for p in parts):
            raise _rows_problem(f"got {rows!r}")
        start, stop = int(parts[0]), int(parts[1])
    elif isinstance(rows, tuple | list) and len(rows) == 2:
        start, stop = rows
    else:
        raise _rows_problem(f"got {rows!r}")
    if (
        not isinstance(start, int)
        or not isinstance(stop, int)
        or isinstance(start, bool)
        or isinstance(stop, bool)
        or not 0 <= start < stop
    ):
        raise _rows_problem(f"got start={start!r}, stop={stop!r}")
    return start, stop


def _rows_problem(detail: str) -> SpecInvalid:
    return SpecInvalid(
        [
            Problem(
                "rows",
                "invalid_value",
                f"{detail}; allowed: slice(START, STOP), (START, STOP) or 'START:STOP' with "
                "0 <= START < STOP",
            )
        ]
    )


@dataclass(frozen=True)
class WeightsCall:
    """One weights request, fully determined: body bytes, query and cache key."""

    body: bytes
    format: WeightFormat
    tensor: str | None
    rows: tuple[int, int] | None

    method = "POST"
    path = "/v1/weights"
    # Answers to a request are revalidated with the service (If-None-Match) when it answers.
    immutable = False
    labels: Mapping[str, Any] | None = None

    @property
    def params(self) -> dict[str, str]:
        params: dict[str, str] = {"format": self.format}
        if self.tensor is not None:
            params["tensor"] = self.tensor
        if self.rows is not None:
            params["rows"] = f"{self.rows[0]}:{self.rows[1]}"
        return params

    @property
    def cache_key(self) -> str:
        """SHA-256 over the canonical request and the selection: equal requests, equal key.

        Two spellings of one request (a default written out or left implicit) get different
        keys; that only costs a second download, never a wrong answer.
        """
        selection = canonical_json(
            {
                "format": self.format,
                "rows": list(self.rows) if self.rows else None,
                "tensor": self.tensor,
            }
        )
        digest = hashlib.sha256()
        digest.update(b"seedbed-client-cache-v1\n")
        digest.update(self.body)
        digest.update(b"\n")
        digest.update(selection)
        return digest.hexdigest()


def weights_call(
    request: RequestLike,
    fmt: str,
    *,
    tensor: str | None = None,
    rows: object = None,
    limits: RequestLimits | None = None,
) -> WeightsCall:
    data = request_dict(request, limits)
    selection = parse_rows(rows)
    if selection is not None and tensor is None:
        raise SpecInvalid(
            [Problem("rows", "needs_tensor", "rows selects rows of one tensor; name it")]
        )
    if tensor is not None and (not isinstance(tensor, str) or not tensor):
        raise SpecInvalid(
            [Problem("tensor", "invalid_value", f"got {tensor!r}; allowed: a tensor name")]
        )
    return WeightsCall(canonical_json(data), check_format(fmt), tensor, selection)


# --- recipes ---------------------------------------------------------------------------------

RECIPE_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,99}")
LATEST = "latest"


@dataclass(frozen=True)
class RecipeRef:
    """`name@version` or `name@latest` (a bare name means latest)."""

    name: str
    version: int | None  # None: the newest version, resolved on each call

    def __str__(self) -> str:
        return f"{self.name}@{LATEST if self.version is None else self.version}"

    @property
    def path_version(self) -> str:
        return LATEST if self.version is None else str(self.version)


def parse_ref(text: object, field: str = "recipe") -> RecipeRef:
    """`name@3`, `name@latest` or `name` as a RecipeRef; SpecInvalid naming the rule otherwise."""
    rule = (
        "allowed: NAME@VERSION, NAME@latest or NAME, with NAME matching "
        "[a-z0-9][a-z0-9._-]{0,99} and VERSION a whole number >= 1"
    )
    if not isinstance(text, str):
        raise SpecInvalid([Problem(field, "invalid_type", f"got {type(text).__name__}; {rule}")])
    name, _, version = text.partition("@")
    if not RECIPE_NAME.fullmatch(name):
        raise SpecInvalid([Problem(field, "invalid_value", f"got {text!r}; {rule}")])
    if version in ("", LATEST):
        return RecipeRef(name, None)
    if not (version.isascii() and version.isdigit()) or version.startswith("0"):
        raise SpecInvalid([Problem(field, "invalid_value", f"got {text!r}; {rule}")])
    return RecipeRef(name, int(version))


def looks_like_ref(value: object) -> bool:
    """A string in a request's place is a recipe reference (requests are dicts or specs)."""
    return isinstance(value, str)


@dataclass(frozen=True)
class RecipeWeightsCall:
    """GET /v1/recipes/NAME/VERSION/weights of one numbered version: immutable, cached forever.

    The cache key includes the service's URL: a name@version means something only in the
    registry that assigned it.
    """

    service: str
    name: str
    version: int
    format: WeightFormat

    method = "GET"
    body: bytes | None = None
    immutable = True
    tensor: str | None = None
    rows: tuple[int, int] | None = None

    @property
    def path(self) -> str:
        return f"/v1/recipes/{self.name}/{self.version}/weights"

    @property
    def params(self) -> dict[str, str]:
        return {"format": self.format}

    @property
    def labels(self) -> dict[str, Any]:
        return {"service": self.service, "recipe": self.name, "version": self.version}

    @property
    def cache_key(self) -> str:
        digest = hashlib.sha256(b"seedbed-client-recipe-v1\n")
        digest.update(canonical_json({**self.labels, "format": self.format}))
        return digest.hexdigest()
