"""The HTTP API: a pure :func:`route` function and a thin stdlib ``http.server`` adapter.

:func:`route` maps one request (method, path, query, headers, body) to a :class:`Response`
and is tested without a socket; :func:`start_server` wraps it in a ``ThreadingHTTPServer`` on
a daemon thread. The data comes from an :class:`ApiBackend` that the application implements by
handing out immutable snapshots, so a request never holds a lock on the counting loop.

Endpoints
---------
=========================  ======  ==========================================================
``/metrics``               GET     Prometheus text exposition (never needs the token)
``/healthz``               GET     200 while the process is alive (never needs the token)
``/readyz``                GET     200 once serving, 503 before (never needs the token)
``/v1/status``             GET     engine statistics, window, configuration summary
``/v1/itemsets``           GET     frequent itemsets: ``min_support``, ``size``, ``limit``
``/v1/rules``              GET     rules: ``sort`` (lift|confidence|support), ``limit``,
                                   ``min_confidence``, ``min_lift``, ``min_support``
``/v1/alerts``             GET     recent alerts: ``since`` (alert sequence), ``limit``
``/v1/history``            GET     one itemset's support per pane close: ``items`` (once per
                                   item), ``since`` (pane close)
``/v1/transactions``       POST    ingest a body of transactions (only with HTTP ingest on)
``/``, ``/page/*``         GET     the page (:mod:`.page`; no token needed, it holds no data)
=========================  ======  ==========================================================

``/v1/rules`` also takes ``since``: the ``version`` of the rules the reader holds (answered
with ``"unchanged": true`` and no list while they are current).

``HEAD`` is answered like ``GET``; the adapter leaves the body out. Every error is JSON
``{"error": {"code": ..., "message": ...}}``: 400 for a bad parameter or body, 401 without the
bearer token (when one is set), 404 for an unknown path, 405 (with ``Allow``) for a wrong
method, 411 for a chunked body, 413 for a body over the limit, 503 when not ready, 500 when
the backend fails.
"""

from __future__ import annotations

import hmac
import json
import logging
import math
import socket
import socketserver
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, Protocol
from urllib.parse import parse_qs, urlsplit

from streamcount import __version__
from streamcount.config.load import parse_listen
from streamcount.errors import InputError
from streamcount.service.page import PAGE_FILES, page_file

__all__ = [
    "MAX_LIMIT",
    "RULE_SORTS",
    "ApiBackend",
    "Response",
    "route",
    "start_server",
]

logger = logging.getLogger(__name__)

#: largest ``limit`` served; larger requests are capped to it
MAX_LIMIT = 10000
_DEFAULT_LIMIT = 100
#: accepted values of ``/v1/rules?sort=``
RULE_SORTS: tuple[str, ...] = ("lift", "confidence", "support")
_JSON = "application/json"


class ApiBackend(Protocol):
    """What the HTTP layer asks of the application; every method returns quickly from
    immutable snapshots and may be called from several request threads at once."""

    def metrics_payload(self) -> tuple[bytes, str]:
        """Body and content type (``generate_latest(registry)``, ``CONTENT_TYPE_LATEST``)."""
        ...

    def healthy(self) -> bool: ...

    def ready(self) -> bool: ...

    def status(self) -> dict[str, Any]: ...

    def itemsets(
        self, min_support: float | None, size: int | None, limit: int
    ) -> dict[str, Any]: ...

    def rules(
        self,
        sort: str,
        limit: int,
        min_confidence: float | None,
        min_lift: float | None,
        min_support: float | None,
        since: str | None = None,
    ) -> dict[str, Any]:
        """The active rules; with ``since`` equal to their ``version``, only that they are
        unchanged."""
        ...

    def alerts(self, since: int | None, limit: int) -> dict[str, Any]: ...

    def history(self, items: list[str], since: int | None) -> dict[str, Any]:
        """One itemset's history after pane close ``since``; :class:`InputError` for a bad
        itemset."""
        ...

    def page_enabled(self) -> bool:
        """Whether ``GET /`` serves the page (``page.enabled``)."""
        ...

    def ingest_enabled(self) -> bool:
        """Whether ``POST /v1/transactions`` exists (``input.http_ingest``)."""
        ...

    def ingest(self, body: bytes, content_type: str) -> dict[str, Any]:
        """Accept a body of transactions; raise :class:`InputError` for a bad body."""
        ...


@dataclass(frozen=True, slots=True)
class Response:
    """One HTTP response: status code, headers and the body bytes."""

    status: int
    headers: dict[str, str] = field(default_factory=dict)
    body: bytes = b""

    def json(self) -> Any:
        """The body parsed as JSON (for tests and callers)."""
        return json.loads(self.body)


