"""An incremental multipart/form-data parser (RFC 7578 on the RFC 2046 framing).

Bytes are fed as they arrive; each part's data is written to a sink chosen from its headers,
so a large file part streams to wherever the caller keeps it and nothing is held whole here.
Memory is bounded by one fed piece plus the delimiter length, and by `max_header_bytes` for
a part's header block.

Framing: the body is a preamble, then for each part `--BOUNDARY` + optional spaces + CRLF +
header lines + CRLF + data, where the data ends at CRLF `--BOUNDARY`; after the last part the
delimiter is followed by `--` and an ignored epilogue.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol

MAX_BOUNDARY = 70  # RFC 2046, section 5.1.1


class FormError(ValueError):
    """The body is not well-formed multipart/form-data (the message says where)."""


class PartSink(Protocol):
    def write(self, data: bytes) -> object: ...


@dataclass(frozen=True)
class PartInfo:
    name: str
    filename: str | None
    content_type: str | None


def header_params(value: str) -> tuple[str, dict[str, str]]:
    """Split `type; key=value; key="quoted \\" value"` into the lower-cased first token and its
    parameters (keys lower-cased, quotes and backslash escapes removed)."""
    items: list[str] = []
    current: list[str] = []
    quoted = escaped = False
    for ch in value:
        if escaped:
            current.append(ch)
            escaped = False
        elif quoted and ch == "\\":
            escaped = True
        elif ch == '"':
            quoted = not quoted
            current.append(ch)
        elif ch == ";" and not quoted:
            items.append("".join(current))
            current = []
        else:
            current.append(ch)
    items.append("".join(current))
    first = items[0].strip().lower()
    params: dict[str, str] = {}
    for item in items[1:]:
        key, sep, raw = item.partition("=")
        if not sep:
            continue
        raw = raw.strip()
        if len(raw) >= 2 and raw[0] == raw[-1] == '"':
            raw = raw[1:-1]
        params[key.strip().lower()] = raw
    return first, params


def boundary_of(content_type: str) -> bytes:
    """The boundary of a `multipart/form-data; boundary=...` Content-Type value."""
    media, params = header_params(content_type)
    if media != "multipart/form-data":
        raise FormError(f"Content-Type {media!r} is not multipart/form-data")
    boundary = params.get("boundary", "")
    if not 1 <= len(boundary) <= MAX_BOUNDARY or not boundary.isascii():
        raise FormError("the multipart Content-Type needs a boundary of 1 to 70 ASCII characters")
    return boundary.encode("ascii")


def _part_info(block: bytes) -> PartInfo:
    headers: dict[str, str] = {}
    last = ""
    for line in block.decode("utf-8", errors="replace").split("\r\n"):
        if not line:
            continue
        if line[0] in " \t" and last:  # an obsolete folded continuation line
            headers[last] += " " + line.strip()
            continue
        key, sep, value = line.partition(":")
        if not sep:
            raise FormError(f"a part header line has no colon: {line[:60]!r}")
        last = key.strip().lower()
        headers[last] = value.strip()
    disposition = headers.get("content-disposition")
    if disposition is None:
        raise FormError("a part has no Content-Disposition header")
    kind, params = header_params(disposition)
    if kind != "form-data" or "name" not in params:
        raise FormError("a part's Content-Disposition must be form-data with a name")
    return PartInfo(params["name"], params.get("filename"), headers.get("content-type"))


class FormPartsParser:
    """Feed with `feed(bytes)`, end with `finish()`. `open_part` is called once per part, with
    the part's name, file name and content type, and returns where its data goes."""

    def __init__(
        self,
        boundary: bytes,
        open_part: Callable[[PartInfo], PartSink],
        max_header_bytes: int = 16384,
        max_parts: int = 16,
    ) -> None:
        self._delimiter = b"\r\n--" + boundary
        self._open_part = open_part
        self._max_header = max_header_bytes
        self._max_parts = max_parts
        self._parts = 0
        # The framing puts CRLF before every delimiter except a first one at the very start.
        self._buf = bytearray(b"\r\n")
        self._state = "preamble"
        self._sink: PartSink | None = None

    @property
    def complete(self) -> bool:
        return self._state == "epilogue"

    def feed(self, data: bytes) -> None:
        if self._state == "epilogue":
            return
        self._buf += data
        while self._step():
            pass

    def finish(self) -> None:
        if self._state != "epilogue":
            raise FormError(
                "the multipart body ended before its closing boundary (truncated upload?)"
            )

    def _step(self) -> bool:
        """Advance once; False when more input is needed."""
        buf, delim = self._buf, self._delimiter
        if self._state in ("preamble", "data"):
            at = buf.find(delim)
            if at < 0:
                keep = len(delim) - 1
                if len(buf) > keep:
                    if self._sink is not None:
                        self._sink.write(bytes(buf[: len(buf) - keep]))
                    del buf[: len(buf) - keep]
                return False
            if self._sink is not None:
                self._sink.write(bytes(buf[:at]))
                self._sink = None
            del buf[: at + len(delim)]
            self._state = "after_delimiter"
            return True
        if self._state == "after_delimiter":
            if len(buf) < 2:
                return False
            if buf[:2] == b"--":
                self._state = "epilogue"
                buf.clear()
                return False
            end = buf.find(b"\r\n")
            if end < 0:
                if len(buf) > 1024:
                    raise FormError("a boundary line is followed by text instead of a line end")
                return False
            if buf[:end].strip(b" \t"):
                raise FormError("a boundary line is followed by text instead of a line end")
            del buf[: end + 2]
            self._state = "headers"
            return True
        if self._state == "headers":
            if buf[:2] == b"\r\n":
                end, skip = 0, 2
            else:
                end, skip = buf.find(b"\r\n\r\n"), 4
            if end < 0:
                if len(buf) > self._max_header:
                    raise FormError(f"a part's headers exceed {self._max_header} bytes")
                return False
            if end > self._max_header:
                raise FormError(f"a part's headers exceed {self._max_header} bytes")
            info = _part_info(bytes(buf[:end]))
            del buf[: end + skip]
            self._parts += 1
            if self._parts > self._max_parts:
                raise FormError(f"the body has more than {self._max_parts} parts")
            self._sink = self._open_part(info)
            self._state = "data"
            return True
        return False  # epilogue: ignored
