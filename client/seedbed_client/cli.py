"""Command line: `fetch`, `verify`, `show`, `recipes`, `audit`, `diagnose`, under `seedbed` or
`python -m seedbed_client`.

    seedbed fetch request.json -o weights.safetensors     download, verify, write atomically
    seedbed fetch --recipe hive@latest -o hive.npz        a published recipe's weights
    seedbed verify weights.safetensors                    recompute every sha256 offline
    seedbed verify w.npz --against request.json           ... and compare with what it should be
    seedbed show request.json                             the plan as a readable table
    seedbed recipes list | show NAME@3 | publish NAME request.json
    seedbed audit start.npz --request request.json        exit 5 on an error-level finding
    seedbed diagnose request.json --chart depth.svg       exit 5 unless the request is stable

Exit codes (the same for every subcommand):
    0  ok
    1  verification failed: a tensor does not match its manifest, a body was cut short, or
       the file is not a readable seedbed download
    2  usage or bad input: options, a request file that is missing or not JSON, a request the
       client refuses before sending
    3  the service answered with an error (4xx, or 5xx after every retry)
    4  the service could not be reached (after every retry)
    5  audit / diagnose: the check ran and found an error-level problem (a CI gate)

The server is `--server`, else SEEDBED_URL, else http://127.0.0.1:8600.
"""

from __future__ import annotations

import argparse
import json
import mmap
import shutil
import signal
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TextIO

from seedbed_client import cli_checks as checks
from seedbed_client._version import __version__
from seedbed_client.cli_shared import (
    EXIT_MISMATCH,
    EXIT_OK,
    EXIT_SERVICE,
    EXIT_UNREACHABLE,
    EXIT_USAGE,
    UsageProblem,
)
from seedbed_client.cli_shared import client_from_args as _client
from seedbed_client.client import DEFAULT_URL
from seedbed_client.containers import inspect_body, page_releaser, sniff_format
from seedbed_client.environment import ENV_URL
from seedbed_client.errors import (
    IntegrityError,
    SeedbedError,
    ServiceError,
    ServiceUnavailable,
    SpecInvalid,
)
from seedbed_client.progress import ProgressBar
from seedbed_client.wire import FORMATS, WeightFormat

Handler = Callable[[argparse.Namespace], int]
_HANDLER = "seedbed_client_handler"


def exit_code_for(exc: BaseException) -> int:
    if isinstance(exc, IntegrityError):
        return EXIT_MISMATCH
    if isinstance(exc, SpecInvalid | UsageProblem):
        return EXIT_USAGE
    if isinstance(exc, ServiceUnavailable):
        return EXIT_UNREACHABLE if exc.last_status is None else EXIT_SERVICE
    if isinstance(exc, ServiceError):
        return EXIT_SERVICE
    return EXIT_USAGE


def _read_request(path: str) -> dict[str, Any]:
    try:
        text = sys.stdin.read() if path == "-" else Path(path).read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise UsageProblem(f"cannot read the request file {path!r}: {exc}") from None
    try:
        data = json.loads(text)
    except ValueError as exc:
        raise UsageProblem(f"the request file {path!r} is not JSON: {exc}") from None
    if not isinstance(data, dict):
        raise UsageProblem(f"the request file {path!r} holds {type(data).__name__}, not an object")
    return data


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"{text} must be greater than 0")
    return value


