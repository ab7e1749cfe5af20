"""Settings from SEEDBED_* variables and the `seedbed` command line."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from seedbed import cli
from seedbed.core.request.limits import Limits
from seedbed.settings import Settings, SettingsError, settings_table


def test_defaults() -> None:
    s = Settings.from_env({})
    assert (s.host, s.port, s.workers, s.log_level) == ("127.0.0.1", 8600, 1, "info")
    assert s.limits == Limits()
    assert s.max_body_bytes > 0 and s.chunk_bytes > 0


def test_environment_overrides() -> None:
    s = Settings.from_env(
        {
            "SEEDBED_HOST": "0.0.0.0",
            "SEEDBED_PORT": "9001",
            "SEEDBED_WORKERS": "3",
            "SEEDBED_LOG_LEVEL": "WARNING",
            "SEEDBED_ACCESS_LOG": "off",
            "SEEDBED_MAX_BODY_BYTES": "2_000_000",
            "SEEDBED_CHUNK_BYTES": "65536",
            "SEEDBED_GENERATION_THREADS": "2",
            "SEEDBED_MAX_JSON_RESPONSE_BYTES": "1048576",
            "SEEDBED_MAX_LAYERS": "10",
            "SEEDBED_MAX_TENSOR_ELEMENTS": "1000",
            "UNRELATED": "ignored",
        }
    )
    assert (s.host, s.port, s.workers, s.log_level) == ("0.0.0.0", 9001, 3, "warning")
    assert s.access_log is False and s.max_body_bytes == 2_000_000
    assert s.chunk_bytes == 65536 and s.generation_threads == 2
    assert s.limits.max_layers == 10 and s.limits.max_tensor_elements == 1000
    assert s.limits.max_request_elements == Limits().max_request_elements


@pytest.mark.parametrize(
    ("var", "value", "says"),
    [
        ("SEEDBED_PORT", "eighty", "not an integer"),
        ("SEEDBED_PORT", "70000", "[1, 65535]"),
        ("SEEDBED_WORKERS", "0", "out of range"),
        ("SEEDBED_LOG_LEVEL", "loud", "not a log level"),
        ("SEEDBED_ACCESS_LOG", "maybe", "not a switch"),
        ("SEEDBED_MAX_BODY_BYTES", "-5", "out of range"),
        ("SEEDBED_CHUNK_BYTES", "12.5", "not an integer"),
        ("SEEDBED_HOST", "  ", "not a host"),
        ("SEEDBED_MAX_LAYERS", "0", "out of range"),
        ("SEEDBED_MAX_ORTHOGONAL_DIM", "lots", "not an integer"),
    ],
)
def test_bad_values_name_the_variable(var: str, value: str, says: str) -> None:
    with pytest.raises(SettingsError) as caught:
        Settings.from_env({var: value})
    assert var in str(caught.value) and says in str(caught.value)


def test_settings_table_covers_every_limit() -> None:
    names = {row[0] for row in settings_table()}
    assert {
        "SEEDBED_PORT",
        "SEEDBED_MAX_BODY_BYTES",
        "SEEDBED_MAX_LAYERS",
        "SEEDBED_MAX_REQUEST_ELEMENTS",
    } <= names


def test_docs_list_every_variable() -> None:
    docs = (Path(__file__).resolve().parents[3] / "docs" / "service.md").read_text("utf-8")
    for var, default, _ in settings_table():
        assert f"`{var}`" in docs, var
        assert default in docs or default.replace("_", "") in docs, (var, default)


def test_cli_help_and_parse() -> None:
    parser = cli.build_parser()
    args = parser.parse_args(
        ["serve", "--host", "0.0.0.0", "--port", "9100", "--workers", "2", "--log-level", "debug"]
    )
    assert (args.host, args.port, args.workers, args.log_level) == ("0.0.0.0", 9100, 2, "debug")
    for bad in (
        ["serve", "--port", "0"],
        ["serve", "--port", "x"],
        ["serve", "--workers", "0"],
        ["serve", "--log-level", "loud"],
        [],
    ):
        with pytest.raises(SystemExit) as caught:
            parser.parse_args(bad)
        assert caught.value.code == 2


def test_serve_refuses_bad_environment(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("SEEDBED_MAX_BODY_BYTES", "tiny")
    assert cli.main(["serve"]) == 2  # refused before any server starts
    assert "SEEDBED_MAX_BODY_BYTES" in capsys.readouterr().err


def test_offline_plan_command(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    request = {
        "seed": 12,
        "layers": [{"name": "kiln", "kind": "dense", "n_in": 6, "n_out": 4, "activation": "relu"}],
    }
    path = tmp_path / "kiln.json"
    path.write_text(json.dumps(request), encoding="utf-8")
    assert cli.main(["plan", str(path)]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert next(t["tensor"] for t in doc["tensors"]) == "kiln.weight"
    path.write_text(json.dumps({**request, "dtype": "int4"}), encoding="utf-8")
    assert cli.main(["plan", str(path)]) == 1
    assert "dtype" in capsys.readouterr().err
    path.write_text('{"seed": NaN}', encoding="utf-8")
    assert cli.main(["plan", str(path)]) == 2


def test_settings_command(
    monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.setenv("SEEDBED_PORT", "8700")
    assert cli.main(["settings"]) == 0
    out = capsys.readouterr().out
    assert "SEEDBED_PORT=8700  (environment; default 8600)" in out
    assert "SEEDBED_HOST=127.0.0.1  (default" in out
