"""Publishing and reading recipe versions through the store, on both backends, under real
concurrency (threads in one process, and several processes)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from seedbed.core.plan import build_plan, plan_document
from seedbed.registry import Registry
from seedbed.registry.keys import AuthenticationError, revoke_key
from seedbed.registry.prepare import prepare_recipe
from seedbed.registry.store import (
    RecipeNotFoundError,
    every_version,
    get_version,
    integrity_problems,
    list_recipes,
    list_versions,
    publish,
)

ROOT = Path(__file__).resolve().parents[2]

# Invented scenario: a kiln-temperature regressor a ceramics studio keeps versions of.
KILN: dict[str, Any] = {
    "seed": "kiln-7",
    "dtype": "float32",
    "layers": [
        {"name": "probe", "kind": "dense", "n_in": 12, "n_out": 24, "activation": "relu"},
        {"name": "glaze", "kind": "dense", "n_in": 24, "n_out": 1, "role": "output"},
    ],
}


def _prepared(name: str, seed: int | str = "kiln-7", description: str = "") -> Any:
    return prepare_recipe(
        {"name": name, "request": {**KILN, "seed": seed}, "description": description}
    )


def test_versions_count_up_per_name(registry: Registry, make_token: Callable[[str], str]) -> None:
    token = make_token("studio")
    got = [
        publish(registry.engine, _prepared(n, i), token).version
        for i, n in enumerate(["kiln", "kiln", "glaze", "kiln"])
    ]
    assert got == [1, 2, 1, 3]
    names = [(r.name, r.latest_version) for r in list_recipes(registry.engine)]
    assert names == [("glaze", 1), ("kiln", 3)]
    versions = list_versions(registry.engine, "kiln")
    assert [v.version for v in versions] == [1, 2, 3]
    assert {v.publisher for v in versions} == {"studio"}
    assert versions[0].published_at <= versions[1].published_at <= versions[2].published_at


def test_a_stored_version_is_complete_and_canonical(
    registry: Registry, make_token: Callable[[str], str]
) -> None:
    token = make_token("studio")
    # The same network spelled differently: keys reordered, defaults left out.
    spelled = {
        "layers": [dict(reversed(list(layer.items()))) for layer in KILN["layers"]],
        "seed": "kiln-7",
    }
    publish(
        registry.engine,
        prepare_recipe({"name": "kiln", "request": spelled, "description": "first firing"}),
        token,
    )
    record = get_version(registry.engine, "kiln", 1)
    plan = build_plan(KILN)
    assert record.request == plan.canonical_request
    assert record.plan == json.loads(json.dumps(plan_document(plan)))
    assert sorted(record.fingerprints) == sorted(t.tensor for t in plan.tensors)
    assert record.summary.description == "first firing"
    assert integrity_problems(record) == []


def test_missing_names_and_versions(registry: Registry, make_token: Callable[[str], str]) -> None:
    publish(registry.engine, _prepared("kiln"), make_token("studio"))
    with pytest.raises(RecipeNotFoundError, match="no recipe named 'ash'"):
        get_version(registry.engine, "ash", 1)
    with pytest.raises(RecipeNotFoundError, match="has no version 2; its versions are 1 to 1"):
        get_version(registry.engine, "kiln", 2)
    with pytest.raises(RecipeNotFoundError):
        list_versions(registry.engine, "ash")


def test_paging_through_names(registry: Registry, make_token: Callable[[str], str]) -> None:
    token = make_token("studio")
    for name in ["e", "a", "d", "c", "b"]:
        publish(registry.engine, _prepared(name), token)
    first = list_recipes(registry.engine, limit=2)
    rest = list_recipes(registry.engine, after=first[-1].name, limit=10)
    assert [r.name for r in first + rest] == ["a", "b", "c", "d", "e"]


def test_a_revoked_key_cannot_publish(registry: Registry, make_token: Callable[[str], str]) -> None:
    token = make_token("studio")
    prepared = _prepared("kiln")
    revoke_key(registry.engine, "studio")
    with pytest.raises(AuthenticationError, match="revoked"):
        publish(registry.engine, prepared, token)
    assert list_recipes(registry.engine) == []


def test_tampering_is_detected(registry: Registry, make_token: Callable[[str], str]) -> None:
    from seedbed.registry.tables import recipe_versions

    publish(registry.engine, _prepared("kiln"), make_token("studio"))
    with registry.engine.begin() as conn:
        conn.execute(recipe_versions.update().values(description="rewritten history"))
    (record,) = every_version(registry.engine)
    assert any("content digest" in p for p in integrity_problems(record))


def test_concurrent_threads_get_distinct_versions(
    registry: Registry, make_token: Callable[[str], str]
) -> None:
    token = make_token("studio")
    prepared = _prepared("kiln")
    got: list[int] = []
    errors: list[BaseException] = []
    lock = threading.Lock()
    start = threading.Barrier(8)

    def worker() -> None:
        try:
            start.wait()
            for _ in range(6):
                v = publish(registry.engine, prepared, token).version
                with lock:
                    got.append(v)
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=worker) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert sorted(got) == list(range(1, 49))


def test_concurrent_processes_get_distinct_versions(
    registry: Registry,
    registry_env: dict[str, str],
    make_token: Callable[[str], str],
    tmp_path: Path,
) -> None:
    token = make_token("studio")
    go = tmp_path / "go"
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    env.update(registry_env)
    env["PYTHONPATH"] = str(ROOT / "service")
    workers = [
        subprocess.Popen(
            [
                sys.executable,
                str(Path(__file__).with_name("publish_worker.py")),
                "kiln",
                "8",
                token,
                str(go),
            ],
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for _ in range(3)
    ]
    go.touch()
    got: list[int] = []
    for w in workers:
        out, err = w.communicate(timeout=120)
        assert w.returncode == 0, err
        got.extend(json.loads(out))
    assert sorted(got) == list(range(1, 25))
    assert [v.version for v in list_versions(registry.engine, "kiln")] == list(range(1, 25))
