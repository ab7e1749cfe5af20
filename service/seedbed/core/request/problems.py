"""What a refused request looks like: `Problem`s, `RequestRejected`, and the translation of
pydantic's validation errors into them.

A `Problem` names one offending field with a readable path (``layers[2].kernel``,
``layers[0].init.bound``), a machine-readable code from the small vocabulary below, and a
message that says what is wrong *and what is allowed*. Messages never contain pydantic's
internal wording, error URLs or Python reprs of huge inputs.

Codes (our own vocabulary; the web layer passes them through unchanged):

    invalid_type     the JSON type is wrong (a string where a number belongs, true for 1 ...)
    invalid_value    the type is right but the value is not allowed
    missing_field    a required field is absent
    unknown_field    a field the format does not define (the message lists the allowed ones)
    not_allowed      a field that is valid on its own but not in this combination
    duplicate_name   a layer name or tensor name used twice (the message names both places)
    too_large        a size or a count over a limit (the message has the number and the limit)
    out_of_range     a position outside what exists (a row range past a tensor's end)

`RequestRejected.too_large` is true when every problem is `too_large`: the request is
well-formed but too big to serve (HTTP 413). A request that is also malformed gets 422, so
the caller sees the format errors first.
"""

from __future__ import annotations

import re
import types
import typing
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal, Union, get_args, get_origin

from pydantic import BaseModel, ValidationError
from pydantic_core import PydanticCustomError

from seedbed.core.request.suggest import did_you_mean
from seedbed_client import wire_facts

ProblemCode = Literal[
    "invalid_type",
    "invalid_value",
    "missing_field",
    "unknown_field",
    "not_allowed",
    "duplicate_name",
    "too_large",
    "out_of_range",
]
PROBLEM_CODES: frozenset[str] = frozenset(get_args(ProblemCode))

# The path used when the whole body is at fault (not a JSON object, ...).
BODY = wire_facts.BODY_FIELD


@dataclass(frozen=True)
class Problem:
    field: str  # readable path: "layers[2].kernel", "seed", "(body)"
    code: str  # one of PROBLEM_CODES
    message: str  # what is wrong and what is allowed

    def as_dict(self) -> dict[str, str]:
        return {"field": self.field, "code": self.code, "message": self.message}


class RequestRejected(Exception):  # noqa: N818 (name fixed by the module contracts)
    """A request that cannot be served, with every problem found."""

    def __init__(self, problems: Sequence[Problem]) -> None:
        if not problems:
            raise ValueError("RequestRejected needs at least one problem")
        self.problems: list[Problem] = list(problems)
        self.too_large: bool = all(p.code == "too_large" for p in self.problems)
        first = self.problems[0]
        more = f" (and {len(self.problems) - 1} more)" if len(self.problems) > 1 else ""
        super().__init__(f"{first.field}: {first.message}{more}")


@dataclass(frozen=True)
class Allowed:
    """Field metadata: a short phrase saying what the field accepts, used in error messages.

    Put it in `Annotated[...]` next to the pydantic `Field`; pydantic keeps unknown metadata
    on the field without adding it to the JSON schema.
    """

    text: str
    # A size field: exceeding its upper bound is "too_large" (a request too big to serve), not
    # a malformed value.
    is_size: bool = False


def field_error(code: ProblemCode, message: str, field: str | None = None) -> PydanticCustomError:
    """An error to raise inside a pydantic validator.

    `field` names a sub-field of the model being validated: a model-level check can then point
    at ``init.bound`` rather than at ``init``. Messages must not contain ``{field}`` (pydantic
    fills ``{name}`` placeholders from the context).
    """
    return PydanticCustomError(code, message, {"field": field} if field else None)


def describe_input(value: object) -> str:
    """Name a JSON value briefly, in JSON's terms (true, null, object ...), without huge reprs."""
    return wire_facts.describe_json_value(value)


# ---------------------------------------------------------------------------------------------
# Walking a pydantic location through the model tree


def _normalise(tp: Any) -> tuple[Any, list[Any]]:
    """Strip Optional[...] and Annotated[...] layers; return the bare type and the metadata."""
    meta: list[Any] = []
    while True:
        origin = get_origin(tp)
        if origin is typing.Annotated:
            tp, *extra = get_args(tp)
            meta.extend(extra)
        elif origin is Union or origin is types.UnionType:
            args = [a for a in get_args(tp) if a is not type(None)]
            if len(args) != 1:
                return tp, meta
            tp = args[0]
        else:
            return tp, meta


def _model_members(tp: Any) -> list[type[BaseModel]]:
    """The BaseModel classes in a (discriminated) union, or [] when `tp` is not such a union."""
    origin = get_origin(tp)
    if origin is Union or origin is types.UnionType:
        return [a for a in get_args(tp) if isinstance(a, type) and issubclass(a, BaseModel)]
    return []


