"""An audit that read no tensor has no verdict: such an upload is refused, whatever its kind."""

from __future__ import annotations

from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.stored import Upload

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
    shown = ", ".join(
        repr(n) + (f" ({why[n]})" if n in why else "") for n in skipped[:_SHOWN_MEMBERS]
    )
    more = f" and {len(skipped) - _SHOWN_MEMBERS} more" if len(skipped) > _SHOWN_MEMBERS else ""
    if not skipped:
        what = f"the {upload.container} file holds no tensors at all"
    else:
        what = (
            f"no member of the {upload.container} file is a tensor that is read; skipped: "
            f"{shown}{more}"
        )
    pickled = any(n.endswith(".pkl") or n.endswith("/version") or "/data/" in n for n in skipped)
    framework = (
        " The members look like a framework's pickle-based save (a data.pkl with "
        "raw storages beside it)."
        if pickled
        else ""
    )
    raise UploadRefused(
        "no_tensors_read",
        f"{what}, so the audit has nothing to give a verdict on.{framework} Pickled data is "
        f"never unpickled here; {_CONVERT}.",
    )
