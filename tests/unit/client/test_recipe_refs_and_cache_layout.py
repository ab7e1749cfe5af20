"""Recipe references, where a publishing key comes from, and the cache's folder layout (a cache
left by an earlier client is adopted in place).

Outside references: hashlib's SHA-256 is what names a cached body (content addressing); the key
must never come from a command-line argument (common practice: argv is visible to other users
in process listings and is kept in shell history).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from seedbed_client.cache import WeightCache
from seedbed_client.endpoint_flows import publishing_key
from seedbed_client.environment import ENV_KEY, ENV_KEY_FILE
from seedbed_client.errors import SpecInvalid
from seedbed_client.wire import RecipeRef, RecipeWeightsCall, parse_ref


@pytest.mark.parametrize(
    ("text", "name", "version"),
    [
        ("hive@3", "hive", 3),
        ("hive@latest", "hive", None),
        ("hive", "hive", None),
        ("a.b_c-9@12", "a.b_c-9", 12),
    ],
)
def test_references_parse(text: str, name: str, version: int | None) -> None:
    ref = parse_ref(text)
    assert ref == RecipeRef(name, version)
    assert str(ref) == f"{name}@{'latest' if version is None else version}"


@pytest.mark.parametrize(
    "text", ["Hive@1", "hive@0", "hive@01", "hive@-1", "hive@new", "@3", "hive@3@4", "", "x" * 101]
)
def test_bad_references_name_the_rule(text: str) -> None:
    with pytest.raises(SpecInvalid) as caught:
        parse_ref(text)
    problem = caught.value.problems[0]
    assert problem.field == "recipe" and "NAME@VERSION" in problem.message


def test_a_version_is_keyed_by_its_service_and_never_by_a_request() -> None:
    one = RecipeWeightsCall("http://a:8600", "hive", 3, "npz")
    assert one.cache_key == RecipeWeightsCall("http://a:8600", "hive", 3, "npz").cache_key
    others = [
        RecipeWeightsCall("http://b:8600", "hive", 3, "npz"),
        RecipeWeightsCall("http://a:8600", "hive", 4, "npz"),
        RecipeWeightsCall("http://a:8600", "hive", 3, "safetensors"),
    ]
    assert len({one.cache_key, *(o.cache_key for o in others)}) == 4
    assert one.immutable and one.method == "GET" and one.body is None
    assert one.path == "/v1/recipes/hive/3/weights" and one.params == {"format": "npz"}


def test_the_publishing_key_comes_from_the_environment_or_a_file(tmp_path: Path) -> None:
    key_file = tmp_path / "key"
    key_file.write_text("\n  sbk1_from_file  \n", encoding="utf-8")
    assert publishing_key("sbk1_given", None, {}) == "sbk1_given"
    assert publishing_key(None, key_file, {ENV_KEY: "sbk1_env"}) == "sbk1_from_file"
    assert publishing_key(None, None, {ENV_KEY: " sbk1_env\n"}) == "sbk1_env"
    assert publishing_key(None, None, {ENV_KEY_FILE: str(key_file)}) == "sbk1_from_file"
    with pytest.raises(SpecInvalid) as missing:
        publishing_key(None, None, {})
    assert missing.value.problems[0].field == "key"
    assert ENV_KEY in missing.value.problems[0].message
    with pytest.raises(SpecInvalid) as unreadable:
        publishing_key(None, tmp_path / "absent", {})
    assert unreadable.value.problems[0].field == "key_file"
    (tmp_path / "empty").write_text("\n", encoding="utf-8")
    with pytest.raises(SpecInvalid):
        publishing_key(None, tmp_path / "empty", {})


def _old_cache(root: Path, body: bytes) -> str:
    """A cache as the earlier client wrote it: v1/blobs, v1/entries with a "blob" field."""
    digest = hashlib.sha256(body).hexdigest()
    (root / "v1" / "blobs").mkdir(parents=True)
    (root / "v1" / "entries").mkdir(parents=True)
    (root / "v1" / "tmp").mkdir(parents=True)
    (root / "v1" / "blobs" / digest).write_bytes(body)
    entry = {"blob": digest, "etag": '"e1"', "format": "npz", "size": len(body)}
    (root / "v1" / "entries" / "k1.json").write_text(json.dumps(entry), encoding="utf-8")
    return digest


def test_an_old_cache_is_adopted_in_place(tmp_path: Path) -> None:
    body = b"PK\x03\x04 an invented body, only its digest matters here"
    digest = _old_cache(tmp_path, body)
    cache = WeightCache(tmp_path)
    assert not (tmp_path / "v1").exists()
    assert (tmp_path / "v2" / "by-content" / digest).read_bytes() == body
    entry = cache.lookup("k1")
    assert entry is not None and entry.blob == digest and entry.etag == '"e1"'
    assert hashlib.sha256(entry.blob_path.read_bytes()).hexdigest() == digest
    assert cache.size_bytes() == len(body)
    # Opening again (another process, later) changes nothing.
    WeightCache(tmp_path)
    assert sorted(p.name for p in (tmp_path / "v2").iterdir()) == ["by-content", "by-request"]


def test_new_entries_use_our_names_and_labels(tmp_path: Path) -> None:
    cache = WeightCache(tmp_path)
    body = b"an invented body"
    digest = hashlib.sha256(body).hexdigest()
    labels = {"service": "http://a:8600", "recipe": "hive", "version": 2}
    cache.store("k2", body, digest, "npz", None, labels=labels)
    doc = json.loads((tmp_path / "v2" / "by-request" / "k2.json").read_text(encoding="utf-8"))
    assert doc["content"] == digest and doc["labels"] == labels and "blob" not in doc
    older = b"an older invented body"
    cache.store(
        "k1", older, hashlib.sha256(older).hexdigest(), "npz", None, labels={**labels, "version": 1}
    )
    newest = cache.newest_labelled(service="http://a:8600", recipe="hive")
    assert newest is not None and newest.key == "k2"
    assert cache.newest_labelled(service="http://b:8600", recipe="hive") is None
