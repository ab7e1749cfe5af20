"""The one error every step of an ONNX import raises: a code the web layer turns into a 4xx."""

from __future__ import annotations


class ModelRefused(ValueError):  # noqa: N818 - named like RequestRejected, UploadRefused
    """The uploaded model cannot be imported; `code` is machine-readable, `message` says what
    was found and what is allowed. `status` is the HTTP status the web layer answers with."""

    def __init__(
        self,
        code: str,
        message: str,
        *,
        field: str = "(body)",
        status: int = 422,
        names: tuple[str, ...] = (),
    ) -> None:
        super().__init__(message)
        self.code = code
        self.message = message
        self.field = field
        self.status = status
        # Initializer or node names the refusal is about (listed in the error for the caller).
        self.names = names
