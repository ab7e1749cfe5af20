"""The input contract shared by every format: validation, producer checks, hashing pass."""

from __future__ import annotations

import ast
import hashlib
import json
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pytest

from seedbed.formats import (
    FORMAT_NAMES,
    FormatInputError,
    OutgoingTensor,
    ProducerContractError,
    canonical_json,
    encode_body,
    tensor_digests,
    tensor_from_array,
)
from support.format_helpers import DEMO_DOCUMENT, array_tensor, collect, raw_tensor

FORMATS_DIR = Path(__file__).resolve().parents[3] / "service" / "seedbed" / "formats"
WEB_ROOTS = {"fastapi", "starlette", "uvicorn", "httpx", "prometheus_client"}


def test_formats_package_has_no_web_imports() -> None:
    files = sorted(FORMATS_DIR.glob("*.py"))
    assert len(files) >= 4
    for f in files:
        for node in ast.walk(ast.parse(f.read_text(encoding="utf-8"))):
            names: list[str] = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                names = [node.module]
            for name in names:
                assert name.split(".")[0] not in WEB_ROOTS, f"{f.name} imports {name}"
                assert not name.startswith("seedbed.web"), f"{f.name} imports {name}"


def _ok_kwargs() -> dict[str, object]:
    return {
        "name": "enc.0.weight",
        "dtype": "float32",
        "shape": (2, 3),
        "nbytes": 24,
        "entry": {"tensor": "enc.0.weight"},
        "chunks": lambda: iter([bytes(24)]),
    }


@pytest.mark.parametrize(
    ("change", "fragment"),
    [
        ({"dtype": "int8"}, "dtype 'int8' is not supported; allowed: float64, float32"),
        ({"shape": [2, 3]}, "shape must be a tuple"),
        ({"shape": (2, -3)}, "shape must be a tuple of non-negative integers"),
        ({"nbytes": 20}, "nbytes is 20 but shape [2, 3] of float32 needs 24"),
        ({"entry": {"sha256": "x"}}, "entry must not contain ['sha256']"),
        ({"entry": {"data": "x"}}, "entry must not contain ['data']"),
        ({"entry": {"shape": [3, 2]}}, "entry['shape'] is [3, 2] but the tensor's shape"),
        ({"entry": {"tensor": "other"}}, "entry['tensor'] is 'other'"),
        ({"entry": {"dtype": "float16"}}, "entry['dtype'] is 'float16'"),
        ({"entry": "nope"}, "entry must be a dict"),
        ({"name": ""}, "tensor name must be a non-empty string"),
        ({"name": "../evil"}, "'..' path segment"),
        ({"name": "/abs"}, "must not start with '/'"),
        ({"name": "a\\b"}, "control characters and backslashes"),
        ({"name": "a\nb"}, "control characters and backslashes"),
        ({"name": "__metadata__"}, "reserved by the safetensors header"),
        ({"chunks": None}, "chunks must be a callable"),
    ],
)
def test_outgoing_tensor_rejects_bad_fields(change: dict[str, object], fragment: str) -> None:
    kwargs = _ok_kwargs() | change
    with pytest.raises(FormatInputError) as err:
        OutgoingTensor(**kwargs)  # type: ignore[arg-type]
    assert fragment in str(err.value)


@pytest.mark.parametrize("fmt", FORMAT_NAMES)
def test_document_and_tensor_list_errors_name_the_field(fmt: str) -> None:
    t = array_tensor("a.weight", np.zeros(3, np.float32))
    with pytest.raises(FormatInputError, match="document must not contain 'tensors'"):
        encode_body(fmt, {"tensors": []}, [t])
    with pytest.raises(FormatInputError, match=r"duplicate tensor name 'a\.weight'"):
        encode_body(fmt, DEMO_DOCUMENT, [t, t])
    with pytest.raises(FormatInputError, match=r"tensors\[0\] must be an OutgoingTensor"):
        encode_body(fmt, DEMO_DOCUMENT, [np.zeros(3)])  # type: ignore[list-item]
    with pytest.raises(FormatInputError, match="not JSON-ready"):
        encode_body(fmt, {"std": float("nan")}, [t])
    with pytest.raises(FormatInputError, match="not JSON-ready"):
        encode_body(fmt, {"when": object()}, [t])
    with pytest.raises(FormatInputError, match=r"digests\['a.weight'\] must be a 64-character"):
        encode_body(fmt, DEMO_DOCUMENT, [t], digests={"a.weight": "abc"})


def test_unknown_format_names_allowed_values() -> None:
    with pytest.raises(FormatInputError, match="format 'hdf5' is not supported; allowed: json"):
        encode_body("hdf5", DEMO_DOCUMENT, [])