def _attempts(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number >= 1")
    return int(text)


def _add_service_options(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--server",
        metavar="URL",
        help=f"the seedbed service (default: {ENV_URL}, else {DEFAULT_URL})",
    )
    parser.add_argument(
        "--timeout",
        type=_positive_float,
        default=None,
        metavar="SECONDS",
        help="connect timeout and longest silence while reading (default 5 and 120)",
    )
    parser.add_argument(
        "--attempts",
        type=_attempts,
        default=5,
        metavar="N",
        help="tries per request on connection errors, cut bodies, 5xx and 429 (default 5)",
    )


# --- fetch -----------------------------------------------------------------------------------


def _fetch(args: argparse.Namespace) -> int:
    if (args.request is None) == (args.recipe is None):
        raise UsageProblem("give a request file or --recipe NAME@VERSION (one of them)")
    request: Any = args.recipe if args.request is None else _read_request(args.request)
    out: TextIO = sys.stderr
    show_bar = args.progress == "always" or (args.progress == "auto" and out.isatty())
    bar = ProgressBar(out, always=args.progress == "always") if show_bar else None
    with _client(args, cache=not args.no_cache) as client:
        try:
            saved = client.save(
                request,
                args.output,
                args.format,
                tensor=args.tensor,
                rows=args.rows,
                progress=bar,
                origin=args.origin,
            )
        finally:
            if bar is not None:
                bar.done()
    count = len(saved.manifest.get("tensors", []))
    origin = {
        "local": "generated on this machine from the service's plan",
        "service": "downloaded",
        "revalidated": "cached, confirmed by the service",
        "cache": "cached; the service was not reachable",
    }[saved.source]
    if saved.note:
        print(f"seedbed: warning: {saved.note}", file=sys.stderr)
    recipe = f" of {saved.recipe}" if saved.recipe else ""
    print(
        f"{saved.path}{recipe}: {saved.format}, {saved.size} bytes, {count} tensor"
        f"{'s' if count != 1 else ''} verified ({origin}); algorithm "
        f"{saved.manifest.get('algorithm', '?')}"
    )
    return EXIT_OK


# --- verify ----------------------------------------------------------------------------------


def verify_file(path: Path, fmt: WeightFormat | None, stream: TextIO) -> int:
    """Recompute every tensor's sha256 of a saved download and report; returns the exit code."""
    try:
        with open(path, "rb") as fh:
            size = fh.seek(0, 2)
            buffer: Any = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) if size else b""
    except OSError as exc:
        raise UsageProblem(f"cannot read {str(path)!r}: {exc}") from None
    chosen = fmt or sniff_format(buffer)
    inspection = inspect_body(buffer, chosen, page_releaser(buffer))
    for t in inspection.tensors:
        mark = "ok " if t.ok else "BAD"
        detail = "" if t.ok else f"  ({t.problem})"
        stream.write(f"{mark} {t.name}  {t.dtype} {list(t.shape)}{detail}\n")
    bad = inspection.failed
    algorithm = inspection.manifest.get("algorithm", "?")
    if bad:
        stream.write(
            f"{path}: {len(bad)} of {len(inspection.tensors)} tensors do NOT match the "
            f"manifest ({chosen}, algorithm {algorithm})\n"
        )
        return EXIT_MISMATCH
    stream.write(
        f"{path}: all {len(inspection.tensors)} tensors match the manifest ({chosen}, "
        f"algorithm {algorithm})\n"
    )
    return EXIT_OK


def _verify(args: argparse.Namespace) -> int:
    code = verify_file(Path(args.file), args.format, sys.stdout)
    if args.against is None or code != EXIT_OK:
        return code
    source, what = checks.against_source(args.against, _read_request)
    with open(args.file, "rb") as fh:
        buffer = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
        chosen = args.format or sniff_format(buffer)
        inspection = inspect_body(buffer, chosen, page_releaser(buffer))
        with _client(args, cache=True) as client:
            expected = client.expected_digests(source, origin=args.origin)
        return checks.compare_with(inspection, expected, what, sys.stdout)


# --- recipes, audit, diagnose ------------------------------------------------------------------


def _recipes(args: argparse.Namespace) -> int:
    with _client(args, cache=True) as client:
        if args.action == "list":
            return checks.recipes_list(client, sys.stdout)
        if args.action == "show":
            return checks.recipe_show(
                client, args.ref, sys.stdout, plan_table, checks.terminal_width(None)
            )
        request = _read_request(args.request)
        return checks.recipe_publish(
            client, args.ref, request, args.description, args.key_file, sys.stdout
        )


def _audit(args: argparse.Namespace) -> int:
    request = None if args.request is None else _read_request(args.request)
    with _client(args, cache=False) as client:
        report = client.audit(args.file, request)
    if args.json:
        print(json.dumps(report.document, indent=2, sort_keys=True))
        return EXIT_OK if report.passed else checks.EXIT_FINDINGS
    return checks.print_audit(report, sys.stdout)


