"""A small HTTP/1.1 server that slow or numerous clients cannot stall.

An asyncio event loop on one thread (the *front end*) accepts connections and reads each
request in full, headers and body, under one deadline; only then does a bounded pool of worker
threads run the handler, which may block briefly (an ingest waits for the counting loop). So a
client sending a byte a second holds a socket and a few hundred bytes of buffer, never a
worker. Probes and scrapes (the ``fast_paths``) have their own small pool, so they are answered
while every API worker is busy.

Limits (:class:`Limits`):

* a **deadline** on the whole request: from the first byte (from the accept, for a
  connection's first request) to the last byte of the body, ``request_timeout_seconds``;
  over it, 408 and the connection is closed; writing the answer has the same bound;
* an **idle keep-alive timeout** between requests of one connection;
* a **cap on open connections**, in all and per client address; a connection over a cap is
  answered 503 with ``Retry-After`` at once (with TLS it is closed before the handshake), and
  is not counted against the caps while it lingers;
* a **listen backlog** of ``backlog``, so a burst of connections waits in the kernel instead
  of being reset;
* body size: ``Content-Length`` over ``max_request_bytes`` is answered 413 before any byte of
  the body is read; chunked bodies get 411; bodies held in memory at once are bounded in all
  (503 beyond the budget).

After an error answer the connection is closed the lingering way (the write side first, then
whatever the client still sends is read and dropped for a moment), so the client reads the
answer instead of a reset.

The message syntax (reading a request's head, encoding an answer, :class:`Request` and
:class:`Answer`) is :mod:`streamcount.service.http1`; ``Request`` and ``Answer`` are
re-exported here.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import socket
import ssl
import threading
import time
from collections import Counter
from collections.abc import Callable, Mapping
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from email.utils import formatdate

from streamcount.loops import close_loop
from streamcount.service.access import client_key
from streamcount.service.http1 import (
    MAX_LINE,
    Answer,
    Refusal,
    Request,
    content_length,
    encode_answer,
    keep_alive,
    read_head,
)

__all__ = ["Answer", "HttpServer", "HttpStats", "Limits", "Request"]

logger = logging.getLogger(__name__)

_LINGER_SECONDS = 1.0
_LINGER_BYTES = 1 << 20


@dataclass(frozen=True, slots=True)
class Limits:
    """What one connection and the server as a whole may hold (see the module docstring)."""

    request_timeout_seconds: float = 10.0
    keepalive_timeout_seconds: float = 5.0
    max_request_bytes: int = 1 << 20
    max_connections: int = 512
    #: 0: no per-address cap (behind a reverse proxy every connection has the proxy's address)
    max_connections_per_client: int = 64
    backlog: int = 512
    workers: int = 8
    probe_workers: int = 2
    #: seconds a client over a connection cap is told to wait
    retry_after_seconds: int = 1
    #: request bodies held in memory at once, over all connections
    body_budget_bytes: int = 64 << 20


@dataclass(slots=True)
class HttpStats:
    """Running totals of the front end (read at scrape time; plain ints, one writer each)."""

    #: connections open now (not counting refused ones still lingering)
    open_connections: int = 0
    #: refused answers by reason: max_connections, max_connections_per_client, timeout, busy,
    #: rate_limited (the last one counted by the API handler)
    refused: Counter[str] = field(default_factory=Counter)
    #: requests answered 401 (no token, or a wrong one)
    auth_failures: int = 0


class _Connection:
    __slots__ = ("busy", "key", "task", "writer")

    def __init__(self, key: str, writer: asyncio.StreamWriter) -> None:
        self.key = key
        self.writer = writer
        self.busy = False  # a handler is working on one of its requests
        self.task: asyncio.Task[None] | None = asyncio.current_task()


ErrorFactory = Callable[[int, str, str, Mapping[str, str]], Answer]


class HttpServer:
    """Serve ``handler`` on an already bound, not yet listening socket.

    Parameters
    ----------
    sock:
        A bound TCP socket (IPv4 or IPv6); :meth:`start` makes it listen with the backlog.
    handler:
        Turns a :class:`Request` into an :class:`Answer`; runs on a worker thread.
    error:
        Builds the error answers the front end gives itself (408, 411, 413, 503...), so they
        look like the handler's own: ``error(status, code, message, extra_headers)``.
    limits:
        See :class:`Limits`.
    fast_paths:
        Paths served by the probe pool (``/metrics``, ``/healthz``, ``/readyz``).
    default_headers:
        Added to every answer that does not set them itself (security headers).
    tls:
        Serve HTTPS with this context (the handshake runs inside the first request's deadline).
    server_header:
        The ``Server`` header.
    """

    def __init__(
        self,
        sock: socket.socket,
        handler: Callable[[Request], Answer],
        *,
        error: ErrorFactory,
        limits: Limits,
        fast_paths: frozenset[str] = frozenset(),
        default_headers: Mapping[str, str] | None = None,
        tls: ssl.SSLContext | None = None,
        server_header: str = "streamcount",
    ) -> None:
        self._sock = sock
        self._handler = handler
        self._error = error
        self.limits = limits
        self._fast = fast_paths
        self._defaults = dict(default_headers or {})
        self._default_names = {k.lower() for k in self._defaults}
        self.tls = tls
        self._server_header = server_header
        host, port = sock.getsockname()[:2]
        self.server_address: tuple[str, int] = (str(host), int(port))
        self.server_port = int(self.server_address[1])
        self.stats_counters = HttpStats()
        self._per_client: Counter[str] = Counter()
        self._connections: set[_Connection] = set()
        self._lingering = 0
        self._body_bytes = 0
        self._closing = False
        self._loop = asyncio.new_event_loop()
        self._server: asyncio.Server | None = None
        self._stopped: asyncio.Event | None = None
        self._ready = threading.Event()
        self._failed: BaseException | None = None
        self._api_pool = ThreadPoolExecutor(limits.workers, thread_name_prefix="streamcount-api")
        self._probe_pool = ThreadPoolExecutor(
            limits.probe_workers, thread_name_prefix="streamcount-probe"
        )
        self.thread = threading.Thread(
            target=self._run, name=f"streamcount-http-{self.server_port}", daemon=True
        )
        self._date = ("", 0)

    # -- life cycle -------------------------------------------------------------------------

    def start(self) -> threading.Thread:
        """Listen and serve on a daemon thread; returns once connections are accepted."""
        self.thread.start()
        self._ready.wait()
        if self._failed is not None:
            raise self._failed
        return self.thread

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)
        try:
            self._loop.run_until_complete(self._main())
        except BaseException as exc:  # pragma: no cover - reported to start()
            self._failed = exc
            self._ready.set()
        finally:
            close_loop(self._loop)

    async def _main(self) -> None:
        self._stopped = asyncio.Event()
        try:
            self._server = await asyncio.start_server(
                self._accept,
                sock=self._sock,
                backlog=self.limits.backlog,
                # readuntil keeps at most this many bytes before the newline; one byte of the
                # request line is read apart (the keep-alive wait) and one is the newline
                limit=MAX_LINE - 2,
            )
        except BaseException as exc:
            self._failed = exc
            self._ready.set()
            return
        self._ready.set()
        await self._stopped.wait()
        # let answers already being worked on go out (an ingest waiting for the loop), then
        # drop whatever is left
        grace = time.monotonic() + self.limits.request_timeout_seconds + 1.0
        while self._connections and time.monotonic() < grace:
            await asyncio.sleep(0.02)
        tasks = []
        for conn in list(self._connections):
            conn.writer.transport.abort()
            if conn.task is not None:
                conn.task.cancel()
                tasks.append(conn.task)
        if tasks:
            await asyncio.wait(tasks, timeout=1.0)
        self._api_pool.shutdown(wait=False, cancel_futures=True)
        self._probe_pool.shutdown(wait=False, cancel_futures=True)

    def shutdown(self) -> None:
        """Stop accepting; close idle connections; answers being worked on still go out.

        Returns once no new connection is accepted. Safe to call twice, from any thread.
        """
        if self._closing or not self.thread.is_alive():
            self._closing = True
            return
        if threading.current_thread() is self.thread:
            self._begin_close()
            return
        done = threading.Event()

        def close() -> None:
            self._begin_close()
            done.set()

        try:
            self._loop.call_soon_threadsafe(close)
        except RuntimeError:  # the loop has already stopped
            return
        done.wait(5.0)

    def _begin_close(self) -> None:
        self._closing = True
        if self._server is not None:
            self._server.close()
        for conn in list(self._connections):
            if not conn.busy:
                conn.writer.transport.abort()
        if self._stopped is not None:
            self._stopped.set()

    def server_close(self) -> None:
        """Release the listening socket (after :meth:`shutdown`; calls it if needed)."""
        self.shutdown()
        with contextlib.suppress(OSError):
            self._sock.close()

    def call_soon(self, callback: Callable[[], object]) -> None:
        """Run ``callback`` on the front end's thread (safe from a signal handler)."""
        with contextlib.suppress(RuntimeError):
            self._loop.call_soon_threadsafe(callback)

    def stats(self) -> HttpStats:
        """The running totals (the live object; read its fields)."""
        self.stats_counters.open_connections = len(self._connections)
        return self.stats_counters

    # -- connections ------------------------------------------------------------------------

    async def _accept(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        peer = writer.get_extra_info("peername")
        address = str(peer[0]) if peer else "unknown"
        key = client_key(address)
        limits = self.limits
        over = None
        if self._closing:
            writer.transport.abort()
            return
        if len(self._connections) >= limits.max_connections:
            over = "max_connections"
        elif limits.max_connections_per_client and (
            self._per_client[key] >= limits.max_connections_per_client
        ):
            over = "max_connections_per_client"
        if over is not None:
            self.stats_counters.refused[over] += 1
            await self._refuse_connection(reader, writer, over)
            return
        conn = _Connection(key, writer)
        self._connections.add(conn)
        self._per_client[key] += 1
        try:
            await self._serve(conn, reader, writer, address)
        except (ConnectionError, asyncio.IncompleteReadError, ssl.SSLError, TimeoutError):
            pass
        except asyncio.CancelledError:
            pass
        except Exception:  # a bug here must not end the front end
            logger.exception("HTTP connection from %s failed", address)
        finally:
            self._connections.discard(conn)
            self._per_client[key] -= 1
            if self._per_client[key] <= 0:
                del self._per_client[key]
            if not writer.transport.is_closing():
                writer.close()

    async def _refuse_connection(
        self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter, reason: str
    ) -> None:
        if self.tls is not None or self._lingering >= self.limits.max_connections:
            writer.transport.abort()  # no answer without a handshake; or too many lingering
            return
        what = (
            "too many connections from your address"
            if reason == "max_connections_per_client"
            else "the server has as many connections as it takes"
        )
        answer = self._error(
            503,
            "busy",
            f"{what}; try again later",
            {"Retry-After": str(self.limits.retry_after_seconds)},
        )
        writer.write(self._encode(answer, head_only=False, close=True))
        await self._linger(reader, writer)

    async def _linger(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        """Send what is buffered, close the write side, read and drop what still comes."""
        self._lingering += 1
        try:
            async with asyncio.timeout(_LINGER_SECONDS):
                if writer.can_write_eof():
                    writer.write_eof()
                    left = _LINGER_BYTES
                    while left > 0 and (chunk := await reader.read(65536)):
                        left -= len(chunk)
                else:
                    await writer.drain()
        except (TimeoutError, ConnectionError, ssl.SSLError, OSError):
            pass
        finally:
            self._lingering -= 1
            writer.transport.abort()

    async def _serve(
        self,
        conn: _Connection,
        reader: asyncio.StreamReader,
        writer: asyncio.StreamWriter,
        address: str,
    ) -> None:
        loop = asyncio.get_running_loop()
        limits = self.limits
        deadline = loop.time() + limits.request_timeout_seconds
        if self.tls is not None:
            async with asyncio.timeout_at(deadline):
                await writer.start_tls(self.tls)
        first = True
        while not self._closing:
            # wait for the first byte of the next request: the deadline for the first one, the
            # idle keep-alive timeout for the others; a silent connection is closed silently
            idle_until = deadline if first else loop.time() + limits.keepalive_timeout_seconds
            try:
                async with asyncio.timeout_at(idle_until):
                    start = await reader.readexactly(1)
                    while start in (b"\r", b"\n"):  # empty lines before a request are ignored
                        start = await reader.readexactly(1)
            except (TimeoutError, asyncio.IncompleteReadError):
                return
            if not first:
                deadline = loop.time() + limits.request_timeout_seconds
            first = False
            budget = 0
            try:
                async with asyncio.timeout_at(deadline):
                    request, budget = await self._read_request(reader, writer, start, address)
            except TimeoutError:
                self.stats_counters.refused["timeout"] += 1
                await self._fail(
                    reader, writer, Refusal(408, "timeout", "the request did not arrive in time")
                )
                return
            except Refusal as refusal:
                if refusal.status == 503:
                    self.stats_counters.refused["busy"] += 1
                await self._fail(reader, writer, refusal)
                return
            try:
                conn.busy = True
                answer = await self._dispatch(request)
            finally:
                self._body_bytes -= budget
                conn.busy = False
            close = self._closing or not keep_alive(request)
            data = self._encode(answer, head_only=request.method == "HEAD", close=close)
            writer.write(data)
            try:
                async with asyncio.timeout(limits.request_timeout_seconds):
                    await writer.drain()
            except TimeoutError:
                return  # a client that does not read its answer
            if logger.isEnabledFor(logging.DEBUG):  # the quiet access log
                logger.debug('%s "%s %s" %d', address, request.method, request.path, answer.status)
            if close:
                return

    async def _fail(
        self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter, refusal: Refusal
    ) -> None:
        answer = self._error(refusal.status, refusal.code, refusal.message, {})
        writer.write(self._encode(answer, head_only=False, close=True))
        await self._linger(reader, writer)

    # -- one request ------------------------------------------------------------------------

    async def _read_request(
        self,
        reader: asyncio.StreamReader,
        writer: asyncio.StreamWriter,
        start: bytes,
        address: str,
    ) -> tuple[Request, int]:
        head = await read_head(reader, start)
        length = content_length(head.headers)
        limit = self.limits.max_request_bytes
        if length > limit:
            raise Refusal(
                413,
                "too_large",
                f"request body of {length} bytes is over the limit of {limit} "
                "(server.max_request_bytes)",
            )
        if self._body_bytes + length > self.limits.body_budget_bytes:
            raise Refusal(503, "busy", "too many request bodies in flight; try again later")
        self._body_bytes += length
        try:
            if length and head.headers.get("expect", "").lower() == "100-continue":
                writer.write(b"HTTP/1.1 100 Continue\r\n\r\n")
            body = await reader.readexactly(length) if length else b""
        except BaseException:
            self._body_bytes -= length
            raise
        request = Request(head.method, head.target, head.version, head.headers, body, address)
        return request, length

    async def _dispatch(self, request: Request) -> Answer:
        pool = self._probe_pool if request.path in self._fast else self._api_pool
        loop = asyncio.get_running_loop()
        # an ingest may wait request_timeout_seconds for the loop; waiting for a worker as well
        wait = 2 * self.limits.request_timeout_seconds + 1.0
        try:
            async with asyncio.timeout(wait):
                return await loop.run_in_executor(pool, self._call, request)
        except TimeoutError:
            self.stats_counters.refused["busy"] += 1
            return self._error(
                503,
                "busy",
                "every worker is busy; try again later",
                {"Retry-After": str(self.limits.retry_after_seconds)},
            )

    def _call(self, request: Request) -> Answer:
        try:
            return self._handler(request)
        except Exception:
            logger.exception("request %s %s failed", request.method, request.path)
            return self._error(500, "internal_error", "the request failed; see the service log", {})

    # -- answers ----------------------------------------------------------------------------

    def _http_date(self) -> str:
        now = int(time.time())
        if self._date[1] != now:
            self._date = (formatdate(now, usegmt=True), now)
        return self._date[0]

    def _encode(self, answer: Answer, *, head_only: bool, close: bool) -> bytes:
        return encode_answer(
            answer,
            server=self._server_header,
            date=self._http_date(),
            defaults=self._defaults,
            head_only=head_only,
            close=close,
        )