def _tag_of(model: type[BaseModel]) -> str | None:
    kind = model.model_fields.get("kind")
    if kind is None:
        return None
    args = get_args(kind.annotation)
    return args[0] if len(args) == 1 and isinstance(args[0], str) else None


def _allowed_in(meta: Sequence[Any]) -> Allowed | None:
    return next((m for m in meta if isinstance(m, Allowed)), None)


@dataclass
class _Where:
    path: str  # readable path
    container: type[BaseModel] | None  # the model whose field the path ends in
    leaf: str | None  # the last field name
    allowed: Allowed | None  # what the field (or list item) accepts, if declared


def _join(path: str, part: str | int) -> str:
    if isinstance(part, int):
        return f"{path}[{part}]"
    return f"{path}.{part}" if path else part


def locate(root: type[BaseModel], loc: Sequence[str | int]) -> _Where:
    """Turn pydantic's loc tuple into a readable path, dropping discriminator tags.

    ('layers', 2, 'conv', 'kernel', 0) -> "layers[2].kernel[0]". The walk follows the model's
    annotations so it also knows which model a field belongs to (to list its allowed fields)
    and what the field accepts (its `Allowed` text).
    """
    path = ""
    tp: Any = root
    where = _Where(BODY, None, None, None)
    for part in loc:
        tp, _ = _normalise(tp)
        members = _model_members(tp)
        if members and isinstance(part, str):
            chosen = next((m for m in members if _tag_of(m) == part), None)
            if chosen is not None:  # a discriminator tag: not part of the readable path
                tp = chosen
                continue
        path = _join(path, part)
        if isinstance(tp, type) and issubclass(tp, BaseModel) and isinstance(part, str):
            info = tp.model_fields.get(part)
            allowed = None
            if info is not None:  # Optional[Annotated[...]] keeps its metadata inside
                allowed = _allowed_in([*info.metadata, *_normalise(info.annotation)[1]])
            where = _Where(path, tp, part, allowed)
            tp = info.annotation if info is not None else None
        elif isinstance(part, int) and get_origin(tp) is list:
            (tp,) = get_args(tp)
            # An item's own description, if it has one; the list's text describes the list.
            where = _Where(path, where.container, where.leaf, _allowed_in(_normalise(tp)[1]))
        else:
            where = _Where(path, where.container, where.leaf, where.allowed)
            tp = None
    return where


def _members_at(root: type[BaseModel], loc: Sequence[str | int]) -> list[type[BaseModel]]:
    """The union members at `loc` (where a discriminator tag failed)."""
    tp: Any = root
    for part in loc:
        tp, _ = _normalise(tp)
        if isinstance(tp, type) and issubclass(tp, BaseModel) and isinstance(part, str):
            info = tp.model_fields.get(part)
            tp = info.annotation if info is not None else None
        elif isinstance(part, int) and get_origin(tp) is list:
            (tp,) = get_args(tp)
    return _model_members(_normalise(tp)[0])


# ---------------------------------------------------------------------------------------------
# Translating pydantic errors

# The choices in pydantic's `expected` context ("'a', 'b' or 'c'").
_QUOTED = re.compile(r"'([^']*)'")

_TYPE_ERRORS = {
    "int_type", "int_parsing", "int_from_float", "float_type", "float_parsing", "string_type",
    "bool_type", "bool_parsing", "list_type", "dict_type", "model_type", "model_attributes_type",
    "literal_error", "enum", "is_instance_of", "none_required", "tuple_type",
}  # fmt: skip


def _allowed_fields(model: type[BaseModel]) -> str:
    """The model's fields: name and kind first, then the model's own, then inherited ones."""
    parent = model.__mro__[1]
    inherited = set(parent.model_fields) if issubclass(parent, BaseModel) else set()
    first = [f for f in ("name", "kind") if f in model.model_fields]
    own = [f for f in model.model_fields if f not in inherited and f not in first]
    rest = [f for f in model.model_fields if f in inherited and f not in first]
    return ", ".join(first + own + rest)


def _what(container: type[BaseModel] | None) -> str:
    if container is None:
        return "here"
    tag = _tag_of(container)
    if tag is not None:
        return f"for a {tag} layer"
    title = container.model_config.get("title") or container.__name__
    return f"in {title}"


