"""The HTTP API as a pure function: :func:`route` maps one request (method, path, query,
headers, body) to a :class:`Response`, with no socket and no global state, so it is tested
without a server; :mod:`streamcount.service.server` serves it. The data comes from an
:class:`ApiBackend` that the application implements by handing out immutable snapshots, so a
request never holds a lock on the counting loop.

Endpoints
---------
=========================  ======  ==========================================================
``/metrics``               GET     Prometheus text exposition (needs the token when one is
                                   set, unless ``server.public_metrics``)
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

``HEAD`` is answered like ``GET``; the body is left out. Every error is JSON
``{"error": {"code": ..., "message": ...}}``: 400 for a bad parameter or body, 401 without the
bearer token (when one is set), 404 for an unknown path, 405 (with ``Allow``) for a wrong
method, 408 for a request not read in time, 411 for a chunked body, 413 for a body over the
limit, 415 for an ingest body of another type or encoding, 429 (with ``Retry-After``) after too
many failed authentications from one address, 503 when not ready or over a connection cap,
500 when the backend fails.

**Public /metrics.** With a token set, ``/metrics`` needs it like the API. With
``public_metrics`` it is served without one, but then never carries item text: the per-rule
gauges (:data:`~streamcount.service.metrics.ITEM_TEXT_METRICS`, whose ``antecedent`` and
``consequent`` labels hold item names) are dropped from an unauthenticated scrape; a scrape
that sends the token gets them.

**Ingest bodies.** ``POST /v1/transactions`` takes ``application/json``,
``application/x-ndjson``, ``application/ndjson`` or ``text/plain`` (parameters such as
``charset=utf-8`` allowed; a charset other than UTF-8 or ASCII is refused), and 415 otherwise.
``Content-Encoding: gzip`` is accepted; the body is inflated up to the same size limit as a
plain one (413 past it), so a small compressed body cannot expand without bound.
"""

from __future__ import annotations

import json
import logging
import math
import re
import zlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol

from streamcount.errors import InputError
from streamcount.service.access import bearer_matches
from streamcount.service.metrics import ITEM_TEXT_METRICS
from streamcount.service.page import PAGE_FILES, page_file

__all__ = [
    "INGEST_TYPES",
    "MAX_LIMIT",
    "PROBE_PATHS",
    "RULE_SORTS",
    "ApiBackend",
    "Response",
    "error_response",
    "public_exposition",
    "route",
    "token_required",
]

logger = logging.getLogger(__name__)

#: largest ``limit`` served; larger requests are capped to it
MAX_LIMIT = 10000
_DEFAULT_LIMIT = 100
#: accepted values of ``/v1/rules?sort=``
RULE_SORTS: tuple[str, ...] = ("lift", "confidence", "support")
#: media types ``POST /v1/transactions`` accepts (each with parameters such as a charset)
INGEST_TYPES: tuple[str, ...] = (
    "application/json",
    "application/x-ndjson",
    "application/ndjson",
    "text/plain",
)
_CHARSETS = frozenset({"utf-8", "utf8", "us-ascii", "ascii"})
_JSON = "application/json"
#: paths served by the probe workers, so scrapes and probes never wait behind the API
PROBE_PATHS = frozenset({"/metrics", "/healthz", "/readyz"})


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


def error_response(
    status: int, code: str, message: str, headers: Mapping[str, str] | None = None
) -> Response:
    """The JSON error every endpoint answers with: ``{"error": {"code", "message"}}``."""
    return _error(status, code, message, **dict(headers or {}))


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


@dataclass(frozen=True, slots=True)
class _Call:
    """What a handler sees of one request."""

    backend: ApiBackend
    query: Mapping[str, list[str]]
    headers: Mapping[str, str]
    body: bytes
    max_request_bytes: int | None
    #: serve /metrics without item text (public scrape)
    public: bool = False

    def header(self, name: str) -> str:
        return next((v for k, v in self.headers.items() if k.lower() == name), "")


#: a line of the exposition belonging to a family with item text: its HELP, TYPE or a sample
_ITEM_LINES = re.compile(
    rb"^(?:# (?:HELP|TYPE) )?(?:"
    + b"|".join(re.escape(n.encode()) for n in ITEM_TEXT_METRICS)
    + rb")[ {][^\n]*\n",
    re.M,
)