def _json_response(status: int, payload: object, **headers: str) -> Response:
    body = json.dumps(payload, allow_nan=False, separators=(",", ":")).encode("utf-8") + b"\n"
    return Response(status, {"Content-Type": _JSON, **headers}, body)


def _error(status: int, code: str, message: str, **headers: str) -> Response:
    return _json_response(status, {"error": {"code": code, "message": message}}, **headers)


class _BadParameter(Exception):
    def __init__(self, name: str, value: str, rule: str) -> None:
        super().__init__(f"query parameter {name}={value!r}: {rule}")


class _Query:
    """Typed access to query parameters; unknown or repeated ones are refused."""

    def __init__(self, query: Mapping[str, list[str]], allowed: tuple[str, ...]) -> None:
        for name, values in query.items():
            if name not in allowed:
                known = ", ".join(allowed) or "none"
                raise _BadParameter(name, values[-1], f"unknown parameter (known: {known})")
            if len(values) != 1:
                raise _BadParameter(name, values[-1], "given more than once")
        self._values = {name: values[0] for name, values in query.items()}

    def number(self, name: str, *, low: float, high: float = math.inf, text: str) -> float | None:
        raw = self._values.get(name)
        if raw is None or raw == "":
            return None
        try:
            value = float(raw)
        except ValueError:
            raise _BadParameter(name, raw, f"must be a number {text}") from None
        if not (math.isfinite(value) and low <= value <= high):
            raise _BadParameter(name, raw, f"must be a number {text}")
        return value

    def integer(self, name: str, *, low: int) -> int | None:
        raw = self._values.get(name)
        if raw is None or raw == "":
            return None
        try:
            value = int(raw)
        except ValueError:
            raise _BadParameter(name, raw, f"must be a whole number >= {low}") from None
        if value < low:
            raise _BadParameter(name, raw, f"must be a whole number >= {low}")
        return value

    def text(self, name: str) -> str | None:
        raw = self._values.get(name)
        return None if raw is None or raw == "" else raw

    def limit(self) -> int:
        value = self.integer("limit", low=1)
        return _DEFAULT_LIMIT if value is None else min(value, MAX_LIMIT)

    def choice(self, name: str, choices: tuple[str, ...]) -> str:
        raw = self._values.get(name)
        if raw is None or raw == "":
            return choices[0]
        if raw not in choices:
            raise _BadParameter(name, raw, "must be one of " + ", ".join(choices))
        return raw


_FRACTION = "in [0, 1]"