def _diagnose(args: argparse.Namespace) -> int:
    request = _read_request(args.request)
    try:
        alternatives = checks.read_alternatives(args.alternatives)
    except argparse.ArgumentTypeError as exc:
        raise UsageProblem(str(exc)) from None
    with _client(args, cache=False) as client:
        report = client.diagnose(request, alternatives, batch=args.batch)
        if args.chart:
            kind = "html" if args.chart.lower().endswith((".html", ".htm")) else "svg"
            chart = client.diagnosis_chart(request, alternatives, batch=args.batch, kind=kind)
            Path(args.chart).write_text(chart, encoding="utf-8")
            print(f"chart written to {args.chart}", file=sys.stderr)
    if args.json:
        print(json.dumps(report.document, indent=2, sort_keys=True))
        return EXIT_OK if report.passed else checks.EXIT_FINDINGS
    return checks.print_diagnosis(report, sys.stdout)


# --- show ------------------------------------------------------------------------------------


def first_sentence(text: str) -> str:
    """Up to the first full stop outside parentheses that ends a sentence ("eq. 10" does not:
    a sentence ends only where the next word starts with a capital letter, or the text ends)."""
    depth = 0
    for i, ch in enumerate(text):
        if ch in "([":
            depth += 1
        elif ch in ")]":
            depth = max(0, depth - 1)
        elif ch == "." and depth == 0:
            rest = text[i + 1 :]
            if not rest.strip():
                return text[: i + 1]
            if rest[:1].isspace() and rest.lstrip()[:1].isupper():
                return text[: i + 1]
    return text


def _number(x: Any) -> str:
    return f"{x:.4g}" if isinstance(x, int | float) else "-"


def _scale(entry: dict[str, Any]) -> str:
    if entry.get("method") == "constant":
        if entry.get("block_values"):
            return "= " + "/".join(_number(v) for v in entry["block_values"])
        return "= " + _number(entry.get("value"))
    if entry.get("bound") is not None and entry.get("distribution") == "uniform":
        return "bound " + _number(entry["bound"])
    return "std " + _number(entry.get("std"))


def _method(entry: dict[str, Any]) -> str:
    dist = entry.get("distribution")
    return f"{entry.get('method', '?')} {dist}" if dist else str(entry.get("method", "?"))


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[: max(0, width - 3)] + "..."


def plan_table(plan: dict[str, Any], width: int) -> list[str]:
    """The plan as aligned text lines: tensor, shape, method, std or bound, gain, why."""
    heads = ("tensor", "shape", "method", "std/bound", "gain", "why")
    rows = [
        (
            str(e.get("tensor", "?")),
            "x".join(str(n) for n in e.get("shape", [])) or "scalar",
            _method(e),
            _scale(e),
            _number(e.get("gain")),
            first_sentence(str(e.get("rationale", ""))),
        )
        for e in plan.get("tensors", [])
    ]
    widths = [max(len(r[i]) for r in [heads, *rows]) for i in range(5)]
    lead = sum(widths) + 2 * 5
    why_width = max(20, width - lead)

    def line(cells: Sequence[str]) -> str:
        left = "  ".join(c.ljust(w) for c, w in zip(cells[:5], widths, strict=True))
        return f"{left}  {_clip(cells[5], why_width)}".rstrip()

    out = [line(heads), line((*("-" * w for w in widths), "-" * min(3, why_width)))]
    out.extend(line(r) for r in rows)
    return out


def _show(args: argparse.Namespace) -> int:
    request = _read_request(args.request)
    with _client(args, cache=False) as client:
        plan = client.plan(request)
    width = args.width or shutil.get_terminal_size((100, 24)).columns
    print(
        f"plan of {len(plan.get('tensors', []))} tensors; algorithm {plan.get('algorithm')}; "
        f"seed {plan.get('seed')!r}, {plan.get('dtype')}, layout {plan.get('layout')}"
    )
    for text in plan_table(plan, width):
        print(text)
    warnings = list(plan.get("warnings", []))
    for e in plan.get("tensors", []):
        warnings.extend(f"{e.get('tensor')}: {w}" for w in e.get("warnings", []))
    for w in warnings:
        print(f"warning: {w}")
    return EXIT_OK


# --- wiring ----------------------------------------------------------------------------------


