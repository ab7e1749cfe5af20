"""The diagnose request body: the network request, the alternatives to compare, the batch size.

    {"request": <a request as for /v1/weights>,
     "alternatives": [{"label": "tiny uniform", "init": {"method": "symmetric_uniform",
                                                         "bound": 0.01}}, ...],
     "batch": 64}

`init` is the same weight override a layer's `init` takes
(seedbed.core.request.overrides.WeightOverride),
including {"method": "constant", "value": v}; an alternative applies it to the weight tensors
of every dense, conv, attention and embedding layer (norm scales keep their plan). The first run
is always the request as given, labelled "recommended".

Error fields are paths in this body: "request.layers[2].n_in", "alternatives[0].init.bound",
"batch".
"""

from __future__ import annotations

import re
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from seedbed.core.request.overrides import WeightOverride
from seedbed.core.request.problems import (
    BODY,
    Allowed,
    Problem,
    RequestRejected,
    describe_input,
    field_error,
    problems_from_validation_error,
)

RECOMMENDED = "recommended"
DEFAULT_BATCH = 64
LABEL_MAX = 64
_LABEL = re.compile(r"[A-Za-z0-9][A-Za-z0-9 _.,:+=()/\-]*")
_LABEL_TEXT = (
    f"1 to {LABEL_MAX} characters: letters, digits, spaces and _ . , : + = ( ) / -, "
    "starting with a letter or digit"
)


class _Strict(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False, frozen=True)


class AlternativeSpec(_Strict):
    """A named initialisation to compare with the recommendation."""

    model_config = ConfigDict(title="diagnostic alternative")

    label: Annotated[str, Allowed(_LABEL_TEXT)] = Field(
        description="Name of the run in the response and the chart.", examples=["tiny uniform"]
    )
    init: WeightOverride = Field(
        description="Applied to every dense, conv, attention and embedding layer's weights.",
        examples=[{"method": "symmetric_uniform", "bound": 0.01}],
    )

    @field_validator("label", mode="after")
    @classmethod
    def _check_label(cls, value: str) -> str:
        if not 1 <= len(value) <= LABEL_MAX or not _LABEL.fullmatch(value):
            raise field_error(
                "invalid_value", f"got {describe_input(value)}; allowed: {_LABEL_TEXT}"
            )
        if value == RECOMMENDED:
            raise field_error(
                "invalid_value",
                f"{RECOMMENDED!r} names the first run (the request as given); choose another label",
            )
        return value


class DiagnoseBody(_Strict):
    """What POST /v1/diagnose takes."""

    model_config = ConfigDict(title="diagnose request")

    request: Annotated[Any, Allowed("a network request object, as for /v1/weights")] = Field(
        description="The network, exactly as for /v1/weights."
    )
    alternatives: Annotated[list[AlternativeSpec], Allowed("a list of {label, init} objects")] = (
        Field(default_factory=list, description="Initialisations to compare, in chart order.")
    )
    batch: Annotated[int, Field(ge=1), Allowed("a positive integer")] = Field(
        default=DEFAULT_BATCH, description="Samples in the synthetic batch.", examples=[64]
    )


def parse_body(data: object) -> DiagnoseBody:
    """Validate the outer body (the inner request is parsed by seedbed.core.request.parse)."""
    if not isinstance(data, dict):
        raise RequestRejected(
            [
                Problem(
                    BODY,
                    "invalid_type",
                    f"got {describe_input(data)}; allowed: a JSON object with fields request, "
                    "alternatives, batch",
                )
            ]
        )
    try:
        body = DiagnoseBody.model_validate(data)
    except ValidationError as err:
        raise RequestRejected(problems_from_validation_error(DiagnoseBody, err)) from None
    seen: dict[str, int] = {}
    problems = []
    for i, alt in enumerate(body.alternatives):
        if alt.label in seen:
            problems.append(
                Problem(
                    f"alternatives[{i}].label",
                    "duplicate_name",
                    f"label {alt.label!r} is already used by alternatives[{seen[alt.label]}]; "
                    "labels must be unique",
                )
            )
        seen.setdefault(alt.label, i)
    if problems:
        raise RequestRejected(problems)
    return body


__all__ = ["DEFAULT_BATCH", "RECOMMENDED", "AlternativeSpec", "DiagnoseBody", "parse_body"]
