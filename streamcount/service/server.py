"""Serving the API: :func:`start_server` puts :func:`~streamcount.service.routes.route` on an
:class:`~streamcount.service.httpd.HttpServer` (an asyncio front end reads each request in
full under a deadline, then a bounded pool of worker threads answers it), with the token (from
an environment variable or a file, re-read on SIGHUP), the per-address limit on failed
authentications, TLS and the security headers.

The pure request handling lives in :mod:`streamcount.service.routes`; its public names are
importable from here too.
"""

from __future__ import annotations

import dataclasses
import logging
import signal
import socket
import threading
from dataclasses import dataclass
from typing import TYPE_CHECKING
from urllib.parse import parse_qs, urlsplit

from streamcount import __version__
from streamcount.config.load import parse_listen
from streamcount.service.access import (
    SECURITY_HEADERS,
    AuthLimiter,
    TokenSource,
    forwarded_client,
    tls_context,
)
from streamcount.service.httpd import HttpServer, HttpStats, Limits, Request
from streamcount.service.routes import (
    INGEST_TYPES,
    MAX_LIMIT,
    PROBE_PATHS,
    RULE_SORTS,
    ApiBackend,
    Response,
    error_response,
    public_exposition,
    route,
    token_required,
)

if TYPE_CHECKING:
    from streamcount.config.settings import ServerConfig

__all__ = [
    "INGEST_TYPES",
    "MAX_LIMIT",
    "RULE_SORTS",
    "ApiBackend",
    "ApiServer",
    "Response",
    "ServerOptions",
    "install_reload_signal",
    "public_exposition",
    "route",
    "start_server",
]

logger = logging.getLogger(__name__)


@dataclass(frozen=True, slots=True)
class ServerOptions:
    """The ``server.*`` settings beyond what :func:`start_server` takes by name.

    Build it with :meth:`from_config`; every field is the config key of the same name.
    """

    #: named in messages only: the caller reads the variable and passes the token
    token_env: str | None = None
    token_file: str | None = None
    public_metrics: bool = False
    behind_proxy: bool = False
    tls_certificate: str | None = None
    tls_key: str | None = None
    backlog: int = 512
    max_connections: int = 512
    max_connections_per_client: int = 64
    keepalive_timeout_seconds: float = 5.0
    workers: int = 8
    auth_failures_per_minute: int = 10

    @classmethod
    def from_config(cls, server: ServerConfig) -> ServerOptions:
        """The options of a validated ``server`` section (each field from its key)."""
        return cls(**{f.name: getattr(server, f.name) for f in dataclasses.fields(cls)})


class _ApiHandler:
    """Runs on a worker thread: rate limit, then :func:`route`, then count what failed."""

    def __init__(
        self,
        backend: ApiBackend,
        tokens: TokenSource | None,
        options: ServerOptions,
        max_request_bytes: int,
        stats: HttpStats,
    ) -> None:
        self.backend = backend
        self.tokens = tokens
        self.options = options
        self.max_request_bytes = max_request_bytes
        self.stats = stats
        self.limiter = AuthLimiter(options.auth_failures_per_minute)
        self._lock = threading.Lock()

    def __call__(self, request: Request) -> Response:
        url = urlsplit(request.target)
        try:
            query = parse_qs(url.query, keep_blank_values=True, strict_parsing=False)
        except ValueError:
            return error_response(400, "bad_request", "the query string cannot be parsed")
        token = self.tokens.current if self.tokens is not None else None
        client = request.client
        if self.options.behind_proxy:
            client = forwarded_client(request.headers, client)
        required = token_required(
            url.path, request.headers, token, public_metrics=self.options.public_metrics
        )
        if required:
            wait = self.limiter.retry_after(client)
            if wait is not None:
                with self._lock:
                    self.stats.refused["rate_limited"] += 1
                return error_response(
                    429,
                    "too_many_requests",
                    "too many failed authentications from your address; wait and send the "
                    "right token",
                    {"Retry-After": str(wait)},
                )
        response = route(
            request.method,
            url.path,
            query,
            request.headers,
            request.body,
            self.backend,
            token=token,
            max_request_bytes=self.max_request_bytes,
            public_metrics=self.options.public_metrics,
        )
        if response.status == 401:
            self.limiter.failed(client)
            with self._lock:
                self.stats.auth_failures += 1
            logger.debug("failed authentication from %s for %s", client, url.path)
        return response


