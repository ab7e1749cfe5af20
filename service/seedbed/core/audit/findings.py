"""One finding of an audit, and the vocabulary of severities and codes.

Severities:
    error     the starting point is broken: training from it is wasted or cannot break symmetry
    warning   likely to hurt training, or the upload does not match the request describing it
    note      worth knowing; not a defect by itself

Codes (our own vocabulary):
    non_finite        NaN or infinite values
    all_zero          every value is 0
    all_constant      every value is the same non-zero number
    mean_offset       a matrix whose mean exceeds half its std (units start correlated)
    twin_units        groups of units with identical incoming weights
    rank_deficient    the matrix has fewer independent directions than its shape allows
    near_degenerate   one or a few singular values below the tolerance (see rank.py)
    rank_skipped      the rank was not computed (budget spent, or non-finite values)
    scale_too_large   std more than twice the recommended one
    scale_too_small   std less than half the recommended one
    scale_off         std within a factor of 2 of the recommended one, but not within 25%
    not_as_planned    the plan asks for constant values and the tensor holds others
    missing_tensor    the request describes a tensor the file does not have
    not_in_request    the file has a tensor the request does not describe
    shape_mismatch    the file's shape differs from the request's
    dtype_mismatch    the file's dtype differs from the request's
    not_float         an integer or boolean tensor: listed, not compared with a plan
    not_analysed      a dtype the audit does not read (float8, complex, structured ...)
    empty_tensor      a tensor with no values
    ignored_member    a member of the file that is not a tensor
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

Severity = Literal["error", "warning", "note"]
SEVERITY_ORDER: dict[str, int] = {"error": 0, "warning": 1, "note": 2}
FINDING_CODES = frozenset(
    {
        "non_finite",
        "all_zero",
        "all_constant",
        "mean_offset",
        "twin_units",
        "rank_deficient",
        "near_degenerate",
        "rank_skipped",
        "scale_too_large",
        "scale_too_small",
        "scale_off",
        "not_as_planned",
        "missing_tensor",
        "not_in_request",
        "shape_mismatch",
        "dtype_mismatch",
        "not_float",
        "not_analysed",
        "empty_tensor",
        "ignored_member",
    }
)


@dataclass(frozen=True)
class Finding:
    tensor: str | None  # None for findings about the file as a whole
    severity: Severity
    code: str
    message: str

    def __post_init__(self) -> None:
        if self.code not in FINDING_CODES or self.severity not in SEVERITY_ORDER:
            raise ValueError(f"unknown finding code or severity: {self.code!r}, {self.severity!r}")

    def as_dict(self) -> dict[str, str | None]:
        return {
            "tensor": self.tensor,
            "severity": self.severity,
            "code": self.code,
            "message": self.message,
        }