def test_hashing_pass_matches_hashlib() -> None:
    rng = np.random.default_rng(7)
    arrays: dict[str, np.ndarray] = {
        "x.weight": rng.standard_normal((5, 7)).astype(np.float32),
        "x.bias": rng.standard_normal(7).astype(np.float64),
    }
    tensors = [array_tensor(k, v, pieces=(5, 3)) for k, v in arrays.items()]
    assert tensor_digests(tensors) == {
        k: hashlib.sha256(v.tobytes()).hexdigest() for k, v in arrays.items()
    }


def test_canonical_json_is_sorted_compact_ascii() -> None:
    # Same bytes as the standard library's json with these options (the library is the oracle).
    value = {"b": [1, 2.5, None], "a": {"z": "é", "y": True}}
    expected = json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    assert canonical_json(value) == expected.encode("ascii")
    assert canonical_json(value) == b'{"a":{"y":true,"z":"\\u00e9"},"b":[1,2.5,null]}'


def test_tensor_from_array_round_trips_and_checks_itemsize() -> None:
    arr = np.arange(10, dtype=">f8").reshape(2, 5)  # big-endian input is served little-endian
    t = tensor_from_array("w", arr, {"layer": "w"}, chunk_bytes=7)
    assert t.shape == (2, 5) and t.nbytes == 80 and t.dtype == "float64"
    raw = b"".join(bytes(p) for p in t.chunks())
    assert raw == arr.astype("<f8").tobytes()
    with pytest.raises(FormatInputError, match="uint16 has 2-byte items but float32 needs 4"):
        tensor_from_array("w", np.zeros(3, np.uint16), dtype="float32")
    with pytest.raises(FormatInputError, match="dtype 'int64' is not supported"):
        tensor_from_array("w", np.zeros(3, np.int64))


def _producer(variants: list[bytes]) -> tuple[list[int], Callable[[], Iterator[bytes]]]:
    calls = [0]

    def chunks() -> Iterator[bytes]:
        data = variants[min(calls[0], len(variants) - 1)]
        calls[0] += 1
        for i in range(0, len(data), 4):
            yield data[i : i + 4]

    return calls, chunks


def _partial(fmt: str, tensors: list[OutgoingTensor], **kw: object) -> tuple[int, int]:
    """Consume until the body raises; returns (bytes received, announced length)."""
    encoded = encode_body(fmt, DEMO_DOCUMENT, tensors, **kw)  # type: ignore[arg-type]
    got = 0
    with pytest.raises(ProducerContractError):
        for piece in encoded.body:
            got += len(piece)
    return got, encoded.content_length


@pytest.mark.parametrize("fmt", FORMAT_NAMES)
def test_short_or_long_producer_aborts_before_the_announced_length(fmt: str) -> None:
    for wrong in (bytes(20), bytes(28)):
        _, chunks = _producer([wrong])
        t = OutgoingTensor("w", "float32", (2, 3), 24, {}, chunks)
        got, announced = _partial(fmt, [t])
        assert got < announced


@pytest.mark.parametrize("fmt", FORMAT_NAMES)
def test_unrepeatable_producer_or_stale_digest_aborts(fmt: str) -> None:
    calls, chunks = _producer([bytes(range(24)), bytes(range(1, 25))])
    t = OutgoingTensor("w", "float32", (2, 3), 24, {}, chunks)
    # The web layer's hashing pass sees the first bytes; the body then gets different ones and
    # every format stops before the tensor's last piece.
    digests = tensor_digests([t])
    got, announced = _partial(fmt, [t], digests=digests)
    assert got < announced
    assert calls[0] == 2


def test_safetensors_second_pass_is_checked_against_the_hashing_pass() -> None:
    calls, chunks = _producer([bytes(range(24)), bytes(range(1, 25))])
    t = OutgoingTensor("w", "float32", (2, 3), 24, {}, chunks)
    got, announced = _partial("safetensors", [t])
    assert calls[0] == 2 and got < announced


def test_producer_yielding_text_is_an_internal_error() -> None:
    t = OutgoingTensor("w", "float16", (2,), 4, {}, lambda: iter(["ab"]))  # type: ignore[list-item]
    with pytest.raises(ProducerContractError, match="yielded str; expected bytes-like"):
        tensor_digests([t])


@pytest.mark.parametrize("fmt", FORMAT_NAMES)
def test_later_mutation_of_inputs_does_not_change_a_sized_body(fmt: str) -> None:
    doc = dict(DEMO_DOCUMENT)
    t = raw_tensor("w", bytes(8), "float32", (2,), entry={"note": "short"})
    encoded = encode_body(fmt, doc, [t])
    doc["warnings"] = ["a much longer warning added after the length was announced"]
    t.entry["note"] = "changed after sizing, and longer"
    collect(encoded)  # asserts the length still matches
