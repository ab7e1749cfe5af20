"""Typed answers of the recipe, audit and diagnose endpoints, read from their JSON documents.

Each keeps the whole document in `document` as well, so nothing the service adds is lost; the
typed fields are the ones a script branches on.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from seedbed_client.errors import IntegrityError

__all__ = [
    "AuditFinding",
    "AuditReport",
    "DiagnosisReport",
    "DiagnosisRun",
    "PublishedRecipe",
    "RecipeSummary",
    "StoredRecipe",
]


def _need(doc: Mapping[str, Any], key: str, kind: type | tuple[type, ...], what: str) -> Any:
    value = doc.get(key)
    if not isinstance(value, kind):
        raise IntegrityError(f"{what} has no usable {key!r} field (got {str(value)[:80]})")
    return value


@dataclass(frozen=True)
class RecipeSummary:
    """One version of a recipe as listings show it."""

    name: str
    version: int
    description: str
    publisher: str
    published_at: str
    algorithm: str
    latest_version: int | None = None  # set in the list of names only

    @property
    def ref(self) -> str:
        return f"{self.name}@{self.version}"

    @classmethod
    def from_document(cls, doc: Mapping[str, Any]) -> RecipeSummary:
        what = "a recipe summary"
        latest = doc.get("latest_version")
        return cls(
            name=_need(doc, "name", str, what),
            version=_need(doc, "version", int, what),
            description=str(doc.get("description", "")),
            publisher=str(doc.get("publisher", "")),
            published_at=str(doc.get("published_at", "")),
            algorithm=str(doc.get("algorithm", "")),
            latest_version=latest if isinstance(latest, int) else None,
        )


@dataclass(frozen=True)
class PublishedRecipe:
    """The answer to a publish: the version, and whether this call created it (False: the
    newest version already stored the same request, and that version is returned)."""

    summary: RecipeSummary
    created: bool
    fingerprints: Mapping[str, str]

    @property
    def ref(self) -> str:
        return self.summary.ref

    @property
    def version(self) -> int:
        return self.summary.version


@dataclass(frozen=True)
class StoredRecipe:
    """One stored version: its request, plan and per-tensor SHA-256 fingerprints."""

    summary: RecipeSummary
    request: dict[str, Any]
    plan: dict[str, Any]
    fingerprints: Mapping[str, str]
    content_sha256: str | None
    document: dict[str, Any] = field(repr=False)

    @property
    def ref(self) -> str:
        return self.summary.ref

    @classmethod
    def from_document(cls, doc: dict[str, Any]) -> StoredRecipe:
        what = "a stored recipe"
        return cls(
            summary=RecipeSummary.from_document(doc),
            request=_need(doc, "request", dict, what),
            plan=_need(doc, "plan", dict, what),
            fingerprints=_need(doc, "fingerprints", dict, what),
            content_sha256=doc.get("content_sha256"),
            document=doc,
        )


@dataclass(frozen=True)
class AuditFinding:
    tensor: str | None
    severity: str  # error | warning | note
    code: str
    message: str


@dataclass(frozen=True)
class AuditReport:
    """POST /v1/audit's report. `verdict` is the worst severity: errors, warnings or ok.

    An audit checks a starting point, not a trained model (see `notice`).
    """

    verdict: str
    notice: str
    findings: tuple[AuditFinding, ...]
    tensors: tuple[dict[str, Any], ...]
    document: dict[str, Any] = field(repr=False)

    @property
    def errors(self) -> tuple[AuditFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "error")

    @property
    def passed(self) -> bool:
        """No error-level finding (warnings and notes allowed): what a CI gate checks."""
        return not self.errors

    @classmethod
    def from_document(cls, doc: dict[str, Any]) -> AuditReport:
        what = "the audit report"
        summary = _need(doc, "summary", dict, what)
        findings = tuple(
            AuditFinding(
                tensor=f.get("tensor"),
                severity=str(f.get("severity", "")),
                code=str(f.get("code", "")),
                message=str(f.get("message", "")),
            )
            for f in _need(doc, "findings", list, what)
            if isinstance(f, dict)
        )
        return cls(
            verdict=_need(summary, "verdict", str, "the audit summary"),
            notice=str(doc.get("notice", "")),
            findings=findings,
            tensors=tuple(t for t in doc.get("tensors", []) if isinstance(t, dict)),
            document=doc,
        )


@dataclass(frozen=True)
class DiagnosisRun:
    """One simulated initialisation: the request as given ("recommended") or an alternative."""

    label: str
    verdict: str  # stable | vanishing | exploding | symmetric
    failed_at: str | None
    reason: str
    layers: tuple[dict[str, Any], ...]

    @property
    def stable(self) -> bool:
        return self.verdict == "stable"


@dataclass(frozen=True)
class DiagnosisReport:
    """POST /v1/diagnose's answer. Estimates from one synthetic batch at initialisation, not a
    promise that training succeeds (see `notice`)."""

    notice: str
    runs: tuple[DiagnosisRun, ...]
    document: dict[str, Any] = field(repr=False)

    @property
    def recommended(self) -> DiagnosisRun:
        """The run of the request as given (always the first)."""
        return self.runs[0]

    @property
    def passed(self) -> bool:
        """The request as given is stable: what a CI gate checks (alternatives do not count)."""
        return self.recommended.stable

    def run(self, label: str) -> DiagnosisRun:
        for r in self.runs:
            if r.label == label:
                return r
        raise KeyError(label)

    @classmethod
    def from_document(cls, doc: dict[str, Any]) -> DiagnosisReport:
        runs = tuple(
            DiagnosisRun(
                label=str(r.get("label", "")),
                verdict=str(r.get("verdict", "")),
                failed_at=r.get("failed_at"),
                reason=str(r.get("reason", "")),
                layers=tuple(x for x in r.get("layers", []) if isinstance(x, dict)),
            )
            for r in _need(doc, "runs", list, "the diagnosis")
            if isinstance(r, dict)
        )
        if not runs:
            raise IntegrityError("the diagnosis has no runs")
        return cls(notice=str(doc.get("notice", "")), runs=runs, document=doc)
