"""A worker's pane summaries to JetStream: nats-py on a thread of its own, in order, durably.

:class:`SummaryPublisher` takes payloads (:func:`streamcount.engine.wire.encode_pane`) from
the service loop's thread and publishes them one pane after the other: each payload is cut
into chunks no larger than the server's ``max_payload`` (``cluster.max_message_bytes`` when
smaller), every chunk with a ``Nats-Msg-Id`` header::

    <worker>:<pane index>:<chunk index>:<first 16 hex digits of the payload's SHA-256>

and the next pane goes only once the stream has acknowledged every chunk of this one. So the
stream holds each worker's panes in index order (what the merger's completeness rule relies
on), a republish of the same summary (a retry, or the same pane counted again after a restart)
is dropped by the server within its duplicate window, and a summary that differs (counted
differently after a restart) is a message of its own, which the merger drops as a duplicate.

:meth:`SummaryPublisher.flush` waits until every payload handed over is acknowledged: the
worker calls it before each checkpoint, so input is acknowledged only once the panes holding
it are durable on the bus. Failures (the server away, the stream missing) are retried with a
backoff, forever; payloads wait in memory meanwhile (one per closed pane).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import threading
from collections import deque
from typing import Any

from streamcount.config.settings import NatsConfig
from streamcount.engine.wire import chunks
from streamcount.loops import close_loop

__all__ = ["HEADER_ROOM", "SummaryPublisher", "message_id"]

logger = logging.getLogger(__name__)

#: bytes of a message kept for its headers (the Nats-Msg-Id) below the largest message
HEADER_ROOM = 512
_PUBLISH_TIMEOUT_SECONDS = 10.0
#: limits of a summaries stream created by a worker (README: set your own with your tools)
_STREAM_MAX_AGE_SECONDS = 7 * 86400.0
_STREAM_DUPLICATE_WINDOW_SECONDS = 3600.0


def message_id(worker: str, pane: int, chunk: int, payload: bytes) -> str:
    """The ``Nats-Msg-Id`` of one chunk of a payload (module notes).

    >>> message_id("w1", 2890, 0, bytes(32) + b"x" * 32)
    'w1:2890:0:7878787878787878'
    """
    return f"{worker}:{pane}:{chunk}:{payload[-32:].hex()[:16]}"


class SummaryPublisher:
    """Publishes pane summaries to ``subject`` of ``stream``, in order (module notes).

    Parameters
    ----------
    nats:
        Connection settings (``input.nats``: servers, credentials, timeouts, backoff).
    stream, subject, wildcard:
        The summaries stream, this worker's subject, and the subjects the stream is created
        with when missing (every worker's).
    worker:
        This worker's name (in every message id).
    token:
        The token read from ``input.nats.token_env``, or ``None``.
    max_message_bytes:
        Largest message wanted (``None``: the server's ``max_payload``).
    """

    def __init__(
        self,
        nats: NatsConfig,
        *,
        stream: str,
        subject: str,
        wildcard: str,
        worker: str,
        token: str | None = None,
        max_message_bytes: int | None = None,
    ) -> None:
        self.nats = nats
        self.stream = stream
        self.subject = subject
        self.wildcard = wildcard
        self.worker = worker
        self.token = token
        self.max_message_bytes = max_message_bytes
        self.connected = False
        #: payloads acknowledged, and chunks the server had already (dropped as duplicates)
        self.published = 0
        self.duplicates = 0
        self.last_error: str | None = None
        self._queue: deque[tuple[int, bytes]] = deque()
        self._cond = threading.Condition()
        self._pending = 0
        self._loop = asyncio.new_event_loop()
        self._wake: asyncio.Event | None = None
        self._stop: asyncio.Event | None = None
        self._thread = threading.Thread(
            target=self._run, name=f"streamcount-publish-{worker}", daemon=True
        )
        self._started = False

    # -- called from the service loop's thread -----------------------------------------------

    def start(self) -> None:
        """Start the publishing thread (once)."""
        if not self._started:
            self._started = True
            self._thread.start()

    def submit(self, pane: int, payload: bytes) -> None:
        """Queue one pane's payload; it is published after every one queued before."""
        with self._cond:
            self._pending += 1
            self._queue.append((pane, payload))
        self._call(lambda: self._wake.set() if self._wake is not None else None)

    @property
    def pending(self) -> int:
        """Payloads handed over and not yet acknowledged by the stream."""
        with self._cond:
            return self._pending

    def flush(self, timeout: float) -> bool:
        """Wait until every payload handed over is acknowledged; False after ``timeout``."""
        with self._cond:
            return self._cond.wait_for(lambda: self._pending == 0, timeout)

    def close(self, timeout: float = 5.0) -> None:
        """Stop publishing (what is still queued is not sent) and end the thread."""

        def stop() -> None:
            if self._stop is not None and self._wake is not None:
                self._stop.set()
                self._wake.set()

        self._call(stop)
        if self._started:
            self._thread.join(timeout)

    def _call(self, fn: Any) -> None:
        with contextlib.suppress(RuntimeError):  # the loop has ended
            self._loop.call_soon_threadsafe(fn)

    # -- the publishing thread ---------------------------------------------------------------

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)
        try:
            self._loop.run_until_complete(self._main())
        except Exception:  # a bug here must not pass unseen: flush() then never succeeds
            logger.exception("cluster: the summary publisher failed")
        finally:
            self.connected = False
            close_loop(self._loop)

    async def _main(self) -> None:
        import nats.errors

        self._wake = asyncio.Event()
        self._stop = asyncio.Event()
        wait = self.nats.reconnect_wait_seconds
        while not self._stop.is_set():
            nc = None
            try:
                nc = await self._connect()
                js = nc.jetstream()
                await self._ensure_stream(js)
                self.connected = True
                wait = self.nats.reconnect_wait_seconds
                await self._publish_queue(nc, js)
            except (OSError, TimeoutError, nats.errors.Error) as exc:
                self.last_error = f"{type(exc).__name__}: {exc}"
                logger.warning(
                    "cluster: publishing pane summaries to %s failed (%s); %d waiting, trying "
                    "again in %.1f s",
                    self.subject,
                    self.last_error,
                    self.pending,
                    wait,
                )
            self.connected = False
            if nc is not None:
                with contextlib.suppress(Exception):
                    await nc.close()
            if not self._stop.is_set():
                with contextlib.suppress(TimeoutError):
                    await asyncio.wait_for(self._stop.wait(), wait)
                wait = min(wait * 2, self.nats.max_reconnect_wait_seconds)

    async def _connect(self) -> Any:
        import nats

        async def quiet(exc: Exception) -> None:
            logger.debug("cluster: NATS client error: %s", exc)

        options: dict[str, Any] = {
            "servers": list(self.nats.servers),
            "name": f"streamcount-{self.worker}",
            "allow_reconnect": False,  # reconnection is ours, with the queue kept
            "max_reconnect_attempts": 1,
            "reconnect_time_wait": 0.05,
            "connect_timeout": self.nats.connect_timeout_seconds,
            "ping_interval": 5,
            "max_outstanding_pings": 3,
            "error_cb": quiet,
        }
        if self.nats.creds_file:
            options["user_credentials"] = self.nats.creds_file
        if self.token:
            options["token"] = self.token
        nc = nats.NATS()
        try:
            await nc.connect(**options)
        except BaseException:
            # a handshake cut short (a server restarting) leaves the socket open: close it
            with contextlib.suppress(Exception):
                await nc.close()
            raise
        return nc

    async def _ensure_stream(self, js: Any) -> None:
        import nats.js.errors
        from nats.js.api import RetentionPolicy, StorageType, StreamConfig

        try:
            await js.stream_info(self.stream)
            return
        except nats.js.errors.NotFoundError:
            pass
        config = StreamConfig(
            name=self.stream,
            subjects=[self.wildcard],
            storage=StorageType.FILE,
            retention=RetentionPolicy.LIMITS,
            max_age=_STREAM_MAX_AGE_SECONDS,
            duplicate_window=_STREAM_DUPLICATE_WINDOW_SECONDS,
        )
        try:
            await js.add_stream(config)
            logger.info("cluster: created stream %s (%s, file storage)", self.stream, self.wildcard)
        except nats.js.errors.BadRequestError as exc:  # created meanwhile by another worker
            logger.debug("cluster: creating stream %s: %s", self.stream, exc)

    async def _publish_queue(self, nc: Any, js: Any) -> None:
        assert self._wake is not None and self._stop is not None
        limit = nc.max_payload or 1 << 20
        if self.max_message_bytes is not None:
            limit = min(limit, self.max_message_bytes)
        room = limit - HEADER_ROOM
        while not self._stop.is_set():
            if not nc.is_connected:
                raise OSError("the connection to NATS was lost")
            if not self._queue:
                self._wake.clear()
                if not self._queue:
                    with contextlib.suppress(TimeoutError):
                        await asyncio.wait_for(self._wake.wait(), 1.0)
                continue
            pane, payload = self._queue[0]
            parts = chunks(payload, room)
            acks = await asyncio.gather(
                *(
                    js.publish(
                        self.subject,
                        part,
                        timeout=_PUBLISH_TIMEOUT_SECONDS,
                        stream=self.stream,
                        headers={"Nats-Msg-Id": message_id(self.worker, pane, i, payload)},
                    )
                    for i, part in enumerate(parts)
                )
            )
            self.duplicates += sum(1 for ack in acks if getattr(ack, "duplicate", False))
            self._queue.popleft()
            with self._cond:
                self._pending -= 1
                self.published += 1
                self._cond.notify_all()
            self.last_error = None
