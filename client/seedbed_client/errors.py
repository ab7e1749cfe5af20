"""Every failure the client reports, as one hierarchy.

    SeedbedError
    ├── SpecInvalid            the request was refused locally, before anything was sent
    ├── ServiceError           the service answered with an error (4xx, or 5xx it will not retry)
    │   ├── BadRequest         400: the body is not acceptable JSON
    │   ├── NotFound           404: no such endpoint (wrong base URL or path)
    │   ├── RequestTooLarge    413: too many layers/elements, body or JSON response too large
    │   ├── UnsupportedMedia   415
    │   └── RequestInvalid     422: the request breaks a rule; `.field` names where
    │       └── UnknownTensor  422 unknown_tensor: `tensor=` names no tensor of the request
    ├── ServiceUnavailable     no usable answer after every retry (refused, timed out, 5xx, 429)
    └── IntegrityError         bytes that do not match their manifest, a short body, a dropped
        │                      connection, a container that cannot be parsed: no data returned
        └── CacheCorrupted     the cached copy failed verification and the service could not be
                               reached to fetch it again

Service errors carry the service's error JSON: `status`, `code`, `field`, `message`,
`problems` (every problem the service found) and `request_id` (quote it in a bug report).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = [
    "BadRequest",
    "CacheCorrupted",
    "IntegrityError",
    "NotFound",
    "Problem",
    "RequestInvalid",
    "RequestTooLarge",
    "SeedbedError",
    "ServiceError",
    "ServiceUnavailable",
    "SpecInvalid",
    "UnknownTensor",
    "UnsupportedMedia",
    "service_error",
]


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a request: where (`field`), a machine-readable `code`, and why."""

    field: str
    code: str
    message: str


class SeedbedError(Exception):
    """Base of every error raised by seedbed_client."""


class SpecInvalid(SeedbedError, ValueError):  # noqa: N818 - names from the API design
    """A request (or a layer helper) broke a rule the client checks before sending anything."""

    def __init__(self, problems: Sequence[Problem]) -> None:
        if not problems:
            raise ValueError("SpecInvalid needs at least one problem")
        self.problems = list(problems)
        first = self.problems[0]
        more = len(self.problems) - 1
        suffix = f" (and {more} more problem{'s' if more > 1 else ''})" if more else ""
        super().__init__(f"{first.field}: {first.message}{suffix}")

    @property
    def field(self) -> str:
        return self.problems[0].field

    @property
    def code(self) -> str:
        return self.problems[0].code


class ServiceError(SeedbedError):
    """The service refused the request; the attributes repeat its error body."""

    def __init__(
        self,
        status: int,
        code: str,
        field: str,
        message: str,
        problems: Sequence[Problem] = (),
        request_id: str | None = None,
    ) -> None:
        self.status = status
        self.code = code
        self.field = field
        self.message = message
        self.problems = list(problems) or [Problem(field, code, message)]
        self.request_id = request_id
        where = f" [{field}]" if field else ""
        rid = f" (request id {request_id})" if request_id else ""
        super().__init__(f"service answered {status} {code}{where}: {message}{rid}")


class BadRequest(ServiceError):  # noqa: N818 - names from the API design
    """400: the body was not JSON the service accepts (invalid, NaN, duplicate keys)."""


class NotFound(ServiceError):  # noqa: N818 - names from the API design
    """404: no such endpoint; usually a wrong base URL."""


class RequestTooLarge(ServiceError):  # noqa: N818 - names from the API design
    """413: the request or its response is over one of the service's limits."""


class UnsupportedMedia(ServiceError):  # noqa: N818 - names from the API design
    """415: the body was not sent as application/json."""


class RequestInvalid(ServiceError):  # noqa: N818 - names from the API design
    """422: the request breaks a rule; `field` and `problems` say where and what is allowed."""


class UnknownTensor(RequestInvalid):
    """422 unknown_tensor: the selected tensor is not one of the request's tensors."""


class ServiceUnavailable(SeedbedError):  # noqa: N818 - names from the API design
    """No usable answer after every attempt: connection refused or reset, timeouts, 5xx, 429.

    `last_status` is the last HTTP status seen (None when the service never answered) and
    `attempts` how many times the request was sent.
    """

    def __init__(self, message: str, *, attempts: int, last_status: int | None) -> None:
        self.attempts = attempts
        self.last_status = last_status
        super().__init__(message)


class IntegrityError(SeedbedError):
    """Bytes that cannot be trusted: no data is returned when this is raised.

    `tensors` names the tensors whose sha256 did not match (empty when the failure was a short
    body, a dropped connection or an unparseable container).
    """

    def __init__(self, message: str, tensors: Sequence[str] = ()) -> None:
        self.tensors = list(tensors)
        super().__init__(message)


class CacheCorrupted(IntegrityError):  # noqa: N818 - names from the API design
    """A cached copy failed verification (it was discarded) and could not be fetched again."""


# Status -> class for the service's error answers; anything else is a plain ServiceError.
_BY_STATUS: Mapping[int, type[ServiceError]] = {
    400: BadRequest,
    404: NotFound,
    413: RequestTooLarge,
    415: UnsupportedMedia,
    422: RequestInvalid,
}
_BY_CODE: Mapping[str, type[ServiceError]] = {"unknown_tensor": UnknownTensor}


def service_error(status: int, body: Any, request_id: str | None = None) -> ServiceError:
    """The typed error for an error answer, from the service's JSON error shape.

    A body that is not in that shape (a proxy's HTML page, say) still gives a typed error, with
    code `http_<status>` and the start of the body as the message.
    """
    detail = body.get("error") if isinstance(body, dict) else None
    if isinstance(detail, dict):
        code = str(detail.get("code", f"http_{status}"))
        field = str(detail.get("field", ""))
        message = str(detail.get("message", ""))
        problems = [
            Problem(str(p.get("field", "")), str(p.get("code", "")), str(p.get("message", "")))
            for p in detail.get("problems", ())
            if isinstance(p, dict)
        ]
    else:
        code, field, problems = f"http_{status}", "", []
        text = body if isinstance(body, str) else ""
        message = text.strip()[:300] or "the service gave no error details"
    cls = _BY_CODE.get(code) or _BY_STATUS.get(status, ServiceError)
    return cls(status, code, field, message, problems, request_id)