def public_exposition(payload: bytes) -> bytes:
    """The exposition without the families whose labels hold item text
    (:data:`~streamcount.service.metrics.ITEM_TEXT_METRICS`).

    >>> text = (b"# HELP streamcount_rule_lift Lift.\\n# TYPE streamcount_rule_lift gauge\\n"
    ...         b'streamcount_rule_lift{antecedent="tea",consequent="jam"} 2.5\\n'
    ...         b"# TYPE streamcount_active_rules gauge\\nstreamcount_active_rules 1.0\\n")
    >>> public_exposition(text).decode()
    '# TYPE streamcount_active_rules gauge\\nstreamcount_active_rules 1.0\\n'
    """
    return _ITEM_LINES.sub(b"", payload)


def _metrics(call: _Call) -> Response:
    payload, content_type = call.backend.metrics_payload()
    if call.public:
        payload = public_exposition(payload)
    return Response(200, {"Content-Type": content_type}, payload)


def _healthz(call: _Call) -> Response:
    if call.backend.healthy():
        return _json_response(200, {"status": "ok"})
    return _error(503, "unhealthy", "the counting loop is not running")


def _readyz(call: _Call) -> Response:
    if call.backend.ready():
        return _json_response(200, {"status": "ready"})
    return _error(503, "not_ready", "not ready yet (starting up or restoring a checkpoint)")


def _status(call: _Call) -> Response:
    _Query(call.query, ())
    return _json_response(200, call.backend.status())


def _itemsets(call: _Call) -> Response:
    q = _Query(call.query, ("min_support", "size", "limit"))
    min_support = q.number("min_support", low=0.0, high=1.0, text=_FRACTION)
    size = q.integer("size", low=1)
    return _json_response(200, call.backend.itemsets(min_support, size, q.limit()))


def _rules(call: _Call) -> Response:
    q = _Query(call.query, ("sort", "limit", "min_confidence", "min_lift", "min_support", "since"))
    sort = q.choice("sort", RULE_SORTS)
    min_confidence = q.number("min_confidence", low=0.0, high=1.0, text=_FRACTION)
    min_lift = q.number("min_lift", low=0.0, text=">= 0")
    min_support = q.number("min_support", low=0.0, high=1.0, text=_FRACTION)
    since = q.text("since")
    extra = {} if since is None else {"since": since}
    payload = call.backend.rules(sort, q.limit(), min_confidence, min_lift, min_support, **extra)
    return _json_response(200, payload)


def _alerts(call: _Call) -> Response:
    q = _Query(call.query, ("since", "limit"))
    since = q.integer("since", low=0)
    return _json_response(200, call.backend.alerts(since, q.limit()))


def _history(call: _Call) -> Response:
    # items may repeat (one per item: any name, commas included, is one value)
    items = list(call.query.get("items", []))
    q = _Query({k: v for k, v in call.query.items() if k != "items"}, ("since",))
    since = q.integer("since", low=0)
    if not items:
        raise _BadParameter("items", "", "required: one items= parameter per item of the itemset")
    try:
        return _json_response(200, call.backend.history(items, since))
    except InputError as exc:
        return _error(400, "bad_parameter", str(exc))


def _page(path: str) -> _Handler:
    """The handler of one page file (the query string is ignored)."""

    def handler(call: _Call) -> Response:
        if not call.backend.page_enabled():
            return _error(404, "not_found", "the page is off (page.enabled: false)")
        content, headers = page_file(path)
        return Response(200, headers, content)

    return handler


def _unsupported(message: str) -> Response:
    return _error(
        415, "unsupported_media_type", message, **{"Accept-Post": ", ".join(INGEST_TYPES)}
    )


def _content_type(ctype: str) -> Response | None:
    """``None`` when ``ctype`` is an ingest type with an acceptable charset, else the 415."""
    media, *params = (part.strip() for part in ctype.split(";"))
    if media.lower() not in INGEST_TYPES:
        shown = repr(media) if media else "none"
        return _unsupported(
            f"Content-Type {shown} is not accepted; send one of {', '.join(INGEST_TYPES)} "
            "(JSON objects, one per line)"
        )
    for param in params:
        name, _, value = param.partition("=")
        charset = value.strip().strip('"').lower()
        if name.strip().lower() == "charset" and charset not in _CHARSETS:
            return _unsupported(f"charset {charset!r} is not accepted; send UTF-8")
    return None