def _metrics(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    payload, content_type = backend.metrics_payload()
    return Response(200, {"Content-Type": content_type}, payload)


def _healthz(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    if backend.healthy():
        return _json_response(200, {"status": "ok"})
    return _error(503, "unhealthy", "the counting loop is not running")


def _readyz(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    if backend.ready():
        return _json_response(200, {"status": "ready"})
    return _error(503, "not_ready", "not ready yet (starting up or restoring a checkpoint)")


def _status(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    _Query(query, ())
    return _json_response(200, backend.status())


def _itemsets(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    q = _Query(query, ("min_support", "size", "limit"))
    min_support = q.number("min_support", low=0.0, high=1.0, text=_FRACTION)
    size = q.integer("size", low=1)
    return _json_response(200, backend.itemsets(min_support, size, q.limit()))


def _rules(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    q = _Query(query, ("sort", "limit", "min_confidence", "min_lift", "min_support", "since"))
    sort = q.choice("sort", RULE_SORTS)
    min_confidence = q.number("min_confidence", low=0.0, high=1.0, text=_FRACTION)
    min_lift = q.number("min_lift", low=0.0, text=">= 0")
    min_support = q.number("min_support", low=0.0, high=1.0, text=_FRACTION)
    since = q.text("since")
    extra = {} if since is None else {"since": since}
    payload = backend.rules(sort, q.limit(), min_confidence, min_lift, min_support, **extra)
    return _json_response(200, payload)


def _alerts(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    q = _Query(query, ("since", "limit"))
    since = q.integer("since", low=0)
    return _json_response(200, backend.alerts(since, q.limit()))


def _history(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    # items may repeat (one per item: any name, commas included, is one value)
    items = list(query.get("items", []))
    q = _Query({k: v for k, v in query.items() if k != "items"}, ("since",))
    since = q.integer("since", low=0)
    if not items:
        raise _BadParameter("items", "", "required: one items= parameter per item of the itemset")
    try:
        return _json_response(200, backend.history(items, since))
    except InputError as exc:
        return _error(400, "bad_parameter", str(exc))


def _page(path: str) -> _Handler:
    """The handler of one page file (the query string is ignored)."""

    def handler(
        backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
    ) -> Response:
        if not backend.page_enabled():
            return _error(404, "not_found", "the page is off (page.enabled: false)")
        content, headers = page_file(path)
        return Response(200, headers, content)

    return handler


def _ingest(
    backend: ApiBackend, query: Mapping[str, list[str]], body: bytes, ctype: str
) -> Response:
    _Query(query, ())
    try:
        result = backend.ingest(body, ctype)
    except InputError as exc:
        return _error(400, "bad_input", str(exc))
    return _json_response(202, result)


_Handler = Callable[[ApiBackend, Mapping[str, list[str]], bytes, str], Response]


@dataclass(frozen=True, slots=True)
class _Route:
    methods: tuple[str, ...]
    handler: _Handler
    #: reachable without the bearer token (scrapers and liveness probes)
    public: bool = False


_GET = ("GET", "HEAD")
_ROUTES: dict[str, _Route] = {
    "/metrics": _Route(_GET, _metrics, public=True),
    "/healthz": _Route(_GET, _healthz, public=True),
    "/readyz": _Route(_GET, _readyz, public=True),  # probes carry no token
    "/v1/status": _Route(_GET, _status),
    "/v1/itemsets": _Route(_GET, _itemsets),
    "/v1/rules": _Route(_GET, _rules),
    "/v1/alerts": _Route(_GET, _alerts),
    "/v1/history": _Route(_GET, _history),
    "/v1/transactions": _Route(("POST",), _ingest),
    # the page's files hold no data: they load without the token, then ask for it
    **{path: _Route(_GET, _page(path), public=True) for path in PAGE_FILES},
}


def _authorised(headers: Mapping[str, str], token: str) -> bool:
    value = next((v for k, v in headers.items() if k.lower() == "authorization"), "")
    scheme, _, given = value.partition(" ")
    if scheme.lower() != "bearer":
        return False
    # constant-time comparison, so response timing does not reveal how much of a guess matched
    return hmac.compare_digest(given.strip().encode("utf-8"), token.encode("utf-8"))


def route(
    method: str,
    path: str,
    query: Mapping[str, list[str]],
    headers: Mapping[str, str],
    body: bytes,
    backend: ApiBackend,
    *,
    token: str | None = None,
    max_request_bytes: int | None = None,
) -> Response:
    """Answer one request; no socket, no global state.

    Parameters
    ----------
    method, path:
        Request method (upper case) and path without the query string.
    query:
        Parsed query string (``urllib.parse.parse_qs``: each name to its list of values).
    headers:
        Request headers (names in any case).
    body:
        The request body, already read.
    backend:
        Where the data comes from.
    token:
        When set, every endpoint except ``/metrics``, ``/healthz`` and ``/readyz`` needs
        ``Authorization: Bearer <token>``.
    max_request_bytes:
        Bodies longer than this get 413 (the adapter checks ``Content-Length`` before
        reading; this repeats the check for callers that pass a body directly).
    """
    entry = _ROUTES.get(path)
    if entry is None or (path == "/v1/transactions" and not backend.ingest_enabled()):
        return _error(404, "not_found", f"no endpoint {path!r}; see the API list in the docs")
    if method not in entry.methods:
        allow = ", ".join(entry.methods)
        return _error(
            405,
            "method_not_allowed",
            f"{method} is not allowed on {path}; use {allow}",
            Allow=allow,
        )
    if token is not None and not entry.public and not _authorised(headers, token):
        return _error(
            401,
            "unauthorized",
            "send the API token as 'Authorization: Bearer <token>'",
            **{"WWW-Authenticate": 'Bearer realm="streamcount"'},
        )
    if max_request_bytes is not None and len(body) > max_request_bytes:
        return _error(413, "too_large", f"request body over {max_request_bytes} bytes")
    ctype = next((v for k, v in headers.items() if k.lower() == "content-type"), "")
    try:
        return entry.handler(backend, query, body, ctype)
    except _BadParameter as exc:
        return _error(400, "bad_parameter", str(exc))
    except Exception:
        logger.exception("request %s %s failed in the backend", method, path)
        return _error(500, "internal_error", "the request failed; see the service log")


# ---------------------------------------------------------------------------------------------
# The stdlib adapter
# ---------------------------------------------------------------------------------------------


class _RequestHandler(BaseHTTPRequestHandler):
    """Reads one request, passes it to :func:`route`, writes the response."""

    server_version = f"streamcount/{__version__}"
    protocol_version = "HTTP/1.1"
    # set on the per-server subclass made by start_server
    backend: ApiBackend
    token: str | None = None
    max_request_bytes: int = 1048576

    def _send(self, response: Response, *, close: bool = False) -> None:
        self.send_response(response.status)
        for name, value in response.headers.items():
            self.send_header(name, value)
        # for HEAD: the length the GET body has, but no body
        self.send_header("Content-Length", str(len(response.body)))
        if close:
            self.send_header("Connection", "close")
            self.close_connection = True
        self.end_headers()
        if response.body and self.command != "HEAD":
            self.wfile.write(response.body)

    def _dispatch(self) -> None:
        method = self.command
        url = urlsplit(self.path)
        try:
            query = parse_qs(url.query, keep_blank_values=True, strict_parsing=False)
        except ValueError:
            self._send(_error(400, "bad_request", "the query string cannot be parsed"))
            return
        headers = {name: value for name, value in self.headers.items()}
        if self.headers.get("Transfer-Encoding"):
            # a chunked body's length is unknown before reading it: refuse instead of buffering
            self._send(
                _error(411, "length_required", "send a Content-Length; chunked bodies are refused"),
                close=True,
            )
            return
        raw_length = self.headers.get("Content-Length", "0")
        if not raw_length.isdigit():
            self._send(
                _error(400, "bad_request", f"Content-Length {raw_length!r} is not a number"),
                close=True,
            )
            return
        length = int(raw_length)
        if length > self.max_request_bytes:
            self._send(
                _error(
                    413,
                    "too_large",
                    f"request body of {length} bytes is over the limit of "
                    f"{self.max_request_bytes} (server.max_request_bytes)",
                ),
                close=True,
            )
            return
        try:
            body = self.rfile.read(length) if length else b""
        except TimeoutError:
            self._send(
                _error(408, "timeout", "the request body did not arrive in time"), close=True
            )
            return
        if len(body) < length:
            self.close_connection = True  # the client went away mid-body
            return
        response = route(
            method,
            url.path,
            query,
            headers,
            body,
            self.backend,
            token=self.token,
            max_request_bytes=self.max_request_bytes,
        )
        self._send(response)

    do_GET = do_HEAD = do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _dispatch

    def send_error(self, code: int, message: str | None = None, explain: str | None = None) -> None:
        """JSON errors for what http.server refuses itself (bad request line, long headers)."""
        if self.request_version == "HTTP/0.9":
            # an unparsable request line leaves the version at 0.9, which sends no status line
            self.request_version = "HTTP/1.0"
        try:
            name = HTTPStatus(code).phrase.lower().replace(" ", "_").replace("-", "_")
            self._send(_error(code, name, message or explain or name), close=True)
        except OSError:
            self.close_connection = True

    def log_message(self, format: str, *args: Any) -> None:
        # quiet access log: requests are not logged at INFO (a scrape every few seconds)
        if logger.isEnabledFor(logging.DEBUG):
            logger.debug("%s %s", self.address_string(), format % args)


class _Server(ThreadingHTTPServer):
    daemon_threads = True

    def server_bind(self) -> None:
        # HTTPServer.server_bind does a reverse DNS lookup (getfqdn), which can stall start-up
        socketserver.TCPServer.server_bind(self)
        host, port = self.server_address[:2]
        self.server_name = str(host)
        self.server_port = int(port)


class _Server6(_Server):
    address_family = socket.AF_INET6


def start_server(
    listen: str,
    backend: ApiBackend,
    *,
    token: str | None,
    max_request_bytes: int,
    request_timeout_seconds: float,
) -> tuple[ThreadingHTTPServer, threading.Thread]:
    """Serve :func:`route` on ``listen`` (``host:port``; port 0 picks a free one).

    Returns the server and its (already started) daemon thread; the bound port is
    ``server.server_port``. Stop with ``server.shutdown()`` then ``server.server_close()``.

    Raises
    ------
    ValueError
        For a malformed ``listen`` or an empty token.
    OSError
        When the address cannot be bound (in use, not local).
    """
    host, port = parse_listen(listen)
    if token == "":
        raise ValueError("the API token is empty; set a token or run without one")
    handler = type(
        "_BoundRequestHandler",
        (_RequestHandler,),
        {
            "backend": backend,
            "token": token,
            "max_request_bytes": max_request_bytes,
            # StreamRequestHandler.setup applies it to the connection's socket
            "timeout": request_timeout_seconds,
        },
    )
    server_cls = _Server6 if ":" in host else _Server
    server = server_cls((host, port), handler)
    thread = threading.Thread(
        target=server.serve_forever,
        kwargs={"poll_interval": 0.2},
        name=f"streamcount-http-{server.server_port}",
        daemon=True,
    )
    thread.start()
    logger.info("HTTP API listening on %s:%d", host, server.server_port)
    return server, thread
