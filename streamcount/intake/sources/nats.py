"""The ``nats`` source: orders from a NATS JetStream stream, counted exactly once.

Each message is one record in the configured format (a JSON order, a basket line, a CSV row),
or several NDJSON lines; a message becomes lines of a :class:`RecordBatch` whose ``offsets``
are the message's **stream sequence** (the same for every line of one message), so the
dead-letter file names the message a rejected record came from.

Exactly once
    :meth:`JetStreamSource.position` is ``{"stream": NAME, "seq": S}``, S the stream sequence
    of the last message handed to the loop; the loop saves it in the checkpoint. After a
    checkpoint, :meth:`~JetStreamSource.acknowledge` acknowledges everything up to S with one
    message (the consumer's ack policy is ``all``). On restart the consumer is created again
    at S + 1 (see :mod:`streamcount.intake.sources.jetstream`) and anything delivered at or
    below S is dropped, so a message is counted once across ``kill -9`` of streamcount and
    restarts of the NATS server (the stream on file storage).

Without checkpoints (``checkpoint.checkpoint_dir: null``) each batch is acknowledged as soon
as it is counted, since no checkpoint will ever do it.

Messages that cannot be decoded
    A message whose every record was set aside (each is in the dead-letter file) is
    *terminated* (``+TERM``: never delivered again) when the checkpoint that holds it is
    written, not before, so the server's acknowledgement floor never passes the checkpoint.
    One bad NDJSON line in a good message is dead-lettered alone; the message is acknowledged
    as usual.

For readiness and metrics the source exposes :attr:`~JetStreamSource.connected` and
:meth:`~JetStreamSource.bus_stats`.
"""

from __future__ import annotations

import logging
import os
from collections import Counter
from typing import Any

import numpy as np

from streamcount.config.settings import Config, NatsConfig
from streamcount.errors import ConfigError, InputError, ParseError
from streamcount.intake.records import BusStats, RecordBatch, SourceHealth
from streamcount.intake.sources.jetstream import PullClient, StreamGapError

__all__ = ["BusStats", "JetStreamSource", "StreamGapError", "ack_wait_for"]

logger = logging.getLogger(__name__)

#: seconds added to twice the checkpoint interval for the derived ack wait
_ACK_WAIT_MARGIN = 60.0
#: how long the constructor waits for the first connection before carrying on without it
_FIRST_CONNECT_GRACE = 3.0


def ack_wait_for(config: Config) -> float:
    """The consumer's ack wait: ``input.nats.ack_wait_seconds``, or twice the checkpoint
    interval plus 60 s, so a message is never redelivered between two checkpoints.

    >>> ack_wait_for(Config())
    180.0
    """
    nats = config.input.nats
    if nats.ack_wait_seconds is not None:
        return nats.ack_wait_seconds
    return 2 * config.checkpoint.checkpoint_interval_seconds + _ACK_WAIT_MARGIN