def _inflate(body: bytes, limit: int | None) -> bytes | Response:
    """A gzip body (one member) inflated, never past ``limit`` bytes (413 beyond)."""
    too_large = _error(413, "too_large", f"the body inflates to more than {limit} bytes")
    inflater = zlib.decompressobj(wbits=16 + zlib.MAX_WBITS)  # gzip framing only
    try:
        # at most limit + 1 bytes come out; input left over means there was more
        out = inflater.decompress(body, 0 if limit is None else limit + 1)
        if limit is not None and (len(out) > limit or inflater.unconsumed_tail):
            return too_large
        out += inflater.flush()  # what zlib still holds: at most its window
    except zlib.error as exc:
        return _error(400, "bad_request", f"the body is not valid gzip: {exc}")
    if limit is not None and len(out) > limit:
        return too_large
    if not inflater.eof or inflater.unused_data:
        return _error(400, "bad_request", "the gzip body is cut short or has trailing bytes")
    return out


def _ingest(call: _Call) -> Response:
    _Query(call.query, ())
    refused = _content_type(call.header("content-type"))
    if refused is not None:
        return refused
    body = call.body
    encoding = call.header("content-encoding").strip().lower()
    if encoding == "gzip":
        inflated = _inflate(body, call.max_request_bytes)
        if isinstance(inflated, Response):
            return inflated
        body = inflated
    elif encoding not in ("", "identity"):
        return _unsupported(f"Content-Encoding {encoding!r} is not accepted; use gzip or none")
    try:
        result = call.backend.ingest(body, call.header("content-type"))
    except InputError as exc:
        return _error(400, "bad_input", str(exc))
    return _json_response(202, result)


_Handler = Callable[[_Call], Response]


@dataclass(frozen=True, slots=True)
class _Route:
    methods: tuple[str, ...]
    handler: _Handler
    #: reachable without the bearer token (liveness and readiness probes)
    public: bool = False


_GET = ("GET", "HEAD")
_ROUTES: dict[str, _Route] = {
    "/metrics": _Route(_GET, _metrics),
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


def token_required(
    path: str, headers: Mapping[str, str], token: str | None, *, public_metrics: bool = False
) -> bool:
    """Whether a request for ``path`` is refused without the token: never without a token
    set, nor for the probes; for ``/metrics`` with ``public_metrics`` only when a token is
    sent (a wrong one is refused, not served the public view)."""
    entry = _ROUTES.get(path)
    if token is None or entry is None or entry.public:
        return False
    if path == "/metrics" and public_metrics:
        return any(k.lower() == "authorization" for k in headers)
    return True


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
    public_metrics: bool = False,
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
        When set, every endpoint except ``/healthz`` and ``/readyz`` needs
        ``Authorization: Bearer <token>``.
    max_request_bytes:
        Bodies longer than this get 413 (the server checks ``Content-Length`` before
        reading; this repeats the check for callers that pass a body directly); a gzip body
        may inflate to this much.
    public_metrics:
        Serve ``/metrics`` without the token, minus the families holding item text
        (:func:`public_exposition`); one that sends the token gets them all.
    """
    entry = _ROUTES.get(path)
    if entry is None:
        return _error(404, "not_found", f"no endpoint {path!r}; see the API list in the docs")
    if path == "/v1/transactions" and not backend.ingest_enabled():
        return _error(
            404,
            "ingest_off",
            "HTTP ingest is off on this service: add 'http' to input.source (e.g. "
            "input.source: [file, http], or --source file,http) to accept POST /v1/transactions",
        )
    if method not in entry.methods:
        allow = ", ".join(entry.methods)
        return _error(
            405,
            "method_not_allowed",
            f"{method} is not allowed on {path}; use {allow}",
            Allow=allow,
        )
    required = token_required(path, headers, token, public_metrics=public_metrics)
    if required and not bearer_matches(headers, token or ""):
        return _error(
            401,
            "unauthorized",
            "send the API token as 'Authorization: Bearer <token>'",
            **{"WWW-Authenticate": 'Bearer realm="streamcount"'},
        )
    if max_request_bytes is not None and len(body) > max_request_bytes:
        return _error(413, "too_large", f"request body over {max_request_bytes} bytes")
    public = path == "/metrics" and token is not None and not required
    call = _Call(backend, query, headers, body, max_request_bytes, public)
    try:
        return entry.handler(call)
    except _BadParameter as exc:
        return _error(400, "bad_parameter", str(exc))
    except Exception:
        logger.exception("request %s %s failed in the backend", method, path)
        return _error(500, "internal_error", "the request failed; see the service log")