def register(subparsers: Any) -> None:
    """Add `fetch`, `verify` and `show` to an argparse subparsers object.

    Dispatch a parsed namespace with `run(args)`; it returns the exit code.
    """
    fetch = subparsers.add_parser(
        "fetch",
        help="download a request's weights to a file, verified",
        description="Send a request file to the service and write the verified response to "
        "OUTPUT (written beside it and renamed, so a partial file never appears). The format "
        "comes from --format or OUTPUT's suffix. Uses the local cache unless --no-cache.",
    )
    fetch.add_argument("request", nargs="?", help="request JSON file, or - for standard input")
    fetch.add_argument(
        "--recipe",
        metavar="NAME@VERSION",
        help="a published recipe instead of a request file (NAME@latest, or a "
        "bare NAME, is the newest version)",
    )
    fetch.add_argument("-o", "--output", required=True, help="file to write")
    fetch.add_argument("--format", choices=FORMATS, help="json, npz or safetensors")
    fetch.add_argument("--tensor", metavar="NAME", help="only this tensor")
    fetch.add_argument("--rows", metavar="START:STOP", help="only these rows of --tensor")
    fetch.add_argument("--no-cache", action="store_true", help="neither read nor fill the cache")
    fetch.add_argument(
        "--origin",
        choices=("service", "local"),
        default="service",
        help="service (default): download the weights; local: fetch only the plan and make "
        "every tensor here (npz or safetensors; the same tensors and digests)",
    )
    fetch.add_argument(
        "--cache-dir",
        metavar="DIR",
        help="cache directory (default SEEDBED_CACHE_DIR, else the user cache dir + seedbed)",
    )
    fetch.add_argument(
        "--progress",
        choices=("auto", "always", "never"),
        default="auto",
        help="progress bar on standard error: auto draws one for downloads over 4 MiB when "
        "standard error is a terminal (default auto)",
    )
    _add_service_options(fetch)
    fetch.set_defaults(**{_HANDLER: _fetch})

    verify = subparsers.add_parser(
        "verify",
        help="check a downloaded file against its own manifest",
        description="Recompute the sha256 of every tensor in a json, npz or safetensors "
        "download and compare it with the manifest inside the file. Works offline. Exit "
        "code 0 when all match, 1 when any does not, 2 when the file cannot be read.",
    )
    verify.add_argument("file", help="the downloaded file")
    verify.add_argument(
        "--format", choices=FORMATS, help="the file's format (default: recognised from its bytes)"
    )
    verify.add_argument(
        "--against",
        metavar="REQUEST.json|NAME@VERSION",
        help="also check every tensor against what it should be: a request (planned by the "
        "service, digests computed here) or a published recipe (its stored fingerprints)",
    )
    verify.add_argument(
        "--origin",
        choices=("local", "service"),
        default="local",
        help="with a request: compute the expected digests here (local, default) or download "
        "the service's weights (service)",
    )
    _add_service_options(verify)
    verify.set_defaults(**{_HANDLER: _verify})

    recipes = subparsers.add_parser(
        "recipes",
        help="list, show and publish team recipes",
        description="Team recipes: list the names, show one version (NAME@VERSION, "
        "NAME@latest, or NAME for the newest) with its plan, or publish a request file under a "
        "name. Publishing takes the key from SEEDBED_PUBLISH_KEY, --key-file or "
        "SEEDBED_PUBLISH_KEY_FILE; never from the command line.",
    )
    actions = recipes.add_subparsers(dest="action", metavar="ACTION", required=True)
    actions.add_parser("list", help="every recipe name with its newest version")
    show_recipe = actions.add_parser("show", help="one version and its plan")
    show_recipe.add_argument("ref", metavar="NAME[@VERSION]")
    publish = actions.add_parser("publish", help="publish a request file under a name")
    publish.add_argument("ref", metavar="NAME")
    publish.add_argument("request", help="request JSON file, or - for standard input")
    publish.add_argument("--description", default="", help="what this version is for")
    publish.add_argument(
        "--key-file",
        metavar="PATH",
        help="file holding the publishing key (default SEEDBED_PUBLISH_KEY, "
        "else the file SEEDBED_PUBLISH_KEY_FILE names)",
    )
    # On each action only: argparse lets a sub-parser's defaults overwrite its parent's values.
    for sub in actions.choices.values():
        _add_service_options(sub)
    recipes.set_defaults(**{_HANDLER: _recipes})

    audit = subparsers.add_parser(
        "audit",
        help="audit a weights file; exit 5 on an error-level finding",
        description="Send an NPZ or safetensors file to the service's audit and print its "
        "findings. Exit code 5 when any finding is an error (usable as a CI gate), 0 "
        "otherwise. The audit checks a starting point, not a trained model.",
    )
    audit.add_argument("file", help="the weights file")
    audit.add_argument(
        "--request",
        metavar="REQUEST.json",
        help="the request describing the network, to compare with its plan",
    )
    audit.add_argument("--json", action="store_true", help="print the whole report as JSON")
    _add_service_options(audit)
    audit.set_defaults(**{_HANDLER: _audit})

    diagnose = subparsers.add_parser(
        "diagnose",
        help="simulate signal propagation; exit 5 unless the request is stable",
        description="Run the service's diagnosis of a request (and alternatives) and print a "
        "verdict per run. Exit code 5 when the request as given is not stable. Estimates from "
        "one synthetic batch, not a promise that training succeeds.",
    )
    diagnose.add_argument("request", help="request JSON file, or - for standard input")
    diagnose.add_argument(
        "--alternatives",
        metavar="FILE",
        help='JSON: {"label": init override, ...} or [{"label", "init"}]',
    )
    diagnose.add_argument("--batch", type=_attempts, metavar="N", help="synthetic batch size")
    diagnose.add_argument(
        "--chart", metavar="FILE", help="also save the chart (SVG; HTML when FILE ends in .html)"
    )
    diagnose.add_argument("--json", action="store_true", help="print the whole diagnosis as JSON")
    _add_service_options(diagnose)
    diagnose.set_defaults(**{_HANDLER: _diagnose})

    show = subparsers.add_parser(
        "show",
        help="print a request's plan as a table",
        description="Send a request file to the service's /v1/plan and print, per tensor, the "
        "shape, method, std or bound, gain and the first sentence of the rationale.",
    )
    show.add_argument("request", help="request JSON file, or - for standard input")
    show.add_argument("--width", type=int, help="table width (default: the terminal's)")
    _add_service_options(show)
    show.set_defaults(**{_HANDLER: _show})

    from seedbed_client.torch_cli import register_torch_command

    register_torch_command(
        subparsers,
        add_service_options=_add_service_options,
        handler_key=_HANDLER,
        make_client=lambda args: _client(args, cache=True),
        usage_error=UsageProblem,
    )


