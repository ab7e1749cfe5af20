"""The description of a module: the request, how to copy the answer back, and per layer what
was inferred and from where, printable as a table."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from seedbed_client.torch_adapter.modules import ParameterCopy

# Where a fact came from, in the words the table prints.
FROM_TRACE = "traced graph"
FROM_HOOKS = "forward hooks"
FROM_ORDER = "module order"
FROM_CALLER = "caller override"
FROM_MODULE = "module settings"
FROM_DEFAULT = "default (allowed)"


@dataclass
class LayerFacts:
    """What the adapter decided for one request layer, and why."""

    layer: str  # the request's layer name
    module: str  # the torch module's qualified name
    kind: str
    activation: str = "-"  # "-": the kind takes none (embedding, attention, gated cells)
    activation_from: str = "-"
    branch: str | None = None
    branch_from: str = "-"
    role: str = "hidden"
    role_from: str = "-"
    why: list[str] = field(default_factory=list)


@dataclass
class ModuleDescription:
    """A module as a seedbed request, how to copy the answer back, and what was inferred."""

    request: dict[str, Any]
    copies: list[ParameterCopy]
    facts: list[LayerFacts] = field(default_factory=list)
    graph_source: str = FROM_ORDER  # which reader the inferences came from
    inferred: dict[str, str] = field(default_factory=dict)  # layer -> activation, inferred
    not_inferred: list[str] = field(default_factory=list)  # left at the default, allowed
    skipped: list[str] = field(default_factory=list)  # parameters left untouched
    notes: list[str] = field(default_factory=list)
    ties: dict[str, list[str]] = field(default_factory=dict)  # planned param -> its aliases
    multipliers: list[dict[str, Any]] = field(default_factory=list)  # filled by seed_module
    unused_tensors: list[str] = field(default_factory=list)  # served, no parameter (policies)
    calibration: dict[str, Any] | None = None  # filled by calibrate_module

    def layer_modules(self) -> list[str]:
        """The torch module of every request layer, in request order."""
        return [f.module for f in self.facts]

    def table(self, reasons: bool = False) -> str:
        """Per layer: kind, activation, branch and role, each with where it came from; with
        `reasons`, each layer's evidence ("followed by gelu", "feeds a residual add") below."""
        head = ("layer", "kind", "activation", "from", "branch", "from", "role", "from")
        rows = [head] + [
            (
                f.layer,
                f.kind,
                f.activation,
                f.activation_from,
                f.branch or "-",
                f.branch_from,
                f.role,
                f.role_from,
            )
            for f in self.facts
        ]
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = [
            "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip() for r in rows
        ]
        if reasons:
            body = [lines[0]]
            for f, line in zip(self.facts, lines[1:], strict=True):
                body.append(line)
                body.extend(f"    {why}" for why in f.why if why)
            lines = body
        lines.insert(1, "  ".join("-" * w for w in widths))
        lines.append(f"graph read from: {self.graph_source}")
        for planned, aliases in self.ties.items():
            lines.append(f"tied: {', '.join(aliases)} share {planned} (planned once)")
        lines += [f"note: {n}" for n in self.notes]
        if self.calibration is not None:
            c = self.calibration
            lines.append(
                f"calibrated: batch sha256 {c['batch_sha256']}, tolerance {c['tolerance']}, "
                f"{len(c['factors'])} layers rescaled (values no longer the service's)"
            )
        return "\n".join(lines)

    def summary(self) -> str:
        lines = [f"{len(self.copies)} parameters from {len(self.request['layers'])} layers"]
        lines += [f"  activation of {k} inferred: {v}" for k, v in self.inferred.items()]
        lines += [f"  activation of {k}: not inferred (default allowed)" for k in self.not_inferred]
        lines += [f"  left untouched: {p}" for p in self.skipped]
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.table()
