"""Recognise an uploaded file by its first bytes and hand it to the matching strict reader."""

from __future__ import annotations

from collections.abc import Collection
from typing import IO

from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.npz_reader import read_npz
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.safetensors_reader import looks_like_safetensors, read_safetensors
from seedbed.core.audit.stored import Upload
from seedbed.core.limits import raised_by

_ZIP_STARTS = (b"PK\x03\x04", b"PK\x05\x06")  # a first member, or an empty archive
_NPY_START = b"\x93NUMPY"


def open_upload(fp: IO[bytes], size: int, limits: AuditLimits,
                bfloat16_names: Collection[str] = ()) -> Upload:
    """Read the structure of an NPZ or safetensors file; every refusal happens here, before any
    tensor value is read (values are read later by each tensor's `load`)."""
    if size == 0:
        raise UploadRefused("empty_file", "the upload is empty; send an NPZ or safetensors file")
    if size > limits.max_upload_bytes:
        raise UploadRefused("too_large",
                            f"the file is {size} bytes; at most {limits.max_upload_bytes} are "
                            f"audited{raised_by('max_audit_bytes')}")
    fp.seek(0)
    head = fp.read(16)
    if head.startswith(_ZIP_STARTS):
        return read_npz(fp, size, limits, bfloat16_names)
    if head.startswith(_NPY_START):
        raise UploadRefused("unsupported_file",
                            "this is a single .npy array; wrap it in an NPZ (np.savez) so its "
                            "tensor has a name")
    if looks_like_safetensors(head):
        return read_safetensors(fp, size, limits)
    shown = head[:8].hex(" ")
    raise UploadRefused("unsupported_file",
                        f"the file is neither an NPZ (a zip archive, starting with PK) nor "
                        f"safetensors (an 8-byte header length, then '{{'); it starts with "
                        f"bytes {shown}")


# Members shown by name in a refusal; the count is always complete.
_SHOWN_MEMBERS = 8
_CONVERT = (
    "convert the file to safetensors or NPZ where it was made: load it there with the "
    "framework that wrote it and save each tensor as a plain numeric array (the safetensors "
    "library's save_file, or numpy's savez of a dict of arrays)"
)


def require_something_read(upload: Upload) -> Upload:
    """The upload, or a refusal when none of its tensors would be read.

    A report over zero tensors would say "ok" about a file nobody looked at, so the audit
    refuses every container that yields nothing readable, whatever its kind.
    """
    if any(t.load is not None for t in upload.tensors):
        return upload
    # Tensors whose dtype is not analysed count as skipped too: nothing of theirs is read.
    skipped = [*upload.skipped, *(t.name for t in upload.tensors)]
    why = {t.name: t.note for t in upload.tensors if t.note}
    shown = ", ".join(repr(n) + (f" ({why[n]})" if n in why else "")
                      for n in skipped[:_SHOWN_MEMBERS])
    more = f" and {len(skipped) - _SHOWN_MEMBERS} more" if len(skipped) > _SHOWN_MEMBERS else ""
    if not skipped:
        what = f"the {upload.container} file holds no tensors at all"
    else:
        what = (f"no member of the {upload.container} file is a tensor that is read; skipped: "
                f"{shown}{more}")
    pickled = any(n.endswith(".pkl") or n.endswith("/version") or "/data/" in n
                  for n in skipped)
    framework = (" The members look like a framework's pickle-based save (a data.pkl with "
                 "raw storages beside it)." if pickled else "")
    raise UploadRefused(
        "no_tensors_read",
        f"{what}, so the audit has nothing to give a verdict on.{framework} Pickled data is "
        f"never unpickled here; {_CONVERT}.",
    )