def run(args: argparse.Namespace) -> int:
    """Run the subcommand `register` set up; prints errors to standard error."""
    handler: Handler | None = getattr(args, _HANDLER, None)
    if handler is None:
        print("seedbed: no client subcommand given", file=sys.stderr)
        return EXIT_USAGE
    try:
        return handler(args)
    except (SeedbedError, UsageProblem) as exc:
        print(f"seedbed: error: {exc}", file=sys.stderr)
        if isinstance(exc, ServiceError | SpecInvalid) and len(exc.problems) > 1:
            for p in exc.problems:
                print(f"  {p.field}: {p.message}", file=sys.stderr)
        return exit_code_for(exc)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="python -m seedbed_client",
        description="seedbed client: fetch, verify and inspect seeded initial weights.",
        epilog="Exit codes: 0 ok, 1 verification failed, 2 usage or bad input, 3 service "
        "error, 4 service unreachable, 5 audit/diagnose found an error.",
    )
    parser.add_argument("--version", action="version", version=f"seedbed-client {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    register(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on bad usage, 0 for --help
        return int(exc.code) if isinstance(exc.code, int) else EXIT_USAGE
    restore_default_sigpipe()
    return run(args)


def restore_default_sigpipe() -> None:
    """Let a closed pipe end the process quietly, as it does for other command-line tools.

    Python ignores SIGPIPE and raises BrokenPipeError instead, so `seedbed show ... | head`
    printed a traceback and exited 1. Not for a server: a client hanging up must not kill it.
    """
    if hasattr(signal, "SIGPIPE"):
        signal.signal(signal.SIGPIPE, signal.SIG_DFL)
