"""Standard input, read on a background thread."""

from __future__ import annotations

import logging
import queue
import sys
import threading
from typing import IO, Any

from streamcount.intake.records import RecordBatch, SourceHealth
from streamcount.intake.sources.lines import LineSplitter

__all__ = ["StdinSource"]

logger = logging.getLogger(__name__)

_READ_BYTES = 1 << 16
_EOF = object()


class StdinSource:
    """Standard input, read on a daemon thread into a bounded queue of record batches.

    Offsets are byte counts since the start of the input. A pipe cannot be re-read, so
    :meth:`position` is ``None``: a restarted service does not resume standard input.

    Parameters
    ----------
    stream:
        A binary stream to read instead of ``sys.stdin.buffer`` (tests).
    max_record_bytes:
        Longer lines come out cut short and marked too long.
    queue_size:
        Batches buffered ahead of the reader; the thread waits when it is full.
    """

    name = "stdin"
    ingest = None

    def __init__(
        self,
        stream: IO[bytes] | None = None,
        *,
        max_record_bytes: int = 65536,
        queue_size: int = 64,
    ) -> None:
        self._stream = stream if stream is not None else sys.stdin.buffer
        self.max_record_bytes = max_record_bytes
        self._queue: queue.Queue[object] = queue.Queue(maxsize=queue_size)
        self._stop = threading.Event()
        self._exhausted = False
        self._error: BaseException | None = None
        self._pending: RecordBatch | None = None  # the part of a batch not yet handed out
        self._thread = threading.Thread(target=self._run, name="streamcount-stdin", daemon=True)
        self._thread.start()

    def _put(self, item: object) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def _run(self) -> None:
        lines = LineSplitter(0, self.max_record_bytes, source=self.name)
        # read1 returns what a pipe has now instead of waiting to fill the whole block
        read = getattr(self._stream, "read1", self._stream.read)
        try:
            while not self._stop.is_set():
                data = read(_READ_BYTES)
                if data:
                    lines.push(data)
                    batch = lines.take(sys.maxsize)
                else:
                    batch = lines.finish()
                if len(batch) and not self._put(batch):
                    return
                if not data:
                    break
        except (OSError, ValueError) as exc:  # closed or broken stream
            self._error = exc
        self._put(_EOF)

    @property
    def exhausted(self) -> bool:
        """True once the end of input has been reached and every record returned."""
        return self._exhausted

    @property
    def caught_up(self) -> bool:
        """True when nothing read is waiting to be handed out."""
        return self._pending is None and self._queue.empty()

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        """Record batches read so far (about ``max_records`` records at most), waiting up to
        ``timeout`` seconds for the first."""
        out: list[RecordBatch] = []
        taken = 0
        if self._exhausted:
            return out
        if self._pending is not None:
            item: object = self._pending
            self._pending = None
        else:
            try:
                item = self._queue.get(timeout=timeout) if timeout > 0 else self._queue.get_nowait()
            except queue.Empty:
                return out
        while True:
            if item is _EOF:
                self._exhausted = True
                if self._error is not None:
                    logger.warning("standard input stopped with an error: %s", self._error)
                break
            assert isinstance(item, RecordBatch)
            room = max_records - taken
            if len(item) > room > 0:
                head, self._pending = _split(item, room)
                item = head
            out.append(item)
            taken += len(item)
            if taken >= max_records or self._pending is not None:
                break
            try:
                item = self._queue.get_nowait()
            except queue.Empty:
                break
        return out

    def position(self) -> Any:
        """``None``: standard input cannot be resumed after a restart."""
        return None

    def health(self) -> SourceHealth:
        """Always able to deliver what it has."""
        return SourceHealth()

    def drain(self) -> list[RecordBatch]:
        """Nothing is owed to a sender: what is not read now is read after a restart."""
        return []

    def acknowledge(self, position: object) -> None:
        """Nothing to do for a pipe."""
        return None

    def close(self) -> None:
        """Stop the reader thread (a read already blocked on the pipe ends with it)."""
        self._stop.set()


def _split(batch: RecordBatch, n: int) -> tuple[RecordBatch, RecordBatch]:
    """The first ``n`` records of ``batch`` and the rest."""
    offsets, cut = batch.offsets, batch.too_long
    head = RecordBatch(
        batch.lines[:n],
        None if offsets is None else offsets[:n],
        batch.offset(n),
        None if cut is None else cut[:n],
        batch.source,
    )
    rest = RecordBatch(
        batch.lines[n:],
        None if offsets is None else offsets[n:],
        batch.end_offset,
        None if cut is None else cut[n:],
        batch.source,
    )
    return head, rest
