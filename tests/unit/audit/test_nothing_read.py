"""An upload in which no tensor is read is refused instead of being reported as "ok".

Outside references: the pickle-based zip layout of a framework's own save (a top folder
holding data.pkl, data/<n> raw storages, version and byteorder members) is common practice
[from memory], made here with Python's zipfile; when torch is installed the same check runs on
a file written by torch.save itself. Empty safetensors files are written by the `safetensors`
library (a header of "{}" or metadata only, per its format description); NPZ files by numpy.
"""

from __future__ import annotations

import io
import pickle
import zipfile
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient

from conftest import require_oracle
from seedbed.core.audit import UploadRefused
from seedbed.formats.upload_in import audit_upload
from seedbed.web import Settings, create_app


def refusal(data: bytes) -> UploadRefused:
    with pytest.raises(UploadRefused) as info:
        audit_upload(io.BytesIO(data), len(data))
    return info.value


def pickle_zip() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("checkpoint/data.pkl", pickle.dumps({"w": "storage 0"}, protocol=2))
        zf.writestr("checkpoint/byteorder", b"little")
        zf.writestr("checkpoint/data/0", np.ones(12, np.float32).tobytes())
        zf.writestr("checkpoint/version", b"3\n")
    return buf.getvalue()


def test_pickle_based_zip_is_refused_naming_its_members() -> None:
    err = refusal(pickle_zip())
    assert err.code == "no_tensors_read"
    for member in ("checkpoint/data.pkl", "checkpoint/data/0", "checkpoint/version"):
        assert repr(member) in err.message
    assert "never unpickled" in err.message
    assert "safetensors" in err.message and "savez" in err.message


def test_real_framework_save_is_refused(tmp_path: Path) -> None:
    torch = require_oracle("torch")
    path = tmp_path / "state.pt"
    torch.save({"w": torch.ones(3, 4)}, path)
    err = refusal(path.read_bytes())
    assert err.code == "no_tensors_read" and "data.pkl" in err.message


@pytest.mark.parametrize("metadata", [None, {"made_by": "nobody"}])
def test_empty_safetensors_is_refused(metadata: dict[str, str] | None) -> None:
    st = require_oracle("safetensors.numpy")
    data = st.save({}, metadata=metadata)
    err = refusal(data)
    assert err.code == "no_tensors_read" and "no tensors at all" in err.message


def test_npz_of_non_array_members_is_refused() -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("notes.txt", b"shift 3 weights")
        zf.writestr("labels.json", b"[1, 2]")
    err = refusal(buf.getvalue())
    assert err.code == "no_tensors_read"
    assert "'notes.txt'" in err.message and "'labels.json'" in err.message


def test_npz_whose_only_tensors_are_not_analysed_is_refused() -> None:
    buf = io.BytesIO()
    np.savez(buf, phases=np.ones(4, np.complex64))
    err = refusal(buf.getvalue())
    assert err.code == "no_tensors_read" and "'phases'" in err.message


def test_one_readable_tensor_is_enough() -> None:
    buf = io.BytesIO()
    np.savez(buf, w=np.eye(3, dtype=np.float32), phases=np.ones(4, np.complex64))
    data = buf.getvalue()
    report = audit_upload(io.BytesIO(data), len(data))
    assert report["summary"]["tensors"] == 2


def test_the_service_answers_422_with_the_code() -> None:
    with TestClient(create_app(Settings())) as client:
        got = client.post(
            "/v1/audit", content=pickle_zip(), headers={"Content-Type": "application/zip"}
        )
    assert got.status_code == 422
    error = got.json()["error"]
    assert error["code"] == "no_tensors_read" and error["field"] == "(body)"
    assert "checkpoint/data.pkl" in error["message"]
