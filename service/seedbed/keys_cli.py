"""`seedbed keys ...`: manage publishing keys in the registry database.

    seedbed keys create NAME    make a key; its token is the LAST line printed, shown this once
    seedbed keys list           names, creation and revocation times
    seedbed keys revoke NAME    refuse the key from now on, on every replica

The database is the one the service uses (SEEDBED_DATABASE_URL, SEEDBED_DATABASE_URL_FILE or
the SQLite file under SEEDBED_DATA_DIR); run the command with the same environment as the
service. `register` adds the subcommand to the main parser; `run` handles a parsed command.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from typing import Any, TextIO

from seedbed.registry.records import iso

COMMAND = "keys"


def register(subparsers: Any) -> argparse.ArgumentParser:
    """Add `keys create|list|revoke` to the `seedbed` command's subparsers."""
    keys: argparse.ArgumentParser = subparsers.add_parser(
        COMMAND,
        help="create, list and revoke publishing keys",
        description="Manage the keys that may publish team recipes. Uses the same database as "
        "the service (SEEDBED_DATABASE_URL, or the SQLite file under SEEDBED_DATA_DIR).",
    )
    actions = keys.add_subparsers(dest="keys_action", metavar="ACTION", required=True)
    create = actions.add_parser(
        "create",
        help="create a key and print its token (last line, shown once)",
        description="Create a publishing key. The token is printed once, as the last line; "
        "only its hash is stored, so it cannot be shown again.",
    )
    create.add_argument("name", help="who or what publishes with it, e.g. vision-team-ci")
    actions.add_parser("list", help="list the keys (never their tokens)")
    revoke = actions.add_parser(
        "revoke",
        help="revoke a key at once, on every replica",
        description="Revoke a key. Every replica checks the database on each request, so the "
        "key is refused from the next request on.",
    )
    revoke.add_argument("name", help="the key's name, as `keys list` shows it")
    return keys


def _out(stream: TextIO, line: str) -> None:
    stream.write(line + "\n")
    stream.flush()


def run(args: argparse.Namespace, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Carry out a parsed `keys` command; returns the exit status."""
    from sqlalchemy.exc import SQLAlchemyError

    from seedbed.registry import RegistryConfigError, open_registry
    from seedbed.registry.keys import KeyCommandError, create_key, list_keys, revoke_key
    from seedbed.registry.migrations import SchemaTooNewError

    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    try:
        registry = open_registry()
    except (RegistryConfigError, SchemaTooNewError) as exc:
        _out(err, f"seedbed: {exc}")
        return 2
    except SQLAlchemyError as exc:
        inner = getattr(exc, "orig", None) or exc
        _out(
            err,
            f"seedbed: cannot open the registry database: {type(inner).__name__}: "
            f"{str(inner).strip().splitlines()[0]}",
        )
        return 2
    try:
        action = args.keys_action
        if action == "create":
            made = create_key(registry.engine, args.name)
            _out(
                out,
                f"created key {made.info.name!r} at {iso(made.info.created_at)} "
                f"in {registry.config.describe()}",
            )
            _out(
                out,
                "Copy the token below now: it is shown only this once; only its hash is "
                "stored. Send it as 'Authorization: Bearer <token>'.",
            )
            _out(out, made.token)  # must stay the last line: scripts read it with tail -n 1
        elif action == "list":
            rows = list_keys(registry.engine)
            if not rows:
                _out(out, "no keys yet; create one with `seedbed keys create NAME`")
            width = max([len("NAME"), *(len(k.name) for k in rows)])
            if rows:
                _out(out, f"{'NAME':<{width}}  {'CREATED':<27}  REVOKED")
            for k in rows:
                revoked = "-" if k.revoked_at is None else iso(k.revoked_at)
                _out(out, f"{k.name:<{width}}  {iso(k.created_at):<27}  {revoked}")
        elif action == "revoke":
            info = revoke_key(registry.engine, args.name)
            assert info.revoked_at is not None
            _out(
                out,
                f"revoked key {info.name!r} at {iso(info.revoked_at)}; every replica "
                "refuses it from the next request on",
            )
        else:  # argparse only lets the three through
            _out(err, f"seedbed: unknown keys action {action!r}")
            return 2
    except KeyCommandError as exc:
        _out(err, f"seedbed: {exc}")
        return 1
    except SQLAlchemyError as exc:
        inner = getattr(exc, "orig", None) or exc
        _out(
            err,
            f"seedbed: the registry database failed: {type(inner).__name__}: "
            f"{str(inner).strip().splitlines()[0]}",
        )
        return 2
    finally:
        registry.close()
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """`python -m seedbed.keys_cli keys create NAME`: the same command without the main CLI."""
    parser = argparse.ArgumentParser(prog="seedbed")
    register(parser.add_subparsers(dest="command", metavar="COMMAND", required=True))
    return run(parser.parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
