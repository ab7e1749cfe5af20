"""Caller overrides keyed by layer name: every key must name a layer, or the call fails with the
valid names and the nearest match."""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from seedbed_client.errors import Problem, SpecInvalid


def did_you_mean(key: str, names: Iterable[str]) -> str:
    close = difflib.get_close_matches(key, list(names), n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else ""


def check_keys(
    option: str, mapping: Mapping[str, Any] | None, names: Sequence[str]
) -> list[Problem]:
    """Problems for every key of `mapping` (the `option` argument) that names no layer."""
    if not mapping:
        return []
    valid = ", ".join(names) if len(names) <= 40 else ", ".join(names[:40]) + ", ..."
    return [
        Problem(
            f"{option}[{key!r}]",
            "unknown_layer",
            f"{key!r} names no layer of this module{did_you_mean(str(key), names)} "
            f"Layer names: {valid}",
        )
        for key in mapping
        if key not in names
    ]


def raise_unknown_keys(
    options: Mapping[str, Mapping[str, Any] | None], names: Sequence[str]
) -> None:
    problems = [p for option, m in options.items() for p in check_keys(option, m, names)]
    if problems:
        raise SpecInvalid(problems)


def qualified_problems(problems: Sequence[Problem], modules: Sequence[str]) -> list[Problem]:
    """Request-path problems (`layers[3].branch`) restated at the module's qualified name
    (`blocks.0.attn.branch`, "layers[3]" kept in the message for the request's readers)."""
    out = []
    for p in problems:
        field, message = p.field, p.message
        if field.startswith("layers[") and "]" in field:
            index_text, rest = field[len("layers[") :].split("]", 1)
            if index_text.isdigit() and int(index_text) < len(modules):
                where = modules[int(index_text)]
                field = f"{where}{rest}"
                message = f"{message} (request field {p.field})"
        out.append(Problem(field, p.code, message))
    return out
