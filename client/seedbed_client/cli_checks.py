"""Command-line subcommands for recipes, audits, diagnoses and `verify --against`.

    seedbed recipes list | show NAME[@VERSION] | publish NAME REQUEST.json
    seedbed audit FILE [--request REQUEST.json]          exit 5 on an error-level finding
    seedbed diagnose REQUEST.json [--chart out.svg]       exit 5 when the request is not stable

Registered by `seedbed_client.cli.register`; exit codes are the ones documented there, plus
5 = the check ran and found a problem (so `seedbed audit start.npz` can gate a CI job).
The publishing key comes from SEEDBED_PUBLISH_KEY or a file (`--key-file`, or
SEEDBED_PUBLISH_KEY_FILE), never from the command line, which shell history would keep.
"""

from __future__ import annotations

import argparse
import json
import shutil
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TextIO

from seedbed_client.client import Client
from seedbed_client.containers import Inspection
from seedbed_client.records import AuditReport, DiagnosisReport, StoredRecipe

EXIT_FINDINGS = 5

ReadRequest = Callable[[str], dict[str, Any]]
MakeClient = Callable[..., Client]


def _table(rows: Sequence[tuple[str, ...]], heads: tuple[str, ...]) -> list[str]:
    widths = [max(len(r[i]) for r in [heads, *rows]) for i in range(len(heads))]

    def line(cells: tuple[str, ...]) -> str:
        return "  ".join(c.ljust(w) for c, w in zip(cells, widths, strict=True)).rstrip()

    return [line(heads), line(tuple("-" * w for w in widths)), *(line(r) for r in rows)]


# --- recipes ---------------------------------------------------------------------------------


def recipes_list(client: Client, out: TextIO) -> int:
    rows = [
        (r.name, str(r.latest_version or r.version), r.published_at, r.publisher, r.description)
        for r in client.recipes()
    ]
    if not rows:
        out.write("no recipes published yet\n")
        return 0
    for text in _table(rows, ("name", "latest", "published", "publisher", "description")):
        out.write(text + "\n")
    return 0


def recipe_show(
    client: Client, ref: str, out: TextIO, plan_lines: Callable[..., list[str]], width: int
) -> int:
    stored: StoredRecipe = client.recipe(ref)
    s = stored.summary
    out.write(
        f"{s.name}@{s.version}  published {s.published_at} by {s.publisher}; algorithm "
        f"{s.algorithm}\n"
    )
    if s.description:
        out.write(f"  {s.description}\n")
    versions = client.recipe_versions(s.name)
    out.write(f"  versions: {', '.join(str(v.version) for v in versions)}\n")
    for text in plan_lines(stored.plan, width):
        out.write(text + "\n")
    return 0


def recipe_publish(
    client: Client,
    name: str,
    request: dict[str, Any],
    description: str,
    key_file: str | None,
    out: TextIO,
) -> int:
    published = client.publish(name, request, description, key_file=key_file)
    if published.created:
        out.write(f"published {published.ref} ({len(published.fingerprints)} tensors)\n")
    else:
        out.write(f"{published.ref} already stores this request; no new version made\n")
    return 0


# --- audit -----------------------------------------------------------------------------------


def print_audit(report: AuditReport, out: TextIO) -> int:
    rows = [(f.severity, f.tensor or "-", f.code, _first(f.message)) for f in report.findings]
    if rows:
        for text in _table(rows, ("severity", "tensor", "code", "why")):
            out.write(text + "\n")
    out.write(
        f"verdict: {report.verdict} ({len(report.errors)} error(s), "
        f"{len(report.findings)} finding(s), {len(report.tensors)} tensor(s))\n"
    )
    out.write(f"note: {report.notice}\n")
    return 0 if report.passed else EXIT_FINDINGS


def _first(text: str, limit: int = 110) -> str:
    cut = text.split(". ")[0]
    return cut if len(cut) <= limit else cut[: limit - 3] + "..."


# --- diagnose --------------------------------------------------------------------------------


def print_diagnosis(report: DiagnosisReport, out: TextIO) -> int:
    rows = [(r.label, r.verdict, r.failed_at or "-", _first(r.reason)) for r in report.runs]
    for text in _table(rows, ("run", "verdict", "at layer", "why")):
        out.write(text + "\n")
    out.write(f"note: {report.notice}\n")
    return 0 if report.passed else EXIT_FINDINGS


def read_alternatives(path: str | None) -> Any:
    if path is None:
        return None
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise argparse.ArgumentTypeError(f"cannot read alternatives from {path!r}: {exc}") from None


# --- verify --against ------------------------------------------------------------------------


def compare_with(
    inspection: Inspection, expected: dict[str, tuple[str, bool]], what: str, out: TextIO
) -> int:
    """Per tensor: does the file's tensor equal what `what` says it should be?"""
    bad = 0
    seen = set()
    for t in inspection.tensors:
        seen.add(t.name)
        if "rows" in t.entry:
            out.write(f"--  {t.name}  a block of rows {t.entry['rows']}: not compared\n")
            continue
        want = expected.get(t.name)
        if want is None:
            bad += 1
            out.write(f"BAD {t.name}  not a tensor of {what}\n")
        elif t.sha256 != want[0]:
            bad += 1
            out.write(
                f"BAD {t.name}  differs from {what} (sha256 {t.sha256[:16]}..., "
                f"expected {want[0][:16]}...)\n"
            )
        else:
            mark = "  (made on this machine; platform-dependent)" if want[1] else ""
            out.write(f"ok  {t.name}  equals {what}{mark}\n")
    missing = sorted(set(expected) - seen)
    for name in missing:
        out.write(f"--  {name}  in {what}, not in the file\n")
    if bad:
        out.write(f"{bad} tensor(s) do NOT match {what}\n")
        return 1
    out.write(f"every tensor in the file matches {what}\n")
    return 0


def against_source(text: str, read_request: ReadRequest) -> tuple[Any, str]:
    """A request file (anything ending in .json, or an existing file) or a recipe reference."""
    path = Path(text)
    if text.endswith(".json") or path.is_file() or text == "-":
        return read_request(text), f"the request in {text}"
    return text, text


def terminal_width(given: int | None) -> int:
    return given or shutil.get_terminal_size((100, 24)).columns


def stdout() -> TextIO:
    return sys.stdout
