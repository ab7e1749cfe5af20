"""The verification script in docs/formats.md works on real bodies and catches tampering."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import pytest

from seedbed.formats import FORMAT_NAMES, encode_body
from support.format_helpers import DEMO_DOCUMENT, array_tensor, collect

DOC = Path(__file__).resolve().parents[3] / "docs" / "formats.md"


def _verify_function() -> Any:
    blocks = re.findall(r"```python\n(.*?)```", DOC.read_text(encoding="utf-8"), re.S)
    (script,) = [b for b in blocks if "def verify(" in b]
    namespace: dict[str, Any] = {"__name__": "formats_doc_snippet"}
    exec(compile(script, str(DOC), "exec"), namespace)
    return namespace["verify"]


@pytest.mark.parametrize("fmt", FORMAT_NAMES)
def test_documented_verification_script(
    fmt: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    verify = _verify_function()
    rng = np.random.default_rng(3)
    tensors = [
        array_tensor("enc.weight", rng.standard_normal((3, 4)).astype(np.float32)),
        array_tensor(
            "enc.proj", rng.standard_normal(5).astype(ml_dtypes.bfloat16), dtype="bfloat16"
        ),
    ]
    for t in tensors:
        t.entry.update(tensor=t.name, dtype=t.dtype, shape=list(t.shape))
    body = collect(encode_body(fmt, DEMO_DOCUMENT, tensors))
    path = tmp_path / f"download.{fmt}"
    path.write_bytes(body)
    assert verify(str(path)) is True

    tampered = bytearray(body)
    # Change one byte inside the last tensor's data.
    if fmt == "json":  # flip a base64 letter's case: still valid base64, different bytes
        at, flip = body.rindex(b'"data":"') + 9, 0x20
    elif fmt == "npz":  # last data bytes sit before a 16-byte descriptor and the manifest header
        at, flip = body.rindex(b"PK\x03\x04") - 20, 1
    else:  # safetensors: the last tensor ends the file
        at, flip = len(body) - 1, 1
    tampered[at] ^= flip
    path.write_bytes(bytes(tampered))
    capsys.readouterr()
    if fmt == "npz":  # the zip CRC-32 already catches it
        with pytest.raises(AssertionError, match="CRC-32 mismatch"):
            verify(str(path))
    else:
        assert verify(str(path)) is False
        assert "BAD enc.proj" in capsys.readouterr().out
