"""Why an upload cannot be audited at all (as opposed to findings about its values)."""

from __future__ import annotations

# Codes of refusals (our own vocabulary; the web layer passes them through):
#   pickled_data       an NPZ member holds object (pickled) data; it is never loaded
#   too_large          a size over a limit (the message has the number and the limit)
#   corrupt_file       not a readable NPZ or safetensors file, or inconsistent inside
#   truncated_file     the file ends before the data it declares
#   unsupported_file   readable, but a kind we do not read (encrypted zip, bzip2 member ...)
#   empty_file         no bytes at all
#   no_tensors_read    a readable container in which no member is a tensor we read (a
#                      framework's pickle-based zip, an empty safetensors file): an audit that
#                      read nothing has no verdict
REFUSAL_CODES = frozenset(
    {
        "pickled_data",
        "too_large",
        "corrupt_file",
        "truncated_file",
        "unsupported_file",
        "empty_file",
        "no_tensors_read",
    }
)


class UploadRefused(Exception):  # noqa: N818 - a refusal, not an internal error
    """The upload as a whole cannot be audited; `message` names the member or tensor at fault."""

    def __init__(self, code: str, message: str) -> None:
        if code not in REFUSAL_CODES:
            raise ValueError(f"unknown refusal code {code!r}")
        super().__init__(message)
        self.code = code
        self.message = message

    @property
    def too_large(self) -> bool:
        return self.code == "too_large"