class ApiServer(HttpServer):
    """The API on an :class:`~streamcount.service.httpd.HttpServer`, with the token's reload.

    Made by :func:`start_server`; besides ``server_address``, ``server_port``, ``shutdown()``
    and ``server_close()``, it offers :meth:`reload_token`, :meth:`reload_tls`,
    :meth:`request_reload` (for a signal handler) and :meth:`stats` (for the metrics).
    """

    def __init__(
        self,
        sock: socket.socket,
        backend: ApiBackend,
        *,
        tokens: TokenSource | None,
        options: ServerOptions,
        limits: Limits,
    ) -> None:
        self.options = options
        self.tokens = tokens
        tls = None
        if options.tls_certificate and options.tls_key:
            tls = tls_context(options.tls_certificate, options.tls_key)
        stats = HttpStats()
        super().__init__(
            sock,
            _ApiHandler(backend, tokens, options, limits.max_request_bytes, stats),
            error=error_response,
            limits=limits,
            fast_paths=PROBE_PATHS,
            default_headers=SECURITY_HEADERS,
            tls=tls,
            server_header=f"streamcount/{__version__}",
        )
        self.stats_counters = stats

    def reload_token(self) -> bool:
        """Read the token file again (rotation without a restart); whether a new token is in
        force. With the token from an environment variable this only logs that it cannot
        change. Failures are logged and leave the old token in force."""
        if self.tokens is None:
            logger.info("token reload asked, but no API token is configured")
            return False
        return self.tokens.reload()

    def reload_tls(self) -> bool:
        """Load the certificate and key again (renewed certificates); new connections use
        them. A failure is logged and leaves the old ones in force."""
        certificate, key = self.options.tls_certificate, self.options.tls_key
        if not (certificate and key):
            return False
        try:
            self.tls = tls_context(certificate, key)
        except Exception as exc:
            logger.error("TLS certificate not reloaded, the old one stays in force: %s", exc)
            return False
        logger.info("TLS certificate reloaded from %s", certificate)
        return True

    def request_reload(self) -> None:
        """Reload the token and the certificate on the server's own thread (signal-safe)."""

        def reload() -> None:
            self.reload_token()
            self.reload_tls()

        self.call_soon(reload)


def install_reload_signal(server: ApiServer) -> bool:
    """Make SIGHUP reload the API token (``server.token_file``) and the TLS certificate.

    Call it from the main thread after :func:`start_server`; returns False (and does nothing)
    elsewhere, or where there is no SIGHUP.
    """
    hup = getattr(signal, "SIGHUP", None)
    if hup is None or threading.current_thread() is not threading.main_thread():
        return False
    signal.signal(hup, lambda *_: server.request_reload())
    return True


def _bind(host: str, port: int) -> socket.socket:
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, port))
    except BaseException:
        sock.close()
        raise
    sock.setblocking(False)
    return sock


def start_server(
    listen: str,
    backend: ApiBackend,
    *,
    token: str | None,
    max_request_bytes: int,
    request_timeout_seconds: float,
    options: ServerOptions | None = None,
) -> tuple[ApiServer, threading.Thread]:
    """Serve :func:`route` on ``listen`` (``host:port``; port 0 picks a free one).

    Parameters
    ----------
    listen:
        ``host:port`` (``[v6addr]:port`` for IPv6).
    backend:
        Where the answers come from.
    token:
        The API token, or ``None``: then ``options.token_file`` (if set) is read instead.
    max_request_bytes:
        Largest body (413 before reading one longer).
    request_timeout_seconds:
        Deadline for reading a whole request (headers and body) and for writing its answer.
    options:
        The other ``server.*`` settings (:meth:`ServerOptions.from_config`).

    Returns the server and its (already started) daemon thread; the bound port is
    ``server.server_port``. Stop with ``server.shutdown()`` then ``server.server_close()``.

    Raises
    ------
    ValueError
        For a malformed ``listen``, an empty token, or a token given both ways.
    InputError
        When the token file cannot be read or is empty.
    ConfigError
        When the TLS certificate or key cannot be loaded.
    OSError
        When the address cannot be bound (in use, not local).
    """
    options = options or ServerOptions()
    host, port = parse_listen(listen)
    if token == "":
        raise ValueError("the API token is empty; set a token or run without one")
    if token is not None and options.token_file:
        raise ValueError("give the API token or server.token_file, not both")
    tokens = None
    if token is not None:
        tokens = TokenSource(token=token, env=options.token_env)
    elif options.token_file:
        tokens = TokenSource(path=options.token_file)
    limits = Limits(
        request_timeout_seconds=request_timeout_seconds,
        keepalive_timeout_seconds=options.keepalive_timeout_seconds,
        max_request_bytes=max_request_bytes,
        max_connections=options.max_connections,
        # behind a proxy every connection comes from the proxy: its own limits apply
        max_connections_per_client=0
        if options.behind_proxy
        else options.max_connections_per_client,
        backlog=options.backlog,
        workers=options.workers,
        body_budget_bytes=max(64 << 20, 4 * max_request_bytes),
    )
    sock = _bind(host, port)
    try:
        server = ApiServer(sock, backend, tokens=tokens, options=options, limits=limits)
        thread = server.start()
    except BaseException:
        sock.close()
        raise
    scheme = "https" if server.tls is not None else "http"
    logger.info("HTTP API listening on %s://%s:%d", scheme, host, server.server_port)
    return server, thread
