r"""HTTP/1.1 messages: reading one request's head from a stream, encoding an answer.

What the front end (:mod:`streamcount.service.httpd`) needs of the protocol, apart from
connections, limits and worker pools: the :class:`Request` a handler gets and the
:class:`Answer` it returns; :func:`read_head` (the request line and headers, strictly: a
request that could be read two ways is refused, not guessed at); :func:`content_length`;
:func:`encode_answer`; :func:`keep_alive`. A request that cannot be served raises
:class:`Refusal`, which the front end answers and then closes the connection.

Examples
--------
>>> import asyncio
>>> async def head(data: bytes) -> RequestHead:
...     reader = asyncio.StreamReader()
...     reader.feed_data(data)
...     start = await reader.readexactly(1)
...     return await read_head(reader, start)
>>> asyncio.run(head(b"GET /v1/status HTTP/1.1\r\nHost: x\r\n\r\n"))
RequestHead(method='GET', target='/v1/status', version='HTTP/1.1', headers={'host': 'x'})
>>> content_length({"content-length": "12"})
12
"""

from __future__ import annotations

import asyncio
from collections.abc import Mapping
from dataclasses import dataclass
from http import HTTPStatus
from typing import Protocol

__all__ = [
    "MAX_LINE",
    "Answer",
    "Refusal",
    "Request",
    "RequestHead",
    "content_length",
    "encode_answer",
    "keep_alive",
    "read_head",
]

#: the longest request line or header line, with its line end, as http.server allows
MAX_LINE = 65536
_MAX_HEADER_BYTES = 65536
_MAX_HEADERS = 100
_TOKEN_CHARS = frozenset(
    b"!#$%&'*+-.^_`|~0123456789ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz"
)


@dataclass(frozen=True, slots=True)
class Request:
    """One request, read in full. Header names are lower case."""

    method: str
    target: str
    version: str
    headers: dict[str, str]
    body: bytes
    #: the peer's address (the proxy's, behind a reverse proxy)
    client: str

    @property
    def path(self) -> str:
        return self.target.split("?", 1)[0]


@dataclass(frozen=True, slots=True)
class RequestHead:
    """A request line and its headers (names lower case), before the body is read."""

    method: str
    target: str
    version: str
    headers: dict[str, str]


class Answer(Protocol):
    """What a handler returns (:class:`streamcount.service.server.Response` is one)."""

    @property
    def status(self) -> int: ...

    @property
    def headers(self) -> Mapping[str, str]: ...

    @property
    def body(self) -> bytes: ...


class Refusal(Exception):
    """A request that is answered with an error and the connection closed."""

    def __init__(self, status: int, code: str, message: str) -> None:
        super().__init__(message)
        self.status = status
        self.code = code
        self.message = message


async def read_head(reader: asyncio.StreamReader, start: bytes) -> RequestHead:
    """Read the request line (whose first byte, ``start``, is already read) and the headers.

    The reader's limit bounds a line (:data:`MAX_LINE`); at most 100 headers of 64 KiB in all
    are read. A header given twice is joined with ``", "`` (``Host`` and ``Content-Length``:
    kept once; two different lengths are refused).

    Raises
    ------
    Refusal
        414, 431, 400 (not a request line, a header line without a name, ...), 505 (an HTTP
        version other than 1.0 and 1.1), 411 (a ``Transfer-Encoding``: a chunked body's length
        is unknown before reading it).
    ConnectionResetError
        When the client closes the connection mid-line.
    """
    try:
        line = start + await reader.readuntil(b"\n")
    except asyncio.LimitOverrunError:
        raise Refusal(414, "request_uri_too_long", "the request line is too long") from None
    except asyncio.IncompleteReadError:
        raise ConnectionResetError("the client closed mid-request") from None
    parts = line.rstrip(b"\r\n").split(b" ")
    if len(parts) != 3 or not parts[0] or not set(parts[0]) <= _TOKEN_CHARS:
        raise Refusal(400, "bad_request", "the request line is not 'METHOD /path HTTP/1.1'")
    method, target, version = (p.decode("latin-1") for p in parts)
    if not version.startswith("HTTP/1.") or version not in ("HTTP/1.0", "HTTP/1.1"):
        if version.startswith("HTTP/"):
            raise Refusal(505, "http_version_not_supported", f"{version} is not served")
        raise Refusal(400, "bad_request", f"{version!r} is not an HTTP version")
    headers = await _read_headers(reader)
    if "transfer-encoding" in headers:
        # a chunked body's length is unknown before reading it: refuse instead of buffering
        raise Refusal(411, "length_required", "send a Content-Length; chunked bodies are refused")
    return RequestHead(method, target, version, headers)


