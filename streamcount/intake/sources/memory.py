"""In-memory sources: records from an iterable (tests, the demo) and the queue behind HTTP
ingest."""

from __future__ import annotations

import queue
from collections.abc import Iterable, Iterator
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any

import numpy as np

from streamcount.errors import InputError, ParseError
from streamcount.intake.records import RecordBatch, SourceHealth, line_offsets

__all__ = ["IngestReceipt", "IterableSource", "QueueSource"]


class IterableSource:
    """Records from an iterable of ``bytes`` (or ``str``, encoded as UTF-8).

    Each element is one record (a trailing newline is removed). Offsets count bytes as if
    the records were written one per line. Not resumable (:meth:`position` is ``None``).

    Examples
    --------
    >>> src = IterableSource([b"tea jam", b"scone"])
    >>> [(b.lines, b.offsets.tolist()) for b in src.read()]
    [([b'tea jam', b'scone'], [0, 8])]
    >>> src.exhausted
    True
    """

    def __init__(
        self,
        records: Iterable[bytes | str],
        *,
        max_record_bytes: int = 65536,
        name: str = "memory",
    ) -> None:
        self.name = name
        self.ingest = None
        self._records: Iterator[bytes | str] = iter(records)
        self.max_record_bytes = max_record_bytes
        self._offset = 0
        self._exhausted = False

    @property
    def exhausted(self) -> bool:
        return self._exhausted

    @property
    def caught_up(self) -> bool:
        return self._exhausted

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        taken: list[bytes | str] = []
        while len(taken) < max_records:
            try:
                taken.append(next(self._records))
            except StopIteration:
                self._exhausted = True
                break
        if not taken:
            return []
        batch = RecordBatch.from_lines(
            taken, start=self._offset, source=self.name, max_record_bytes=self.max_record_bytes
        )
        self._offset = int(batch.end_offset or 0)
        return [batch]

    def position(self) -> Any:
        return None

    def acknowledge(self, position: object) -> None:
        return None

    def drain(self) -> list[RecordBatch]:
        return []

    def health(self) -> SourceHealth:
        return SourceHealth()

    def close(self) -> None:
        self._exhausted = True


@dataclass(frozen=True, slots=True)
class IngestReceipt:
    """What became of one HTTP ingest body once the service counted it.

    ``rejected`` lists, per record set aside, its 1-based line in the body, reason and detail.
    """

    accepted: int
    rejected: list[dict[str, Any]]


class QueueSource:
    """Bodies pushed by HTTP ingest (one JSON object or NDJSON lines each), read by the
    service loop like any other source.

    :meth:`submit` queues a body and returns a future that the loop completes with an
    :class:`IngestReceipt` once the body is decoded and counted. Offsets are byte offsets
    within the body. Not resumable: a body is acknowledged to its sender once counted, and
    counted bodies not yet checkpointed are lost in a crash (use a followed file or a message
    bus where every order must count).
    """

    name = "http"

    def __init__(self, *, max_record_bytes: int = 65536, max_pending: int = 1000) -> None:
        self.max_record_bytes = max_record_bytes
        self._queue: queue.Queue[RecordBatch] = queue.Queue(maxsize=max_pending)
        self._closed = False
        self.ingest = self.submit

    def submit(self, body: bytes) -> Future[IngestReceipt]:
        """Queue one body; raises :class:`InputError` when closed, full or empty."""
        if self._closed:
            raise InputError("the service is stopping; ingest is closed")
        lines = body.split(b"\n")
        if lines and lines[-1] == b"":
            lines.pop()
        if not any(line.strip() for line in lines):
            raise InputError("empty body: send one JSON object or NDJSON lines")
        offsets = line_offsets(lines, 0)
        done: Future[IngestReceipt] = Future()

        def receipt(accepted: int, errors: list[ParseError]) -> None:
            rejected = [
                {
                    "line": int(np.searchsorted(offsets, e.offset, side="right"))
                    if e.offset is not None
                    else None,
                    "reason": e.reason,
                    "detail": e.detail,
                }
                for e in errors
            ]
            if not done.done():
                done.set_result(IngestReceipt(accepted, rejected))

        too_long = None
        if any(len(line) > self.max_record_bytes for line in lines):
            too_long = np.array([len(line) > self.max_record_bytes for line in lines])
            lines = [line[: self.max_record_bytes] for line in lines]
        batch = RecordBatch(lines, offsets, len(body), too_long, self.name, receipt)
        try:
            self._queue.put_nowait(batch)
        except queue.Full:
            raise InputError("the ingest queue is full; retry later") from None
        return done

    @property
    def exhausted(self) -> bool:
        """True once closed and drained."""
        return self._closed and self._queue.empty()

    @property
    def caught_up(self) -> bool:
        return self._queue.empty()

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        out: list[RecordBatch] = []
        taken = 0
        try:
            first = self._queue.get(timeout=timeout) if timeout > 0 else self._queue.get_nowait()
        except queue.Empty:
            return out
        out.append(first)
        taken += len(first)
        while taken < max_records:
            try:
                batch = self._queue.get_nowait()
            except queue.Empty:
                break
            out.append(batch)
            taken += len(batch)
        return out

    def position(self) -> Any:
        return None

    def acknowledge(self, position: object) -> None:
        return None

    def health(self) -> SourceHealth:
        return SourceHealth()

    def drain(self) -> list[RecordBatch]:
        """Stop accepting bodies and hand out every one still queued."""
        self._closed = True
        return self.read(max_records=1 << 62)

    def close(self) -> None:
        """Accept no more bodies; those queued are still read."""
        self._closed = True
