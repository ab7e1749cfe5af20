"""The incremental multipart/form-data parser behind POST /v1/audit.

Outside references: bodies are built by httpx (a real HTTP client's multipart encoder) and by
hand per RFC 2046 section 5.1.1; the parts are compared with what Python's standard `email`
package parses from the same bytes, for arbitrary splits of the body into pieces.
"""

from __future__ import annotations

import email
import email.policy
import io

import httpx
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seedbed.formats.multipart_in import FormError, FormPartsParser, PartInfo, boundary_of


class _Sink:
    def __init__(self) -> None:
        self.data = io.BytesIO()

    def write(self, data: bytes) -> None:
        self.data.write(data)


def parse(body: bytes, content_type: str, pieces: list[int] | None = None) -> list[tuple]:
    parts: list[tuple[PartInfo, _Sink]] = []

    def open_part(info: PartInfo) -> _Sink:
        sink = _Sink()
        parts.append((info, sink))
        return sink

    parser = FormPartsParser(boundary_of(content_type), open_part)
    cuts = sorted(set(pieces or []))
    start = 0
    for cut in [*cuts, len(body)]:
        parser.feed(body[start:cut])
        start = cut
    parser.finish()
    return [(i.name, i.filename, i.content_type, s.data.getvalue()) for i, s in parts]


def oracle(body: bytes, content_type: str) -> list[tuple]:
    msg = email.message_from_bytes(
        b"Content-Type: " + content_type.encode() + b"\r\n\r\n" + body, policy=email.policy.HTTP
    )
    out = []
    for part in msg.iter_parts():
        payload = part.get_payload(decode=True)
        out.append(
            (
                part.get_param("name", header="content-disposition"),
                part.get_filename(),
                part.get("content-type"),
                payload,
            )
        )
    return out


def httpx_body(file_bytes: bytes, request_text: str | None) -> tuple[bytes, str]:
    data = {"request": request_text} if request_text is not None else None
    req = httpx.Request(
        "POST",
        "http://test/v1/audit",
        files={"file": ("weights.npz", file_bytes, "application/zip")},
        data=data,
    )
    return req.read(), req.headers["content-type"]


# Payloads that stress the delimiter search: CRLFs, dashes, a near-boundary.
_tricky = st.binary(max_size=300).map(lambda b: b + b"\r\n--" + b[:5] + b"\r\n-")


@settings(max_examples=60, deadline=None)
@given(
    payload=_tricky,
    request_text=st.one_of(st.none(), st.text(max_size=80)),
    cuts=st.lists(st.integers(min_value=0, max_value=800), max_size=12),
)
def test_httpx_bodies_parse_like_the_email_package_for_any_split(
    payload: bytes, request_text: str | None, cuts: list[int]
) -> None:
    body, ctype = httpx_body(payload, request_text)
    cuts = [c for c in cuts if c <= len(body)]
    got = parse(body, ctype, cuts)
    names = [g[0] for g in got]
    assert names == (["request", "file"] if request_text is not None else ["file"])
    assert got[-1][3] == payload
    expected = oracle(body, ctype)
    assert [(g[0], g[1], g[3]) for g in got] == [(e[0], e[1], e[3]) for e in expected]
    if request_text is not None:
        assert got[0][3] == request_text.encode()


def test_hand_made_body_with_preamble_padding_and_epilogue() -> None:
    # RFC 2046 5.1.1: a preamble before the first boundary, optional white space after a
    # boundary, and an epilogue after the closing one are all allowed and ignored.
    body = (
        b"this preamble is ignored\r\n"
        b"--XyZ  \r\n"
        b'Content-Disposition: form-data; name="file"; filename="a \\"q\\".npz"\r\n'
        b"Content-Type: application/octet-stream\r\n\r\n"
        b"\x00\x01--XyZ-not-a-boundary\r\n"
        b"\r\n--XyZ--\r\nepilogue"
    )
    got = parse(body, 'multipart/form-data; boundary="XyZ"')
    assert got == [
        ("file", 'a "q".npz', "application/octet-stream", b"\x00\x01--XyZ-not-a-boundary\r\n")
    ]


def test_missing_closing_boundary_is_refused() -> None:
    body, ctype = httpx_body(b"abc", None)
    with pytest.raises(FormError, match="closing boundary"):
        parse(body[:-10], ctype)


def test_part_without_disposition_is_refused() -> None:
    body = b"--b\r\nContent-Type: text/plain\r\n\r\nx\r\n--b--\r\n"
    with pytest.raises(FormError, match="Content-Disposition"):
        parse(body, "multipart/form-data; boundary=b")


def test_oversized_part_headers_are_refused() -> None:
    body = b"--b\r\nX-Filler: " + b"a" * 20000 + b"\r\n\r\nx\r\n--b--\r\n"
    with pytest.raises(FormError, match="headers exceed"):
        parse(body, "multipart/form-data; boundary=b")


@pytest.mark.parametrize(
    "ctype",
    [
        "multipart/form-data",
        "multipart/form-data; boundary=",
        "multipart/mixed; boundary=a",
        "application/json",
        "multipart/form-data; boundary=" + "x" * 71,
    ],
)
def test_bad_content_types_name_the_problem(ctype: str) -> None:
    with pytest.raises(FormError):
        boundary_of(ctype)
