"""Recognise an uploaded file by its first bytes and hand it to the matching strict reader."""

from __future__ import annotations

from collections.abc import Collection
from typing import IO, Any

from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.report import audit_stored
from seedbed.core.audit.stored import Upload
from seedbed.core.plan_types import Plan
from seedbed.core.request.limits import raised_by
from seedbed.formats.npz_in import read_npz
from seedbed.formats.safetensors_in import looks_like_safetensors, read_safetensors

_ZIP_STARTS = (b"PK\x03\x04", b"PK\x05\x06")  # a first member, or an empty archive
_NPY_START = b"\x93NUMPY"


def open_upload(
    fp: IO[bytes], size: int, limits: AuditLimits, bfloat16_names: Collection[str] = ()
) -> Upload:
    """Read the structure of an NPZ or safetensors file; every refusal happens here, before any
    tensor value is read (values are read later by each tensor's `load`)."""
    if size == 0:
        raise UploadRefused("empty_file", "the upload is empty; send an NPZ or safetensors file")
    if size > limits.max_upload_bytes:
        raise UploadRefused(
            "too_large",
            f"the file is {size} bytes; at most {limits.max_upload_bytes} are "
            f"audited{raised_by('max_audit_bytes')}",
        )
    fp.seek(0)
    head = fp.read(16)
    if head.startswith(_ZIP_STARTS):
        return read_npz(fp, size, limits, bfloat16_names)
    if head.startswith(_NPY_START):
        raise UploadRefused(
            "unsupported_file",
            "this is a single .npy array; wrap it in an NPZ (np.savez) so its tensor has a name",
        )
    if looks_like_safetensors(head):
        return read_safetensors(fp, size, limits)
    shown = head[:8].hex(" ")
    raise UploadRefused(
        "unsupported_file",
        f"the file is neither an NPZ (a zip archive, starting with PK) nor "
        f"safetensors (an 8-byte header length, then '{{'); it starts with "
        f"bytes {shown}",
    )


def audit_upload(
    fp: IO[bytes], size: int, limits: AuditLimits | None = None, plan: Plan | None = None
) -> dict[str, Any]:
    """Read an NPZ or safetensors file of `size` bytes from the seekable `fp` and audit it
    (seedbed.core.audit.report.audit_stored).

    Raises UploadRefused when the file cannot be read safely (before any value is read, except
    damage found only while decompressing a member). Returns the JSON-ready report.
    """
    limits = limits if limits is not None else AuditLimits()
    bf16 = {t.tensor for t in plan.tensors if t.dtype == "bfloat16"} if plan else set()
    return audit_stored(open_upload(fp, size, limits, bf16), size, limits, plan)
