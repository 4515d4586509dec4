"""The JetStream side of the ``nats`` source: nats-py's asyncio client on a thread of its own.

The service loop is synchronous and nats-py is asyncio, so :class:`PullClient` runs an event
loop on one daemon thread. That thread connects, (re)creates the durable pull consumer at the
sequence to resume from, and keeps pull requests outstanding; every delivered message lands
in a bounded :class:`collections.deque` (:attr:`PullClient.buffer`) that the loop's thread
empties through :class:`~streamcount.intake.sources.nats.JetStreamSource`. Acknowledgements
go the other way through :meth:`PullClient.send`.

Pulling
    Pull requests (``$JS.API.CONSUMER.MSG.NEXT``, the documented JetStream pull protocol) are
    published with a reply subject of our own and their deliveries handled by a subscription
    callback: nats-py's ``fetch()`` awaits every message separately and reached about a fifth
    of the speed here. Requests ask for ``pull_batch`` messages and are renewed when half are
    in, while the buffer plus what is asked for stays below ``max_buffered_messages`` (that
    bounds memory when counting is slower than the bus).

Resuming
    The checkpoint is the truth, not the consumer's acknowledgement floor: on every connect the
    consumer is deleted and created again with ``deliver_policy: by_start_sequence`` at the
    sequence after the last message received. The same happens mid-connection when the
    consumer's delivery sequence skips (a delivery was lost) or the server says the consumer
    was deleted, so messages always arrive in stream order with none missing, and a message at
    or below the last one received (a redelivery) is dropped. This needs a stream with
    ``limits`` retention, where acknowledgements never delete messages.

Gaps
    When the stream no longer holds the message after the resume point (retention removed it
    while nobody read), the client stops with :class:`StreamGapError`, unless ``accept_gap``:
    then the gap is logged, counted and reading resumes at the stream's first message.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import threading
import time
from collections import deque
from collections.abc import Iterable
from typing import Any

from streamcount.config.settings import NatsConfig
from streamcount.errors import InputError, StreamcountError
from streamcount.loops import close_loop

__all__ = ["Entry", "PullClient", "StreamGapError"]

logger = logging.getLogger(__name__)

#: one buffered delivery: ``(stream sequence, ack reply subject, payload)``; a reply of
#: ``None`` is a marker: everything up to that sequence is accounted for (a resume point)
Entry = tuple[int, str | None, bytes]

_EXPIRES_SECONDS = 5.0  # a pull request lingers this long on an idle stream
_INFO_SECONDS = 5.0  # consumer info (lag, acknowledgement backlog) refreshed this often
_PING_SECONDS = 5  # a silent connection is declared dead after 3 unanswered pings


class StreamGapError(InputError):
    """The stream no longer holds the messages after the resume point (retention removed
    them while streamcount was not reading), so counting them is impossible."""


class _Fatal(Exception):
    """Stops the client thread for good, carrying the error the loop's thread will raise."""

    def __init__(self, error: StreamcountError) -> None:
        super().__init__(str(error))
        self.error = error


class _NotYet(Exception):
    """The server is up but not ready for us (the stream does not exist yet): try later."""


def _retention(info: Any) -> str:
    value = getattr(info.config, "retention", None)
    return str(getattr(value, "value", value) or "limits")


