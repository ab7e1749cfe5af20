"""The `seedbed` console command.

seedbed serve [--host H] [--port P] [--workers N] [--log-level L]
seedbed plan FILE            print the plan for a request file (offline, no server)
seedbed settings             print the effective settings and where each comes from
seedbed keys create NAME | list | revoke NAME   publishing keys for team recipes
seedbed fetch | verify | show  client commands (see docs/client.md)
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import sys
from collections.abc import Sequence

from seedbed import __version__, keys_cli
from seedbed_client import cli as client_cli


def _positive(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"{value} must be at least 1")
    return value


def _port(text: str) -> int:
    value = _positive(text)
    if value > 65535:
        raise argparse.ArgumentTypeError(f"{value} is not a TCP port (1-65535)")
    return value


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="seedbed",
        description="Seeded, reproducible, explained initial weights for neural networks.",
    )
    parser.add_argument("--version", action="version", version=f"seedbed {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    serve = commands.add_parser(
        "serve",
        help="run the HTTP service",
        description="Run the HTTP service. Options override the matching SEEDBED_* variables; "
        "everything else comes from the environment (see docs/service.md).",
    )
    serve.add_argument("--host", help="address to listen on (SEEDBED_HOST, default 127.0.0.1)")
    serve.add_argument("--port", type=_port, help="TCP port (SEEDBED_PORT, default 8600)")
    serve.add_argument(
        "--workers", type=_positive, help="worker processes (SEEDBED_WORKERS, default 1)"
    )
    serve.add_argument(
        "--log-level",
        choices=("critical", "error", "warning", "info", "debug"),
        help="least severe messages logged (SEEDBED_LOG_LEVEL, default info)",
    )

    plan = commands.add_parser(
        "plan",
        help="print the plan for a request file without starting a server",
        description="Read a request (JSON; '-' for standard input) and print its plan as JSON.",
    )
    plan.add_argument("file", help="path of the request JSON, or - for standard input")

    commands.add_parser("settings", help="print the effective settings")
    # Client subcommands (fetch, verify, show) live with the client so that a client-only
    # install (`python -m seedbed_client`) offers exactly the same commands.
    client_cli.register(commands)
    keys_cli.register(commands)
    return parser


def _serve(args: argparse.Namespace) -> int:
    from seedbed.settings import Settings, SettingsError, pass_to_workers
    from seedbed.web.logs import logging_config

    overrides = {name: getattr(args, name) for name in ("host", "port", "workers", "log_level")}
    pass_to_workers({name: value for name, value in overrides.items() if value is not None})
    try:
        settings = Settings.from_env()
    except SettingsError as exc:
        print(f"seedbed: cannot start: {exc}", file=sys.stderr)
        return 2

    import uvicorn

    fast_loop = importlib.util.find_spec("uvloop") is not None
    fast_http = importlib.util.find_spec("httptools") is not None
    uvicorn.run(
        "seedbed.web.app:create_app",
        factory=True,
        host=settings.host,
        port=settings.port,
        workers=settings.workers,
        log_config=logging_config(settings.log_level),
        log_level=settings.log_level,
        access_log=False,  # we write our own access lines, with the request id
        loop="uvloop" if fast_loop else "asyncio",
        http="httptools" if fast_http else "h11",
        server_header=False,
        timeout_graceful_shutdown=30,
    )
    return 0


def _plan(args: argparse.Namespace) -> int:
    from seedbed.core.plan import build_plan, plan_document
    from seedbed.core.request.problems import RequestRejected

    try:
        if args.file == "-":
            text = sys.stdin.read()
        else:
            with open(args.file, encoding="utf-8") as fh:
                text = fh.read()
    except OSError as exc:
        print(f"seedbed: cannot read {args.file}: {exc.strerror}", file=sys.stderr)
        return 2

    def refuse(token: str) -> float:
        raise ValueError(f"{token} is not JSON; numbers must be finite")

    try:
        data = json.loads(text, parse_constant=refuse)
    except ValueError as exc:
        print(f"seedbed: {args.file} is not valid JSON: {exc}", file=sys.stderr)
        return 2
    try:
        plan = build_plan(data)
    except RequestRejected as exc:
        for p in exc.problems:
            print(f"seedbed: {p.field}: {p.message} [{p.code}]", file=sys.stderr)
        return 1
    print(json.dumps(plan_document(plan), indent=2, allow_nan=False))
    return 0


def _settings(args: argparse.Namespace) -> int:
    from seedbed.settings import Settings, SettingsError, settings_table, shown

    try:
        current = Settings.from_env()
    except SettingsError as exc:
        print(f"seedbed: {exc}", file=sys.stderr)
        return 2
    for var, default, name in settings_table():
        obj: object = current
        for part in name.split("."):
            obj = getattr(obj, part)
        print(f"{var}={shown(obj)}  ({_origin(var, default)})")
    # The registry interprets its own variables (seedbed.registry.config).
    from seedbed.registry.config import RegistryConfigError, config_from_env

    try:
        registry = config_from_env()
    except RegistryConfigError as exc:
        print(f"seedbed: {exc}", file=sys.stderr)
        return 2
    print(
        f"registry database: {registry.describe()} ({registry.backend}; "
        "SEEDBED_DATABASE_URL, default an SQLite file under SEEDBED_DATA_DIR)"
    )
    print(
        f"registry reads need a key: {'on' if registry.read_requires_key else 'off'} "
        "(SEEDBED_READ_REQUIRES_KEY)"
    )
    from seedbed_client.generator import kernel

    state = kernel.status() if current.generator_kernel else kernel.set_enabled(False)
    print(
        f"generator: {state.describe()}; {current.threads_per_request()} thread(s) per "
        "request (SEEDBED_GENERATOR_KERNEL, SEEDBED_GENERATION_THREADS)"
    )
    _client_settings()
    return 0


def _origin(var: str, default: str) -> str:
    """Where a value comes from: the default, or the environment (and what the default is)."""
    from seedbed.settings import is_set

    return f"environment; default {default}" if is_set(var) else "default"


def _client_settings() -> None:
    """The variables the client commands (fetch, verify, show ...) read, with their sources."""
    from seedbed.settings import client_environment
    from seedbed_client.cache import DEFAULT_MAX_BYTES, default_cache_dir, default_max_bytes
    from seedbed_client.client import DEFAULT_URL
    from seedbed_client.environment import ENV_CACHE_DIR, ENV_CACHE_MAX_BYTES, ENV_URL

    print("client commands:")
    url = client_environment(ENV_URL) or DEFAULT_URL
    print(f"  {ENV_URL}={url}  ({_origin(ENV_URL, DEFAULT_URL)})")
    print(
        f"  {ENV_CACHE_DIR}={default_cache_dir()}  "
        f"({_origin(ENV_CACHE_DIR, 'the per-user cache directory + seedbed')})"
    )
    try:
        limit: object = default_max_bytes()
    except ValueError as exc:
        limit = f"(invalid: {exc})"
    print(
        f"  {ENV_CACHE_MAX_BYTES}={limit}  ({_origin(ENV_CACHE_MAX_BYTES, str(DEFAULT_MAX_BYTES))})"
    )


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    handlers = {"serve": _serve, "plan": _plan, "settings": _settings, "keys": keys_cli.run}
    handler = handlers.get(args.command)
    if args.command != "serve":
        client_cli.restore_default_sigpipe()
    if handler is None:
        return client_cli.run(args)
    return handler(args)


if __name__ == "__main__":
    sys.exit(main())
