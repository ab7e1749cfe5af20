"""Publishing keys: shown once, stored as a hash, compared in constant time, revocable."""

from __future__ import annotations

import argparse
import hashlib
import io
import os
import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import select

from seedbed import keys_cli
from seedbed.registry import Registry, config_from_env, open_registry
from seedbed.registry import keys as keys_mod
from seedbed.registry.keys import (
    AuthenticationError,
    KeyExistsError,
    KeyNameError,
    KeyRevokedError,
    UnknownKeyError,
    authenticate,
    bearer_token,
    create_key,
    list_keys,
    revoke_key,
)
from seedbed.registry.tables import publish_keys

ROOT = Path(__file__).resolve().parents[2]


def test_only_a_hash_of_the_token_is_stored(registry: Registry) -> None:
    made = create_key(registry.engine, "greenhouse-ci")
    prefix, lookup, secret = made.token.split("_", 2)
    assert prefix == "sbk1" and len(lookup) == 16 and len(secret) == 43
    with registry.engine.connect() as conn:
        row = conn.execute(select(publish_keys)).mappings().one()
    stored_text = " ".join(str(v) for v in row.values())
    assert secret not in stored_text and made.token not in stored_text
    # SHA-256 from hashlib as the reference definition of the stored hash.
    assert row["token_sha256"] == hashlib.sha256(made.token.encode()).hexdigest()


def test_tokens_are_random(registry: Registry) -> None:
    tokens = {create_key(registry.engine, f"k{i}").token for i in range(20)}
    assert len(tokens) == 20
    assert len({t.split("_")[1] for t in tokens}) == 20


def test_authentication(registry: Registry) -> None:
    made = create_key(registry.engine, "orchard.bot")
    assert authenticate(registry.engine, made.token) == "orchard.bot"
    prefix, lookup, secret = made.token.split("_", 2)
    flipped = secret[:-1] + ("A" if secret[-1] != "A" else "B")
    with pytest.raises(AuthenticationError, match="not valid"):
        authenticate(registry.engine, f"{prefix}_{lookup}_{flipped}")
    with pytest.raises(AuthenticationError, match="not valid"):
        authenticate(registry.engine, f"{prefix}_{'0' * 16}_{secret}")
    with pytest.raises(AuthenticationError, match="not a seedbed publishing key"):
        authenticate(registry.engine, "hunter2")


def test_comparison_is_constant_time(registry: Registry, monkeypatch: pytest.MonkeyPatch) -> None:
    made = create_key(registry.engine, "timing")
    seen: list[tuple[str, str]] = []
    real = keys_mod.hmac.compare_digest

    def spy(a: str, b: str) -> bool:
        seen.append((a, b))
        return real(a, b)

    monkeypatch.setattr(keys_mod.hmac, "compare_digest", spy)
    authenticate(registry.engine, made.token)
    with pytest.raises(AuthenticationError):
        authenticate(registry.engine, "sbk1_" + "f" * 16 + "_" + "x" * 43)  # unknown lookup id
    # Both the match and the unknown key went through the constant-time comparison.
    assert len(seen) == 2


def test_revocation_is_immediate_and_final(registry: Registry) -> None:
    made = create_key(registry.engine, "night-shift")
    revoked = revoke_key(registry.engine, "night-shift")
    assert revoked.revoked_at is not None
    with pytest.raises(AuthenticationError, match="'night-shift' was revoked at"):
        authenticate(registry.engine, made.token)
    with pytest.raises(KeyRevokedError):
        revoke_key(registry.engine, "night-shift")
    with pytest.raises(KeyExistsError):  # a revoked name is not handed out again
        create_key(registry.engine, "night-shift")
    with pytest.raises(UnknownKeyError, match="keys list"):
        revoke_key(registry.engine, "day-shift")


@pytest.mark.parametrize("name", ["", "Upper", "-lead", "sp ace", "x" * 65, "semi;colon"])
def test_key_names_are_checked(registry: Registry, name: str) -> None:
    with pytest.raises(KeyNameError, match="lower-case letters"):
        create_key(registry.engine, name)