def _translate(root: type[BaseModel], error: Any) -> Problem:
    kind: str = error["type"]
    loc: tuple[str | int, ...] = tuple(error["loc"])
    ctx: dict[str, Any] = error.get("ctx") or {}
    value = error.get("input")

    if kind in PROBLEM_CODES:  # raised by our own validators with our own message
        path = locate(root, loc).path
        sub = ctx.get("field")
        if sub:
            path = _join("" if path == BODY else path, sub)
        return Problem(path, kind, error["msg"])

    if kind in ("union_tag_invalid", "union_tag_not_found"):
        where = locate(root, loc)
        members = _members_at(root, loc)
        tags = ", ".join(t for t in (_tag_of(m) for m in members) if t)
        path = _join(where.path, "kind")
        if kind == "union_tag_not_found":
            return Problem(path, "missing_field", f"every layer needs a kind; allowed: {tags}")
        # pydantic reports the tag as a string even when it was an object or a list: describe
        # the value as sent.
        sent = value.get("kind") if isinstance(value, dict) else ctx.get("tag")
        hint = did_you_mean(sent, tags.split(", "))
        return Problem(
            path, "invalid_value", f"got {describe_input(sent)}; allowed kinds: {tags}{hint}"
        )

    where = locate(root, loc)
    path = where.path
    allowed = where.allowed.text if where.allowed is not None else None

    if kind == "extra_forbidden":
        known = list(where.container.model_fields) if where.container else []
        return Problem(
            path,
            "unknown_field",
            f"unknown field {where.leaf!r}; allowed fields {_what(where.container)}: "
            f"{_allowed_fields(where.container) if where.container else '(none)'}"
            f"{did_you_mean(where.leaf, known)}",
        )
    if kind == "missing":
        return Problem(
            path,
            "missing_field",
            f"required field {where.leaf!r} is missing"
            + (f"; it must be {allowed}" if allowed else ""),
        )
    if kind == "less_than_equal" and where.allowed is not None and where.allowed.is_size:
        # Sizes are capped so that shape arithmetic stays small and every framework can index it.
        return Problem(
            path,
            "too_large",
            f"{describe_input(value)} is larger than the cap of {ctx.get('le')} for any size; "
            f"allowed: {allowed}",
        )
    if kind == "finite_number":
        return Problem(
            path,
            "invalid_value",
            "NaN and Infinity are not allowed" + (f"; allowed: {allowed}" if allowed else ""),
        )
    if kind in ("too_short", "too_long"):
        return Problem(
            path,
            "invalid_value",
            f"got {describe_input(value)}; allowed: {allowed or _length_phrase(ctx)}",
        )
    if kind in _TYPE_ERRORS:
        # A choice among strings given as a string is a wrong value; anything else a wrong type.
        choice = kind in ("literal_error", "enum") and isinstance(value, str)
        code = "invalid_value" if choice else "invalid_type"
        hint = ""
        if isinstance(value, str) and kind in ("int_type", "float_type", "int_parsing"):
            hint = " (numbers must not be quoted)"
        expected = allowed or _expected_from_ctx(ctx) or _type_phrase(kind)
        suggestion = ""
        if choice:
            suggestion = did_you_mean(value, _QUOTED.findall(str(ctx.get("expected", ""))))
        return Problem(
            path, code, f"got {describe_input(value)}{hint}; allowed: {expected}{suggestion}"
        )
    # Range and pattern checks on numbers and strings.
    expected = allowed or _expected_from_ctx(ctx) or "see the field's description"
    return Problem(path, "invalid_value", f"got {describe_input(value)}; allowed: {expected}")


def _length_phrase(ctx: dict[str, Any]) -> str:
    lo, hi = ctx.get("min_length"), ctx.get("max_length")
    if lo is not None and hi is not None:
        return f"{lo} to {hi} items"
    if lo is not None:
        return f"at least {lo} items"
    return f"at most {hi} items"


def _expected_from_ctx(ctx: dict[str, Any]) -> str | None:
    if "expected" in ctx:
        return f"one of {ctx['expected']}"
    for key, phrase in (("ge", "at least"), ("gt", "greater than"), ("le", "at most"),
                        ("lt", "less than")):  # fmt: skip
        if key in ctx:
            return f"a number {phrase} {ctx[key]}"
    return None


def _type_phrase(kind: str) -> str:
    return {
        "int_type": "an integer",
        "float_type": "a number",
        "string_type": "a string",
        "bool_type": "true or false",
        "list_type": "a list",
        "dict_type": "an object",
        "model_type": "an object",
        "model_attributes_type": "an object",
    }.get(kind, "a value of the documented type")


def problems_from_validation_error(root: type[BaseModel], err: ValidationError) -> list[Problem]:
    """Every error in `err` as a Problem with a readable path; duplicates are dropped."""
    seen: set[Problem] = set()
    out: list[Problem] = []
    for error in err.errors(include_url=False):
        problem = _translate(root, error)
        if problem not in seen:
            seen.add(problem)
            out.append(problem)
    return out
