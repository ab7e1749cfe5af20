"""One call from uploaded bytes to everything the ONNX endpoints answer with."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from seedbed.core.plan import build_plan, plan_document
from seedbed.core.plan_types import Plan
from seedbed.core.request.limits import Limits
from seedbed.onnx_import.loading import LoadedModel, parse_model
from seedbed.onnx_import.translation import Translation, translate

NOTICE = (
    "The request below was inferred from the graph's operators without running it. Check the "
    "inference table (each layer's activation and where it was read from) before training: "
    "the plan's scales follow from it. The diagnostics of POST /v1/diagnose are estimates, "
    "not a promise that training will succeed."
)


@dataclass(frozen=True)
class ImportedModel:
    loaded: LoadedModel
    translation: Translation
    plan: Plan

    def review(self) -> dict[str, Any]:
        """The inferred request, the inference table, bindings and the plan (no values)."""
        t = self.translation
        return {
            "notice": NOTICE,
            "opset": self.loaded.opset,
            "request": t.request,
            "inference": list(t.inference),
            "initializers": [b.document() for b in t.bindings],
            "kept": list(t.kept),
            "constants": list(t.constants),
            "notes": list(t.notes),
            "plan": plan_document(self.plan),
        }


def import_model(
    data: bytes, max_bytes: int, seed: int | str, keep: Iterable[str], limits: Limits
) -> ImportedModel:
    """Raises ModelRefused for the file, RequestRejected when the inferred request is refused
    by the same checks as POST /v1/plan."""
    loaded = parse_model(data, max_bytes)
    translation = translate(loaded, seed, keep)
    plan = build_plan(translation.request, limits)
    return ImportedModel(loaded, translation, plan)
