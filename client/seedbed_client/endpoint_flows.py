"""Flows (see flows.py) for the recipe registry, the audit and the diagnosis endpoints.

Recipe weights reuse the weights flow: a numbered version's body never changes, so a verified
cached copy is used without asking the service; `latest` is resolved with one small GET each
call, and when the service cannot be reached the newest cached version of that name is used
and the result says so.
"""

from __future__ import annotations

import os
import uuid
from collections.abc import Generator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import quote

from seedbed_client.environment import ENV_KEY, ENV_KEY_FILE, environment
from seedbed_client.errors import IntegrityError, Problem, ServiceUnavailable, SpecInvalid
from seedbed_client.flows import (
    Delivery,
    Effect,
    FlowContext,
    Outcome,
    document_flow,
    weights_flow,
)
from seedbed_client.records import (
    AuditReport,
    DiagnosisReport,
    PublishedRecipe,
    RecipeSummary,
    StoredRecipe,
)
from seedbed_client.spool import ProgressHook
from seedbed_client.wire import RecipeRef, RecipeWeightsCall, WeightFormat, canonical_json

# Audit uploads are read whole into memory before sending; the service's default limit is
# 256 MiB, and a larger file would be refused anyway.
MAX_AUDIT_UPLOAD = 1 << 30

FlowOf = Generator[Effect, Outcome, Any]


def _recipe_path(ref: RecipeRef) -> str:
    return f"/v1/recipes/{quote(ref.name)}/{ref.path_version}"


# --- reading ---------------------------------------------------------------------------------


def recipe_list_flow(ctx: FlowContext, page: int = 1000) -> FlowOf:
    """Every recipe name with its newest version, following `next_after` page by page."""
    out: list[RecipeSummary] = []
    after: str | None = None
    while True:
        params = {"limit": str(page)} if after is None else {"limit": str(page), "after": after}
        _, doc = yield from document_flow("GET", "/v1/recipes", None, ctx, params=params)
        out.extend(RecipeSummary.from_document(r) for r in doc.get("recipes", []))
        after = doc.get("next_after")
        if not isinstance(after, str):
            return out


def recipe_versions_flow(name: str, ctx: FlowContext) -> FlowOf:
    _, doc = yield from document_flow("GET", f"/v1/recipes/{quote(name)}", None, ctx)
    return [RecipeSummary.from_document(v) for v in doc.get("versions", [])]


def stored_recipe_flow(ref: RecipeRef, ctx: FlowContext) -> FlowOf:
    _, doc = yield from document_flow("GET", _recipe_path(ref), None, ctx)
    return StoredRecipe.from_document(doc)


# --- publishing ------------------------------------------------------------------------------


def publishing_key(
    key: str | None,
    key_file: str | os.PathLike[str] | None,
    environ: Mapping[str, str] | None = None,
) -> str:
    """The key: given, else read from `key_file`, else SEEDBED_PUBLISH_KEY, else the file
    SEEDBED_PUBLISH_KEY_FILE names. Files hold the key on their first non-empty line."""
    env = environment(environ)
    if key:
        return key.strip()
    path = key_file or env.get(ENV_KEY_FILE) or None
    if key_file is None and env.get(ENV_KEY):
        return env[ENV_KEY].strip()
    if path:
        try:
            lines = Path(path).read_text(encoding="utf-8").splitlines()
        except OSError as exc:
            raise SpecInvalid(
                [
                    Problem(
                        "key_file", "unreadable", f"cannot read the key file {str(path)!r}: {exc}"
                    )
                ]
            ) from None
        for line in lines:
            if line.strip():
                return line.strip()
        raise SpecInvalid([Problem("key_file", "empty", f"the key file {str(path)!r} is empty")])
    raise SpecInvalid(
        [
            Problem(
                "key",
                "missing_field",
                f"publishing needs a key: set {ENV_KEY}, or {ENV_KEY_FILE} (a file holding it), "
                "or pass key_file=; `seedbed keys create NAME` on the service makes one",
            )
        ]
    )


def publish_flow(
    name: str, request: dict[str, Any], description: str, key: str, ctx: FlowContext
) -> FlowOf:
    body = canonical_json({"name": name, "request": request, "description": description})
    # Not retried on a dropped answer: a retry would publish again (harmlessly now, since an
    # identical request returns the same version, but a 5xx may have stored it already).
    reply, doc = yield from document_flow(
        "POST",
        "/v1/recipes",
        body,
        ctx,
        ok=(200, 201),
        more_headers={"authorization": f"Bearer {key}"},
    )
    return PublishedRecipe(
        summary=RecipeSummary.from_document(doc),
        created=reply.status == 201,
        fingerprints=dict(doc.get("fingerprints", {})),
    )


# --- recipe weights --------------------------------------------------------------------------


@dataclass(frozen=True)
class RecipeDelivery:
    delivery: Delivery
    ref: RecipeRef  # the concrete version served
    asked: RecipeRef
    note: str | None  # set when `latest` fell back to a cached version