def test_list_shows_names_and_times(registry: Registry) -> None:
    create_key(registry.engine, "b-team")
    create_key(registry.engine, "a-team")
    revoke_key(registry.engine, "b-team")
    rows = list_keys(registry.engine)
    assert [(k.name, k.active) for k in rows] == [("a-team", True), ("b-team", False)]
    assert all(k.created_at.tzinfo is not None for k in rows)


@pytest.mark.parametrize(
    ("header", "words"),
    [
        (None, "needs a publishing key"),
        ("", "needs a publishing key"),
        ("Basic dXNlcjpwdw==", "must be 'Bearer <key>'"),
        ("Bearer   ", "must be 'Bearer <key>'"),
    ],
)
def test_authorization_header_parsing(header: str | None, words: str) -> None:
    with pytest.raises(AuthenticationError, match=words):
        bearer_token(header)
    assert bearer_token("bearer  sbk1_x ") == "sbk1_x"


def _run_cli(
    argv: list[str], env: dict[str, str], monkeypatch: pytest.MonkeyPatch
) -> tuple[int, str, str]:
    for k, v in env.items():
        monkeypatch.setenv(k, v)
    parser = argparse.ArgumentParser(prog="seedbed")
    keys_cli.register(parser.add_subparsers(dest="command", required=True))
    out, err = io.StringIO(), io.StringIO()
    code = keys_cli.run(parser.parse_args(argv), out, err)
    return code, out.getvalue(), err.getvalue()


def test_cli_create_list_revoke(
    registry_env: dict[str, str], monkeypatch: pytest.MonkeyPatch
) -> None:
    code, out, _ = _run_cli(["keys", "create", "soil-lab"], registry_env, monkeypatch)
    assert code == 0
    token = out.splitlines()[-1]
    registry = open_registry()
    try:
        assert authenticate(registry.engine, token) == "soil-lab"
        code, out, _ = _run_cli(["keys", "list"], registry_env, monkeypatch)
        assert code == 0 and "soil-lab" in out and token not in out
        code, out, _ = _run_cli(["keys", "revoke", "soil-lab"], registry_env, monkeypatch)
        assert code == 0 and "revoked key 'soil-lab'" in out
        with pytest.raises(AuthenticationError, match="revoked"):
            authenticate(registry.engine, token)
        code, _, err = _run_cli(["keys", "revoke", "soil-lab"], registry_env, monkeypatch)
        assert code == 1 and "already revoked" in err
        code, _, err = _run_cli(["keys", "create", "Soil"], registry_env, monkeypatch)
        assert code == 1 and "not allowed" in err
    finally:
        registry.close()


def test_cli_reports_an_unreachable_database(monkeypatch: pytest.MonkeyPatch) -> None:
    code, _, err = _run_cli(
        ["keys", "list"], {"SEEDBED_DATABASE_URL": "postgresql://u@127.0.0.1:1/none"}, monkeypatch
    )
    assert code == 2 and "cannot open the registry database" in err


def _cli_command() -> list[str]:
    """`seedbed keys` through the main command once it knows it, else the module's own."""
    from seedbed.cli import build_parser

    sub = next(a for a in build_parser()._actions if isinstance(a, argparse._SubParsersAction))
    module = "seedbed.cli" if "keys" in sub.choices else "seedbed.keys_cli"
    return [sys.executable, "-m", module]


def test_token_is_the_last_line_of_a_real_process(tmp_path: Path) -> None:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    env["SEEDBED_DATA_DIR"] = str(tmp_path)
    env["PYTHONPATH"] = str(ROOT / "service")
    done = subprocess.run(
        [*_cli_command(), "keys", "create", "river-gauges"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    token = done.stdout.rstrip("\n").splitlines()[-1]
    registry = open_registry(config_from_env(env))
    try:
        assert authenticate(registry.engine, token) == "river-gauges"
    finally:
        registry.close()