class JetStreamSource:
    """Records from a JetStream durable pull consumer (see the module notes).

    Build it with :meth:`from_config`. ``read`` hands out one :class:`RecordBatch` per call;
    its ``on_done`` (called by the loop once the batch is counted) finds the messages whose
    every record was set aside.
    """

    name = "nats"
    ingest = None
    #: a message of several lines is several records (NDJSON); ``False``: one record each
    #: (binary payloads, e.g. a cluster merger's pane summaries)
    split_lines = True

    def __init__(
        self,
        client: PullClient,
        *,
        stream: str,
        position: int | None,
        max_record_bytes: int,
        auto_ack: bool,
    ) -> None:
        self._client = client
        self.stream = stream
        self.max_record_bytes = max_record_bytes
        self.auto_ack = auto_ack
        self._last_seq = position  # last sequence handed to the loop
        self._ackable: list[tuple[int, str]] = []  # (sequence, reply) ending each batch
        self._poison: list[tuple[int, str]] = []  # terminated at the next acknowledgement
        self._caught_up = False
        self._closed = False
        self.terminated = 0

    @classmethod
    def from_config(
        cls, config: Config, position: Any, *, nats: NatsConfig | None = None
    ) -> JetStreamSource:
        """The source for ``input.nats`` (or ``nats``, settings of the same shape), resumed
        after ``position`` (from the checkpoint).

        Waits a few seconds for the first connection so that a refused resume (a retention
        gap, a missing stream) stops start-up at once; a server that cannot be reached yet
        is tried again in the background (:attr:`connected` stays false meanwhile).

        Raises
        ------
        StreamGapError
            The stream no longer holds the message after the checkpointed one.
        InputError, ConfigError
            The checkpoint is for another stream, the token's variable is unset, the creds
            file is missing, the stream is missing or has the wrong retention.
        """
        nats = nats if nats is not None else config.input.nats
        resume = cls._resume_point(nats.stream, position)
        token = None
        if nats.token_env:
            token = os.environ.get(nats.token_env) or None
            if token is None:
                raise InputError(
                    f"input.nats.token_env = {nats.token_env!r}: that environment variable is "
                    "not set or empty"
                )
        if nats.creds_file and not os.path.isfile(nats.creds_file):
            raise ConfigError("input.nats.creds_file", nats.creds_file, "no such file")
        client = PullClient(
            nats,
            resume_after=resume,
            start_at=config.input.start_at,
            ack_wait_seconds=ack_wait_for(config),
            token=token,
            name=cls.name,
        )
        source = cls(
            client,
            stream=nats.stream,
            position=resume,
            max_record_bytes=config.input.max_record_bytes if cls.split_lines else 1 << 62,
            auto_ack=config.checkpoint.checkpoint_dir is None,
        )
        client.ready.wait(nats.connect_timeout_seconds + _FIRST_CONNECT_GRACE)
        if client.fatal is not None:
            source.close()
            raise client.fatal
        if not client.connected:
            logger.warning(
                "nats: no server reachable yet at %s; retrying in the background",
                ", ".join(nats.servers),
            )
        return source

    @staticmethod
    def _resume_point(stream: str, position: Any) -> int | None:
        if position is None:
            return None
        try:
            recorded, seq = position["stream"], int(position["seq"])
        except (KeyError, TypeError, ValueError):
            raise InputError(
                f"nats position {position!r} in the checkpoint is not valid: expected "
                "{'stream': NAME, 'seq': N}"
            ) from None
        if recorded != stream:
            raise InputError(
                f"the checkpoint was written reading stream {recorded!r}, but input.nats.stream "
                f"is {stream!r}; its counts cannot continue on another stream: start with "
                "--fresh to discard the checkpoint, or set the stream back"
            )
        return seq

    # -- the Source protocol -----------------------------------------------------------------

    @property
    def exhausted(self) -> bool:
        """Never: a stream has no end."""
        return False

    @property
    def caught_up(self) -> bool:
        """Connected, and the last read left nothing fetched and the server had nothing more
        for us (false until the first connection and while the server is away)."""
        return self._caught_up

    @property
    def connected(self) -> bool:
        """Connected to a NATS server with the consumer set up (readiness reads it)."""
        return self._client.connected

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        """The messages fetched so far, as one batch of about ``max_records`` lines at most;
        waits up to ``timeout`` seconds when there are none.

        Raises
        ------
        StreamGapError, InputError
            When the client stopped for good (a gap found on reconnecting, the stream gone).
        """
        client = self._client
        if client.fatal is not None:
            raise client.fatal
        if self._closed:
            raise InputError("nats: read after close()")
        buf = client.buffer
        if not buf and timeout > 0:
            client.reader_waiting = True
            client.arrived.clear()
            if not buf:
                client.arrived.wait(timeout)
            client.reader_waiting = False
            if client.fatal is not None:
                raise client.fatal
        lines: list[bytes] = []
        seqs: list[int] = []
        messages: list[tuple[int, str]] = []
        last = -1 if self._last_seq is None else self._last_seq
        while buf and len(lines) < max_records:
            seq, reply, data = buf.popleft()
            if reply is None:  # a resume point: everything up to seq is accounted for
                last = max(last, seq)
                self._last_seq = last
                continue
            if seq <= last:
                continue
            last = seq
            messages.append((seq, reply))
            if self.split_lines and b"\n" in data:
                parts = data.split(b"\n")
                if not parts[-1]:
                    parts.pop()
                lines.extend(parts)
                seqs.extend([seq] * len(parts))
            else:
                lines.append(data)
                seqs.append(seq)
        if messages:
            self._last_seq = last
            client.wake()
        # away from the server nothing is known about what it holds: never caught up then (a
        # merger's pane timeout and the idle watermark wait for the bus)
        self._caught_up = client.connected and not buf and client.server_pending == 0
        if not messages:
            return []
        self._ackable.append(messages[-1])
        return [self._batch(lines, seqs, messages)]

    def _batch(
        self, lines: list[bytes], seqs: list[int], messages: list[tuple[int, str]]
    ) -> RecordBatch:
        offsets = np.array(seqs, dtype=np.int64)
        too_long = None
        cap = self.max_record_bytes
        if lines and max(map(len, lines)) > cap:
            too_long = np.fromiter((len(x) > cap for x in lines), dtype=bool, count=len(lines))
            lines = [x[:cap] for x in lines]
        end = messages[-1][0] + 1

        def done(accepted: int, errors: list[ParseError]) -> None:
            if errors:
                self._find_poison(errors, lines, offsets, messages)
            if self.auto_ack:
                self.acknowledge({"stream": self.stream, "seq": messages[-1][0]})

        return RecordBatch(lines, offsets, end, too_long, self.name, done)

    def _find_poison(
        self,
        errors: list[ParseError],
        lines: list[bytes],
        offsets: np.ndarray,
        messages: list[tuple[int, str]],
    ) -> None:
        """Messages of this batch none of whose records could be counted."""
        rejected = Counter(e.offset for e in errors if e.offset is not None)
        replies = dict(messages)
        for seq, n in sorted(rejected.items()):
            reply = replies.get(seq)
            if reply is None:
                continue  # an order closed later (CSV) whose first row came earlier
            records = sum(1 for i in np.flatnonzero(offsets == seq) if lines[i].strip())
            if n >= records:
                self._poison.append((seq, reply))
                logger.warning(
                    "nats: message %d of stream %s could not be counted (%d records, all in "
                    "the dead-letter file); it is terminated with the next acknowledgement",
                    seq,
                    self.stream,
                    records,
                )

    def position(self) -> dict[str, Any] | None:
        """``{"stream": NAME, "seq": S}``: S the sequence of the last message handed out
        (or the resume point); ``None`` before the first connection of a fresh start."""
        if self._last_seq is None:
            return None
        return {"stream": self.stream, "seq": self._last_seq}

    def acknowledge(self, position: Any) -> None:
        """Everything up to ``position`` is checkpointed: terminate the undecodable messages
        up to it, then acknowledge all up to it with one ``+ACK``.

        Messages below the last consumer re-creation need nothing: the new consumer starts
        after them.
        """
        if not position:
            return
        seq = int(position["seq"])
        floor = self._client.rewound_through
        out: list[tuple[str, bytes]] = []
        keep: list[tuple[int, str]] = []
        for s, reply in self._poison:
            if s > seq:
                keep.append((s, reply))
            elif s > floor:
                out.append((reply, b"+TERM"))
                self.terminated += 1
        self._poison = keep
        ack = None
        while self._ackable and self._ackable[0][0] <= seq:
            ack = self._ackable.pop(0)
        if ack is not None and ack[0] > floor:
            out.append((ack[1], b"+ACK"))
        self._client.send(out)

    def drain(self) -> list[RecordBatch]:
        """Nothing is owed to a sender: what is not counted now is delivered again after a
        restart (the consumer resumes after the checkpoint)."""
        return []

    def close(self) -> None:
        """Send what is pending, close the connection, end the client thread; safe twice."""
        if self._closed:
            return
        self._closed = True
        self._client.close()

    # -- readiness and metrics ---------------------------------------------------------------

    def bus_stats(self) -> BusStats:
        """Connection state and running totals for /readyz and the metrics."""
        client = self._client
        return BusStats(
            connected=client.connected,
            lag_messages=int(client.server_pending) + len(client.buffer),
            redeliveries=client.redeliveries,
            reconnects=client.reconnects,
            gap_messages=client.gap_messages,
            terminated=self.terminated,
        )

    def health(self) -> SourceHealth:
        """Connected or not, the bus's running totals and the last retention gap."""
        return SourceHealth(self.connected, self.bus_stats(), self.gap)

    @property
    def gap(self) -> dict[str, Any] | None:
        """The last retention gap found (``after``, ``first_available``, ``messages``,
        ``accepted``), for /v1/status; ``None`` when there was none."""
        return self._client.gap