def _check_fingerprints(delivery: Delivery, prints: Mapping[str, str], ref: RecipeRef) -> None:
    served = {t["tensor"]: t.get("sha256") for t in delivery.manifest.get("tensors", [])}
    if set(served) != set(prints):
        raise IntegrityError(
            f"{ref}: the weights hold {sorted(served)[:5]}, the stored version lists "
            f"{sorted(prints)[:5]}; no data was returned"
        )
    wrong = sorted(n for n, d in served.items() if prints.get(n) != d)
    if wrong:
        raise IntegrityError(
            f"{ref}: {len(wrong)} tensor(s) differ from the fingerprints stored at publish time "
            f"({', '.join(wrong[:5])}); no data was returned",
            wrong,
        )


def recipe_weights_flow(
    ref: RecipeRef,
    fmt: WeightFormat,
    service: str,
    ctx: FlowContext,
    *,
    progress: ProgressHook | None = None,
    spool_dir: Path | None = None,
) -> FlowOf:
    """Weights of `ref`, verified against their manifest and (when fetched) the fingerprints
    the registry stored at publish time."""
    version = ref.version
    prints: Mapping[str, str] | None = None
    note = None
    if version is None:
        try:
            stored = yield from stored_recipe_flow(ref, ctx)
            version, prints = stored.summary.version, stored.fingerprints
        except ServiceUnavailable as exc:
            cache = ctx.cache
            entry = (
                None if cache is None else cache.newest_labelled(service=service, recipe=ref.name)
            )
            if entry is None or entry.labels is None:
                raise
            version = int(entry.labels["version"])
            note = (
                f"{ref}: the service could not be reached ({exc.args[0] if exc.args else exc})"
                f"; using {ref.name}@{version}, the newest version in the local cache, which "
                "may not be the newest published"
            )
    concrete = RecipeRef(ref.name, version)
    call = RecipeWeightsCall(service, ref.name, version, fmt)
    delivery = yield from weights_flow(call, ctx, progress=progress, spool_dir=spool_dir)
    if prints is not None:
        _check_fingerprints(delivery, prints, concrete)
    return RecipeDelivery(delivery, concrete, ref, note)


# --- audit and diagnose ----------------------------------------------------------------------


def _form(parts: Sequence[tuple[str, str, str, bytes]]) -> tuple[bytes, str]:
    """multipart/form-data (RFC 7578) of (name, filename, media type, bytes) parts."""
    boundary = "seedbed-" + uuid.uuid4().hex
    chunks: list[bytes] = []
    for name, filename, media, data in parts:
        disposition = f'form-data; name="{name}"'
        if filename:
            disposition += f'; filename="{filename}"'
        chunks.append(
            f"--{boundary}\r\nContent-Disposition: {disposition}\r\n"
            f"Content-Type: {media}\r\n\r\n".encode("ascii")
        )
        chunks.append(data)
        chunks.append(b"\r\n")
    chunks.append(f"--{boundary}--\r\n".encode("ascii"))
    return b"".join(chunks), f"multipart/form-data; boundary={boundary}"


def audit_flow(path: Path, request: dict[str, Any] | None, ctx: FlowContext) -> FlowOf:
    try:
        size = path.stat().st_size
        if size > MAX_AUDIT_UPLOAD:
            raise SpecInvalid(
                [
                    Problem(
                        "path",
                        "too_large",
                        f"{path} is {size} bytes; audits take up to {MAX_AUDIT_UPLOAD}",
                    )
                ]
            )
        data = path.read_bytes()
    except OSError as exc:
        raise SpecInvalid(
            [Problem("path", "unreadable", f"cannot read {str(path)!r}: {exc}")]
        ) from None
    if request is None:
        body, media = data, "application/octet-stream"
    else:
        name = path.name.replace('"', "_")
        body, media = _form(
            [
                ("file", name, "application/octet-stream", data),
                ("request", "", "application/json", canonical_json(request)),
            ]
        )
    _, doc = yield from document_flow("POST", "/v1/audit", body, ctx, content_type=media)
    return AuditReport.from_document(doc)


def diagnose_body(request: dict[str, Any], alternatives: Any, batch: int | None) -> bytes:
    doc: dict[str, Any] = {"request": request}
    if alternatives:
        if isinstance(alternatives, Mapping):
            alternatives = [{"label": k, "init": v} for k, v in alternatives.items()]
        doc["alternatives"] = list(alternatives)
    if batch is not None:
        doc["batch"] = batch
    return canonical_json(doc)


def diagnose_flow(body: bytes, ctx: FlowContext) -> FlowOf:
    _, doc = yield from document_flow("POST", "/v1/diagnose", body, ctx)
    return DiagnosisReport.from_document(doc)


def chart_flow(body: bytes, kind: str, ctx: FlowContext) -> FlowOf:
    if kind not in ("svg", "html"):
        raise SpecInvalid([Problem("chart", "not_allowed", f"got {kind!r}; allowed: svg, html")])
    _, text = yield from document_flow(
        "POST", "/v1/diagnose", body, ctx, params={"chart": kind}, accept="image/svg+xml, text/html"
    )
    return str(text)
