"""Cutting a byte stream into records (lines) with bounded memory, for the followed file and
standard input."""

from __future__ import annotations

import numpy as np

from streamcount.intake.records import RecordBatch, line_offsets

__all__ = ["LineSplitter"]


class LineSplitter:
    """Cuts a byte stream into lines, handed out as :class:`RecordBatch` objects.

    Holds at most one incomplete line, and of an over-long line only its first
    ``max_record_bytes`` bytes while the rest is skipped.

    Examples
    --------
    >>> s = LineSplitter(0, 8, source="file")
    >>> s.push(b"tea jam\\nscone\\nmuffin and more\\nha")
    >>> b = s.take(100)
    >>> b.lines, b.offsets.tolist(), b.end_offset, b.too_long.tolist()
    ([b'tea jam', b'scone', b'muffin a'], [0, 8, 14], 30, [False, False, True])
    >>> s.finish().lines
    [b'ha']
    """

    __slots__ = (
        "_buf",
        "_drop_partial",
        "_head",
        "_seen",
        "_start",
        "max_record_bytes",
        "offset",
        "source",
    )

    def __init__(self, offset: int, max_record_bytes: int, *, source: str = "file") -> None:
        self.offset = offset  # of the first byte not yet handed out in a record
        self.max_record_bytes = max_record_bytes
        self.source = source
        self._buf = bytearray()
        self._start = 0  # bytes of _buf already handed out
        self._head: bytes | None = None  # first bytes of an over-long line being skipped
        self._seen = 0  # bytes of that line skipped so far (head included)
        self._drop_partial = False  # started mid-line: drop up to the next newline

    def reset(self, offset: int, *, drop_partial: bool = False) -> None:
        """Start again at ``offset`` with nothing buffered."""
        self.offset = offset
        self._buf.clear()
        self._start = 0
        self._head = None
        self._seen = 0
        self._drop_partial = drop_partial

    @property
    def has_complete_line(self) -> bool:
        """A whole line is waiting to be taken."""
        return self._buf.find(b"\n", self._start) >= 0

    def push(self, data: bytes) -> None:
        """Add bytes read from the stream."""
        if self._start:
            del self._buf[: self._start]
            self._start = 0
        self._buf += data

    def take(self, limit: int) -> RecordBatch:
        """The complete lines buffered now, at most ``limit`` of them."""
        lines: list[bytes] = []
        offsets: list[int] = []
        cut: list[int] = []
        bulk = self._take_bulk(limit)
        if bulk is not None:
            return bulk
        buf, cap, start = self._buf, self.max_record_bytes, self._start
        while len(lines) < limit:
            nl = buf.find(b"\n", start)
            if self._drop_partial:
                if nl < 0:
                    self.offset += len(buf) - start
                    start = len(buf)
                    break
                self.offset += nl + 1 - start
                start = nl + 1
                self._drop_partial = False
                continue
            if self._head is not None:
                if nl < 0:
                    self._seen += len(buf) - start
                    start = len(buf)
                    break
                cut.append(len(lines))
                lines.append(self._head)
                offsets.append(self.offset)
                self.offset += self._seen + (nl - start) + 1
                self._head = None
                start = nl + 1
                continue
            if nl < 0:
                if len(buf) - start > cap:
                    self._head = bytes(buf[start : start + cap])
                    self._seen = len(buf) - start
                    start = len(buf)
                break
            length = nl - start
            if length > cap:
                cut.append(len(lines))
            lines.append(bytes(buf[start : start + min(length, cap)]))
            offsets.append(self.offset)
            self.offset += length + 1
            start = nl + 1
        self._start = start
        return self._make(lines, np.array(offsets, dtype=np.int64), cut)

    def _take_bulk(self, limit: int) -> RecordBatch | None:
        """The common case in a few C-level passes: complete lines, none over-long, nothing
        being skipped; ``None`` when the line-by-line loop must handle what is there."""
        if self._drop_partial or self._head is not None:
            return None
        buf, start = self._buf, self._start
        last_nl = buf.rfind(b"\n", start)
        if last_nl < 0:
            return None
        lines = bytes(buf[start:last_nl]).split(b"\n")
        if len(lines) > limit:
            lines = lines[:limit]
        if max(map(len, lines)) > self.max_record_bytes:
            return None
        offsets = line_offsets(lines, self.offset)
        consumed = int(offsets[-1]) - self.offset + len(lines[-1]) + 1
        self.offset += consumed
        self._start = start + consumed
        return self._make(lines, offsets, [])

    def finish(self) -> RecordBatch:
        """End of input: the final line without a newline becomes a record."""
        buf = self._buf[self._start :]
        lines: list[bytes] = []
        offsets: list[int] = []
        cut: list[int] = []
        if self._drop_partial:
            self.offset += len(buf)
        elif self._head is not None:
            cut.append(0)
            lines.append(self._head)
            offsets.append(self.offset)
            self.offset += self._seen + len(buf)
        elif buf:
            if len(buf) > self.max_record_bytes:
                cut.append(0)
            lines.append(bytes(buf[: self.max_record_bytes]))
            offsets.append(self.offset)
            self.offset += len(buf)
        batch = self._make(lines, np.array(offsets, dtype=np.int64), cut)
        self.reset(self.offset)
        return batch

    def _make(self, lines: list[bytes], offsets: np.ndarray, cut: list[int]) -> RecordBatch:
        too_long = None
        if cut:
            too_long = np.zeros(len(lines), dtype=bool)
            too_long[cut] = True
        return RecordBatch(lines, offsets, self.offset, too_long, self.source)
