"""From a publish body to what gets stored: validated name, canonical request, plan and
per-tensor fingerprints. Pure computation, no database: runs before any transaction opens, so
the slow part (hashing every tensor) never holds a lock."""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass

from seedbed.core.plan import build_plan, plan_document
from seedbed.core.plan_types import Plan
from seedbed.core.render import iter_tensor_bytes
from seedbed.core.request.limits import Limits
from seedbed.core.request.problems import BODY, Problem, RequestRejected, describe_input
from seedbed.core.request.suggest import did_you_mean
from seedbed.registry.records import canonical_text

NAME_PATTERN_TEXT = r"[a-z0-9][a-z0-9._-]{0,99}"
NAME_PATTERN = re.compile(NAME_PATTERN_TEXT)
NAME_RULE = (
    "1-100 characters: lower-case letters, digits, '.', '_' or '-', starting with a letter or "
    f"digit (the pattern {NAME_PATTERN_TEXT})"
)
MAX_DESCRIPTION_CHARS = 4000
BODY_FIELDS = ("name", "request", "description")


@dataclass(frozen=True)
class PreparedRecipe:
    name: str
    description: str
    algorithm: str
    request_json: str
    plan_json: str
    fingerprints_json: str
    fingerprints: dict[str, str]


def name_problem(value: object, field: str = "name") -> Problem | None:
    if not isinstance(value, str):
        return Problem(field, "invalid_type", f"got {describe_input(value)}; allowed: {NAME_RULE}")
    if not NAME_PATTERN.fullmatch(value):
        return Problem(field, "invalid_value", f"got {describe_input(value)}; allowed: {NAME_RULE}")
    return None


def _within_request(p: Problem) -> Problem:
    field = "request" if p.field == BODY else f"request.{p.field}"
    return Problem(field, p.code, p.message)


def fingerprints_of(plan: Plan, threads: int = 1) -> dict[str, str]:
    """Tensor name -> SHA-256 of its raw little-endian C-order bytes (the manifest's `sha256`)."""
    out: dict[str, str] = {}
    for t in plan.tensors:
        sha = hashlib.sha256()
        for chunk in iter_tensor_bytes(plan, t, threads=threads):
            sha.update(chunk)
        out[t.tensor] = sha.hexdigest()
    return out


def validate_body(body: object, limits: Limits) -> tuple[str, str, Plan]:
    """(name, description, plan), or RequestRejected listing every problem at once."""
    if not isinstance(body, dict):
        raise RequestRejected(
            [
                Problem(
                    BODY,
                    "invalid_type",
                    f"got {describe_input(body)}; allowed: an object with name, request "
                    "and description",
                )
            ]
        )
    problems: list[Problem] = [
        Problem(
            key,
            "unknown_field",
            f"unknown field {key!r}; allowed fields: {', '.join(BODY_FIELDS)}"
            f"{did_you_mean(key, BODY_FIELDS)}",
        )
        for key in body
        if key not in BODY_FIELDS
    ]
    name = body.get("name")
    if "name" not in body:
        problems.append(
            Problem(
                "name", "missing_field", f"required field 'name' is missing; it must be {NAME_RULE}"
            )
        )
    elif (bad := name_problem(name)) is not None:
        problems.append(bad)
    description = body.get("description", "")
    if not isinstance(description, str):
        problems.append(
            Problem(
                "description",
                "invalid_type",
                f"got {describe_input(description)}; allowed: a string of at most "
                f"{MAX_DESCRIPTION_CHARS} characters",
            )
        )
    elif len(description) > MAX_DESCRIPTION_CHARS:
        problems.append(
            Problem(
                "description",
                "invalid_value",
                f"got {len(description)} characters; allowed: at most {MAX_DESCRIPTION_CHARS}",
            )
        )
    plan: Plan | None = None
    if "request" not in body:
        problems.append(
            Problem(
                "request",
                "missing_field",
                "required field 'request' is missing; it must be a network "
                "request, the same body POST /v1/weights takes",
            )
        )
    else:
        try:
            plan = build_plan(body["request"], limits)
        except RequestRejected as exc:
            problems.extend(_within_request(p) for p in exc.problems)
    if problems:
        raise RequestRejected(problems)
    assert plan is not None and isinstance(name, str) and isinstance(description, str)
    return name, description, plan


def prepare_recipe(body: object, limits: Limits | None = None, threads: int = 1) -> PreparedRecipe:
    """Validate a publish body and compute everything a stored version holds."""
    name, description, plan = validate_body(body, limits if limits is not None else Limits())
    fingerprints = fingerprints_of(plan, threads)
    return PreparedRecipe(
        name=name,
        description=description,
        algorithm=plan.algorithm,
        request_json=canonical_text(plan.canonical_request),
        plan_json=canonical_text(plan_document(plan)),
        fingerprints_json=canonical_text(fingerprints),
        fingerprints=fingerprints,
    )