class PullClient:
    """nats-py on its own thread, filling :attr:`buffer` from a durable pull consumer.

    Parameters
    ----------
    config:
        The ``input.nats`` settings.
    resume_after:
        Stream sequence of the last message already counted (from the checkpoint), or ``None``
        to start where ``start_at`` says.
    start_at:
        ``beginning`` (the stream's first message) or ``end`` (only messages published after
        the consumer is created); used only when ``resume_after`` is ``None``.
    ack_wait_seconds:
        The consumer's ack wait (already derived from the checkpoint interval).
    token:
        The token read from ``token_env``, or ``None``.
    name:
        The source's name, for the thread and the log.

    Attributes
    ----------
    buffer:
        Deliveries in stream order (:data:`Entry`), appended by the client thread and taken
        by the loop's thread.
    connected:
        The connection is up and the consumer set up.
    fatal:
        The error that stopped the client for good (the loop's thread raises it).
    reconnects, redeliveries, gap_messages, rewinds:
        Running totals: connections made after the first, messages the server delivered
        again, messages lost to accepted gaps, consumer re-creations within a connection.
    server_pending:
        Messages the server holds for the consumer and has not delivered yet.
    ack_pending:
        Messages delivered and not yet acknowledged (from the last consumer info).
    gap:
        The last gap found (``after``, ``first_available``, ``messages``, ``accepted``).
    rewound_through:
        Every sequence up to this one is below a consumer (re)creation point: an
        acknowledgement of it would go to a consumer that no longer exists.
    """

    def __init__(
        self,
        config: NatsConfig,
        *,
        resume_after: int | None,
        start_at: str,
        ack_wait_seconds: float,
        token: str | None = None,
        name: str = "nats",
    ) -> None:
        self.config = config
        self.ack_wait_seconds = ack_wait_seconds
        self.start_at = start_at
        self.token = token
        self.name = name
        self.buffer: deque[Entry] = deque()
        self.arrived = threading.Event()
        self.reader_waiting = False
        self.ready = threading.Event()
        self.connected = False
        self.fatal: StreamcountError | None = None
        self.reconnects = 0
        self.redeliveries = 0
        self.gap_messages = 0
        self.rewinds = 0
        self.ack_pending = 0
        self._info_pending = 0
        self._last_reply: str | None = None
        self._half = config.pull_batch // 2
        self.gap: dict[str, Any] | None = None
        self.rewound_through = 0
        self.server: str | None = None
        self._resume_after = resume_after
        self._received = -1  # last sequence buffered; -1 until the first set-up
        self._next_dseq = 1
        self._outstanding = 0
        self._incarnation = 0
        self._rewind = False
        self._activity = time.monotonic()
        self._activity_mark = 0  # _next_dseq when _activity was last moved
        self._stalled_logged = False
        self._nc: Any = None
        self._tasks: set[asyncio.Task[None]] = set()
        self._lost = asyncio.Event()
        self._sub: Any = None
        self._loop = asyncio.new_event_loop()
        self._room: asyncio.Event | None = None
        self._stop: asyncio.Event | None = None
        self._thread = threading.Thread(target=self._run, name=f"streamcount-{name}", daemon=True)
        self._thread.start()

    # -- called from the loop's thread -------------------------------------------------------

    def wake(self) -> None:
        """The buffer has room again: let the client ask for more."""
        self._call(lambda: self._room.set() if self._room is not None else None)

    def send(self, replies: Iterable[tuple[str, bytes]]) -> None:
        """Publish acknowledgements (``+ACK``, ``+TERM``) to their reply subjects, in order."""
        items = list(replies)
        if items:
            self._call(lambda: self._track(self._loop.create_task(self._publish(items))))

    def close(self, timeout: float = 5.0) -> None:
        """Flush what was sent, close the connection and end the thread."""
        self._call(lambda: self._stop.set() if self._stop is not None else None)
        self._thread.join(timeout)

    def _track(self, task: asyncio.Task[None]) -> None:
        self._tasks.add(task)
        task.add_done_callback(self._tasks.discard)

    def _call(self, fn: Any) -> None:
        # RuntimeError: the loop has ended (closed, or stopped by a fatal error)
        with contextlib.suppress(RuntimeError):
            self._loop.call_soon_threadsafe(fn)

    # -- the client thread -------------------------------------------------------------------

    def _run(self) -> None:
        asyncio.set_event_loop(self._loop)
        try:
            self._loop.run_until_complete(self._main())
        except Exception as exc:  # a bug here must not leave the loop waiting forever
            logger.exception("%s: the NATS client thread failed", self.name)
            self.fatal = InputError(f"input.source nats: the NATS client thread failed: {exc}")
        finally:
            self.connected = False
            self.ready.set()
            self.arrived.set()
            close_loop(self._loop)

    async def _main(self) -> None:
        import nats.errors

        self._room = asyncio.Event()
        self._stop = asyncio.Event()
        cfg = self.config
        wait = cfg.reconnect_wait_seconds
        first = True
        while not self._stop.is_set():
            try:
                nc = await self._connect()
            except (OSError, TimeoutError, nats.errors.Error) as exc:
                logger.warning(
                    "%s: cannot connect to %s (%s); trying again in %.1f s",
                    self.name,
                    ", ".join(cfg.servers),
                    exc or type(exc).__name__,
                    wait,
                )
                await self._pause(wait)
                wait = min(wait * 2, cfg.max_reconnect_wait_seconds)
                continue
            try:
                await self._setup(nc)
                if not first:
                    self.reconnects += 1
                first = False
                wait = cfg.reconnect_wait_seconds
                self.connected = True
                self.ready.set()
                logger.info(
                    "%s: consuming stream %s%s on %s as %s, from sequence %d",
                    self.name,
                    cfg.stream,
                    f" (subject {cfg.subject})" if cfg.subject else "",
                    self.server,
                    cfg.durable,
                    self._received + 1,
                )
                await self._pull(nc)
            except _Fatal as exc:
                self.fatal = exc.error
                logger.error("%s: %s", self.name, exc.error)
                await self._close(nc)
                return
            except _NotYet as exc:
                problem: str | None = str(exc)
            except (OSError, TimeoutError, nats.errors.Error) as exc:
                problem = f"connection to NATS lost ({exc or type(exc).__name__})"
            else:
                problem = None  # stopped
            self.connected = False
            await self._close(nc)
            if not self._stop.is_set():
                logger.warning("%s: %s; trying again in %.1f s", self.name, problem, wait)
                await self._pause(wait)
                wait = min(wait * 2, cfg.max_reconnect_wait_seconds)

    async def _pause(self, seconds: float) -> None:
        assert self._stop is not None
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(self._stop.wait(), seconds)

    async def _connect(self) -> Any:
        import nats

        cfg = self.config
        lost = asyncio.Event()

        async def on_error(exc: Exception) -> None:
            logger.debug("%s: NATS client error: %s", self.name, exc)

        async def on_gone() -> None:
            lost.set()
            if self._room is not None:
                self._room.set()

        options: dict[str, Any] = {
            "servers": list(cfg.servers),
            "name": "streamcount",
            "allow_reconnect": False,  # reconnection is ours: with backoff and a rewind
            # nats-py retries a failed first connection by itself, 60 times 2 s apart, unless
            # told: two quick tries per server, then the error comes back to our backoff
            "max_reconnect_attempts": 1,
            "reconnect_time_wait": 0.05,
            "connect_timeout": cfg.connect_timeout_seconds,
            "ping_interval": _PING_SECONDS,
            "max_outstanding_pings": 3,
            "error_cb": on_error,
            "disconnected_cb": on_gone,
            "closed_cb": on_gone,
        }
        if cfg.creds_file:
            options["user_credentials"] = cfg.creds_file
        if self.token:
            options["token"] = self.token
        nc = nats.NATS()
        try:
            await nc.connect(**options)
        except BaseException:
            # a handshake cut short (a server restarting) leaves nats-py's socket open
            with contextlib.suppress(Exception):
                await nc.close()
            raise
        self._nc, self._lost = nc, lost
        url = nc.connected_url
        self.server = url.netloc if url is not None else ", ".join(cfg.servers)
        return nc

    async def _close(self, nc: Any) -> None:
        self._sub = None
        if nc is None or nc.is_closed:
            self._nc = None
            return
        try:
            if self._tasks:  # acknowledgements sent just before the close
                await asyncio.wait(list(self._tasks), timeout=2)
            if nc.is_connected:
                await nc.flush(timeout=2)
            await nc.close()
        except Exception as exc:  # closing a broken connection: nothing more to do
            logger.debug("%s: closing the connection: %s", self.name, exc)
        self._nc = None

    # -- consumer set-up ---------------------------------------------------------------------

    async def _setup(self, nc: Any) -> None:
        """Check the stream, find the sequence to resume from (refusing a gap), create the
        consumer there and subscribe a fresh inbox for its deliveries."""
        import nats.js.errors
        from nats.js.api import AckPolicy, ConsumerConfig, DeliverPolicy, ReplayPolicy

        cfg = self.config
        js = nc.jetstream()
        try:
            info = await js.stream_info(cfg.stream)
        except nats.js.errors.NotFoundError:
            raise _NotYet(
                f"input.nats.stream = {cfg.stream!r}: no such stream on {self.server}; create "
                "it (file storage, limits retention; see the README)"
            ) from None
        retention = _retention(info)
        if retention != "limits":
            raise _Fatal(
                InputError(
                    f"input.nats.stream = {cfg.stream!r} has {retention!r} retention; the nats "
                    "source needs 'limits' retention, where acknowledgements never delete "
                    "messages (streamcount resumes from its checkpoint, not the server's "
                    "acknowledgement floor)"
                )
            )
        first, last = int(info.state.first_seq), int(info.state.last_seq)
        after = self._received if self._received >= 0 else self._resume_after
        if after is None:
            start = max(first, 1) if self.start_at == "beginning" else last + 1
        else:
            start = self._check_gap(after, first, last) + 1
        self._received = start - 1
        self.rewound_through = max(self.rewound_through, start - 1)
        self.buffer.append((start - 1, None, b""))  # the resume point, as a marker

        with contextlib.suppress(nats.js.errors.NotFoundError):
            await js.delete_consumer(cfg.stream, cfg.durable)
        consumer = ConsumerConfig(
            durable_name=cfg.durable,
            description="streamcount: re-created at its checkpoint on every start",
            deliver_policy=DeliverPolicy.BY_START_SEQUENCE,
            opt_start_seq=start,
            ack_policy=AckPolicy.ALL,
            ack_wait=self.ack_wait_seconds,
            max_deliver=-1,
            max_ack_pending=cfg.max_ack_pending,
            replay_policy=ReplayPolicy.INSTANT,
            filter_subject=cfg.subject,
        )
        try:
            created = await js.add_consumer(cfg.stream, config=consumer)
        except nats.js.errors.BadRequestError as exc:
            raise _Fatal(
                InputError(f"stream {cfg.stream!r} refused the consumer {cfg.durable!r}: {exc}")
            ) from None
        if self._sub is not None:
            try:
                await self._sub.unsubscribe()
            except Exception as exc:  # an old inbox; its deliveries are ignored anyway
                logger.debug("%s: unsubscribing the old inbox: %s", self.name, exc)
        self._incarnation += 1
        incarnation = self._incarnation
        inbox = nc.new_inbox()

        async def deliver(msg: Any) -> None:
            if incarnation == self._incarnation:
                self._deliver(msg)

        limit = 4 * cfg.max_buffered_messages + 1000
        self._sub = await nc.subscribe(
            inbox, cb=deliver, pending_msgs_limit=limit, pending_bytes_limit=0
        )
        self._inbox = inbox
        self._next_subject = f"$JS.API.CONSUMER.MSG.NEXT.{cfg.stream}.{cfg.durable}"
        self._next_dseq = 1
        self._last_reply = None
        # what the new consumer has to deliver: caught up only once that is read
        self._info_pending = int(getattr(created, "num_pending", 0) or 0)
        self._outstanding = 0
        self._rewind = False
        self._activity = time.monotonic()

    def _check_gap(self, after: int, first: int, last: int) -> int:
        """The sequence to resume after: ``after``, or where the stream starts when it no
        longer holds ``after + 1`` and the gap is accepted (else :class:`_Fatal`)."""
        cfg = self.config
        if after > last:
            missing: int | None = None
            what = (
                f"the checkpointed sequence {after} is beyond the stream's last message "
                f"({last}): the stream was purged or created again"
            )
        elif after + 1 < first:
            missing = first - 1 - after
            what = (
                f"stream {cfg.stream!r} no longer holds sequence {after + 1} (first available: "
                f"{first}): {missing} messages after the checkpointed one (of any subject) were "
                "removed by the stream's retention before they were read"
            )
        else:
            return after
        self.gap = {
            "after": after,
            "first_available": first,
            "messages": missing,
            "accepted": cfg.accept_gap,
        }
        if not cfg.accept_gap:
            raise _Fatal(
                StreamGapError(
                    f"input.source nats: {what}. Counting them is impossible; restart with "
                    "--accept-gap (input.nats.accept_gap: true) to resume at the first message "
                    "the stream holds and record the gap, or --fresh to start over"
                )
            )
        self.gap_messages += missing or 0
        logger.error("%s: %s; resuming at sequence %d (gap accepted)", self.name, what, first)
        return max(first, 1) - 1

    # -- pulling -----------------------------------------------------------------------------

    async def _pull(self, nc: Any) -> None:
        """Keep pull requests outstanding until the connection is lost or the client stops."""
        import nats.js.errors

        assert self._room is not None and self._stop is not None
        cfg = self.config
        lost = self._lost
        expires = int(_EXPIRES_SECONDS * 1e9)
        next_info = 0.0
        while not self._stop.is_set():
            if lost.is_set() or not nc.is_connected:
                raise OSError("disconnected")
            if self._rewind:
                self.rewinds += 1
                logger.warning(
                    "%s: a delivery went missing or the consumer was deleted; creating it "
                    "again after sequence %d",
                    self.name,
                    self._received,
                )
                await self._setup(nc)
                continue
            self._outstanding = max(self._outstanding, 0)
            free = cfg.max_buffered_messages - len(self.buffer) - self._outstanding
            if self._outstanding <= cfg.pull_batch // 2 and free >= min(
                cfg.pull_batch, cfg.max_buffered_messages // 2 or 1
            ):
                n = min(cfg.pull_batch, free)
                request = json.dumps({"batch": n, "expires": expires}).encode()
                await nc.publish(self._next_subject, request, reply=self._inbox)
                self._outstanding += n
                self._activity = time.monotonic()
                continue
            now = time.monotonic()
            if now >= next_info:
                next_info = now + _INFO_SECONDS
                try:
                    await self._consumer_info(nc)
                except nats.js.errors.NotFoundError:
                    self._rewind = True
                    continue
            if self._next_dseq != self._activity_mark:
                self._activity_mark, self._activity = self._next_dseq, now
            elif self._outstanding and now - self._activity > _EXPIRES_SECONDS + 5:
                self._outstanding = 0  # requests lost without a word: ask again
            self._room.clear()
            with contextlib.suppress(TimeoutError):
                await asyncio.wait_for(self._room.wait(), 1.0)

    async def _consumer_info(self, nc: Any) -> None:
        cfg = self.config
        info = await nc.jetstream().consumer_info(cfg.stream, cfg.durable, timeout=2)
        self.ack_pending = int(info.num_ack_pending or 0)
        if not self._outstanding or not self.buffer:  # nothing flowing: the info is newer
            self._info_pending = int(info.num_pending or 0)
            self._last_reply = None
        stalled = self.ack_pending >= cfg.max_ack_pending
        if stalled and not self._stalled_logged:
            logger.warning(
                "%s: %d messages await acknowledgement, input.nats.max_ack_pending (%d): the "
                "server pauses delivery until the next checkpoint; raise max_ack_pending or "
                "lower checkpoint.checkpoint_interval_seconds",
                self.name,
                self.ack_pending,
                cfg.max_ack_pending,
            )
        self._stalled_logged = stalled

    def _deliver(self, msg: Any) -> None:
        """One delivery or status message on the inbox (the client thread's hot path: a
        split, two integers and an append per message)."""
        reply = msg.reply
        if not reply:
            self._status(msg.headers or {})
            return
        self._outstanding -= 1
        if self._outstanding == self._half:
            self._wake()
        t = reply.split(".")
        o = 0 if len(t) == 9 else 2  # $JS.ACK.<domain>.<account hash>. in the newer form
        dseq = int(t[6 + o])
        if dseq != self._next_dseq:
            if not self._rewind:
                logger.debug("%s: delivery %d, expected %d", self.name, dseq, self._next_dseq)
            self._rewind = True
            self._wake()
            return
        self._next_dseq = dseq + 1
        self._last_reply = reply
        if t[4 + o] != "1":
            self.redeliveries += 1
        seq = int(t[5 + o])
        if seq <= self._received:
            return  # delivered again: already buffered (and maybe counted)
        self._received = seq
        self.buffer.append((seq, reply, msg.data))
        if self.reader_waiting:
            self.arrived.set()

    @property
    def server_pending(self) -> int:
        """Messages the server holds for the consumer and has not delivered yet (as of the
        last delivery, or the last consumer info when nothing is flowing)."""
        reply = self._last_reply
        if reply is None:
            return self._info_pending
        t = reply.split(".")
        return int(t[8 if len(t) == 9 else 10])

    def _wake(self) -> None:
        """Tell the requester there is room for another pull request (set up with the
        connection, before any message can arrive)."""
        assert self._room is not None
        self._room.set()

    def _status(self, headers: dict[str, str]) -> None:
        self._activity = time.monotonic()
        code = headers.get("Status", "")
        if code == "100":
            return  # idle heartbeat
        pending = headers.get("Nats-Pending-Messages")
        if pending is not None and pending.isdigit():
            self._outstanding = max(0, self._outstanding - int(pending))
        else:
            self._outstanding = 0
        if code == "409":
            description = headers.get("Description", "")
            logger.debug("%s: pull request ended: 409 %s", self.name, description)
            if "deleted" in description.lower():
                self._rewind = True
        self._wake()

    async def _publish(self, items: list[tuple[str, bytes]]) -> None:
        nc = self._nc
        if nc is None or not nc.is_connected:
            return  # not connected: the next connection re-creates the consumer anyway
        try:
            for subject, payload in items:
                await nc.publish(subject, payload)
        except Exception as exc:  # the connection went away meanwhile: same as above
            logger.debug("%s: acknowledgement not sent: %s", self.name, exc)