async def _read_headers(reader: asyncio.StreamReader) -> dict[str, str]:
    headers: dict[str, str] = {}
    total = 0
    while True:
        try:
            line = await reader.readuntil(b"\n")
        except asyncio.LimitOverrunError:
            raise Refusal(
                431, "request_header_fields_too_large", "a header line is too long"
            ) from None
        total += len(line)
        if line in (b"\r\n", b"\n"):
            return headers
        if total > _MAX_HEADER_BYTES or len(headers) >= _MAX_HEADERS:
            raise Refusal(431, "request_header_fields_too_large", "too many or too large headers")
        name, sep, value = line.partition(b":")
        if not sep or not name or not set(name) <= _TOKEN_CHARS:
            # also refuses folded lines and space before the colon (request smuggling)
            raise Refusal(400, "bad_request", "a header line is not 'Name: value'")
        key = name.decode("latin-1").lower()
        text = value.strip(b" \t\r\n").decode("latin-1")
        if key in headers:
            if key == "content-length" and headers[key] != text:
                raise Refusal(400, "bad_request", "Content-Length given twice, differently")
            if key not in ("content-length", "host"):
                text = f"{headers[key]}, {text}"
        headers[key] = text


def content_length(headers: Mapping[str, str]) -> int:
    """The body's length from ``Content-Length`` (0 without one).

    Raises
    ------
    Refusal
        400 when the value is not a decimal number.
    """
    raw = headers.get("content-length", "0")
    if not raw.isdigit() or not raw.isascii():
        raise Refusal(400, "bad_request", f"Content-Length {raw!r} is not a number")
    return int(raw)


def encode_answer(
    answer: Answer,
    *,
    server: str,
    date: str,
    defaults: Mapping[str, str],
    head_only: bool,
    close: bool,
) -> bytes:
    """The bytes of ``answer``: status line, ``Server`` and ``Date``, its own headers, then
    each of ``defaults`` it does not set itself, ``Content-Length``, and the body (none with
    ``head_only``, for HEAD: the length stays that of the GET body).

    >>> from types import SimpleNamespace
    >>> answer = SimpleNamespace(status=204, headers={"X-A": "1"}, body=b"")
    >>> encode_answer(answer, server="s", date="d", defaults={"x-a": "2", "X-B": "3"},
    ...               head_only=False, close=True)
    b'HTTP/1.1 204 No Content\\r\\nServer: s\\r\\nDate: d\\r\\nX-A: 1\\r\\nX-B: 3\\r\\nContent-Length: 0\\r\\nConnection: close\\r\\n\\r\\n'

    Raises
    ------
    ValueError
        When a header value holds a line break.
    """  # noqa: E501
    try:
        phrase = HTTPStatus(answer.status).phrase
    except ValueError:
        phrase = "Unknown"
    lines = [f"HTTP/1.1 {answer.status} {phrase}", f"Server: {server}", f"Date: {date}"]
    given = set()
    for name, value in answer.headers.items():
        if "\r" in value or "\n" in value:
            raise ValueError(f"header {name} holds a line break")
        given.add(name.lower())
        lines.append(f"{name}: {value}")
    for name, value in defaults.items():
        if name.lower() not in given:
            lines.append(f"{name}: {value}")
    lines.append(f"Content-Length: {len(answer.body)}")
    if close:
        lines.append("Connection: close")
    head = ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1")
    return head if head_only or not answer.body else head + answer.body


def keep_alive(request: Request | RequestHead) -> bool:
    """Whether the connection stays open after answering ``request`` (HTTP/1.1: unless
    ``Connection: close``; HTTP/1.0: only with ``Connection: keep-alive``)."""
    tokens = {t.strip().lower() for t in request.headers.get("connection", "").split(",")}
    if request.version == "HTTP/1.0":
        return "keep-alive" in tokens
    return "close" not in tokens
