"""Sources: where raw records (lines) come from, with offsets for checkpoints.

Every source has the same small interface (:class:`Source`): ``read(max_records, timeout)``
returns the records available now as :class:`RawRecord` (never blocking longer than
``timeout``), ``exhausted`` turns true at the end of a finite input, ``position()`` is a
JSON-able mapping to resume from, and ``close()``.

* :class:`FollowedFile` follows a growing file the way a log shipper does: appends, rotation
  by rename, truncation, a file that does not exist yet.
* :class:`StdinSource` reads standard input on a background thread.
* :class:`IterableSource` serves records from any iterable (tests, demos).

A record is one line without its newline. A line longer than ``max_record_bytes`` comes out
as one record with ``too_long=True`` holding its first ``max_record_bytes`` bytes; the rest
is skipped as it is read, never held in memory.
"""

from __future__ import annotations

import logging
import os
import queue
import sys
import threading
import time
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from itertools import accumulate
from typing import IO, Any, Protocol

from streamcount.errors import ConfigError, InputError

__all__ = ["FollowedFile", "IterableSource", "RawRecord", "Source", "StdinSource"]

logger = logging.getLogger(__name__)

_READ_BYTES = 1 << 16


@dataclass(frozen=True, slots=True)
class RawRecord:
    """One line of input.

    Attributes
    ----------
    data:
        The line without its newline (for an over-long line, its first bytes only).
    offset:
        Byte offset of the line's first byte in its source.
    end_offset:
        Just after the line (after its newline; at end of input, after its last byte).
    too_long:
        The line was longer than ``max_record_bytes``; ``data`` is cut short.
    """

    data: bytes
    offset: int
    end_offset: int
    too_long: bool = False


class Source(Protocol):
    """What the app reads records from."""

    @property
    def exhausted(self) -> bool:
        """True once a finite input has been read to its end and everything returned."""
        ...

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RawRecord]:
        """Records available now (at most ``max_records``), waiting at most ``timeout`` s."""
        ...

    def position(self) -> dict[str, Any]:
        """JSON-able position just after the last record returned."""
        ...

    def close(self) -> None:
        """Release the file or thread; safe to call twice."""
        ...


class _LineSplitter:
    """Cuts a byte stream into :class:`RawRecord` lines with bounded memory.

    Holds at most one incomplete line, and of an over-long line only its first
    ``max_record_bytes`` bytes while the rest is skipped.
    """

    __slots__ = ("_buf", "_drop_partial", "_head", "_seen", "max_record_bytes", "offset")

    def __init__(self, offset: int, max_record_bytes: int) -> None:
        self.offset = offset  # of the first byte not yet returned in a record
        self.max_record_bytes = max_record_bytes
        self._buf = bytearray()
        self._head: bytes | None = None  # first bytes of an over-long line being skipped
        self._seen = 0  # bytes of that line skipped so far (head included)
        self._drop_partial = False  # started mid-line: drop up to the next newline

    def reset(self, offset: int, *, drop_partial: bool = False) -> None:
        self.offset = offset
        self._buf.clear()
        self._head = None
        self._seen = 0
        self._drop_partial = drop_partial

    @property
    def has_complete_line(self) -> bool:
        return b"\n" in self._buf

    def push(self, data: bytes, out: list[RawRecord], limit: int) -> None:
        """Add bytes, then move complete lines to ``out`` (up to ``limit`` records)."""
        self._buf += data
        self.drain(out, limit)

    def drain(self, out: list[RawRecord], limit: int) -> None:
        buf = self._buf
        cap = self.max_record_bytes
        start = self._drain_bulk(out, limit)
        while len(out) < limit:
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
                length = self._seen + (nl - start)
                out.append(RawRecord(self._head, self.offset, self.offset + length + 1, True))
                self.offset += length + 1
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
                out.append(
                    RawRecord(
                        bytes(buf[start : start + cap]), self.offset, self.offset + length + 1, True
                    )
                )
            else:
                out.append(RawRecord(bytes(buf[start:nl]), self.offset, self.offset + length + 1))
            self.offset += length + 1
            start = nl + 1
        del buf[:start]

    def _drain_bulk(self, out: list[RawRecord], limit: int) -> int:
        """The common case in a few C-level passes: every complete line in the buffer, none
        over-long, no skipping in progress. Returns how many buffer bytes it consumed (0 when
        the line-by-line loop must handle what is there)."""
        if self._drop_partial or self._head is not None:
            return 0
        buf = self._buf
        last_nl = buf.rfind(b"\n")
        if last_nl < 0:
            return 0
        lines = bytes(buf[:last_nl]).split(b"\n")
        room = limit - len(out)
        if len(lines) > room:
            if room <= 0:
                return 0
            lines = lines[:room]
        if max(map(len, lines)) > self.max_record_bytes:
            return 0
        ends = list(accumulate(len(line) + 1 for line in lines))
        base = self.offset
        out.extend(
            RawRecord(line, base + end - len(line) - 1, base + end)
            for line, end in zip(lines, ends, strict=True)
        )
        consumed = ends[-1]
        self.offset = base + consumed
        return consumed

    def finish(self, out: list[RawRecord]) -> None:
        """End of input: the final line without a newline becomes a record."""
        if self._drop_partial:
            self.offset += len(self._buf)
        elif self._head is not None:
            length = self._seen + len(self._buf)
            out.append(RawRecord(self._head, self.offset, self.offset + length, True))
            self.offset += length
        elif self._buf:
            n = len(self._buf)
            if n > self.max_record_bytes:
                out.append(
                    RawRecord(
                        bytes(self._buf[: self.max_record_bytes]),
                        self.offset,
                        self.offset + n,
                        True,
                    )
                )
            else:
                out.append(RawRecord(bytes(self._buf), self.offset, self.offset + n))
            self.offset += n
        self.reset(self.offset)


def _identity(st: os.stat_result) -> tuple[int, int]:
    return (st.st_dev, st.st_ino)


class FollowedFile:
    """Follow a file as it grows, across rotation and truncation.

    Parameters
    ----------
    path:
        The file to follow. It may not exist yet: it is waited for (logged once).
    start_offset:
        Byte offset to start at (a line boundary, as returned by :meth:`position`).
    identity:
        ``(device, inode)`` the offset belongs to; with it, a file that has been replaced
        in the meantime is read from 0 instead (see :meth:`from_position`).
    poll_interval_seconds:
        Sleep between looks at the file while :meth:`read` waits for data.
    max_record_bytes:
        Longer lines come out cut short with ``too_long=True``.
    start_at:
        ``beginning`` or ``end``; ``end`` skips what the file holds when it is first opened
        (only when no ``start_offset`` or ``identity`` is given).
    follow:
        ``False``: stop at the end of the file; the last line needs no newline and
        :attr:`exhausted` turns true. A missing file is then an error.

    Notes
    -----
    * **Appends** are picked up on the next :meth:`read`; an incomplete last line (no newline
      yet) is held back until its newline arrives.
    * **Rotation by rename**: when the path names another file (device or inode changed),
      the old file, still open, is read to its end (its last line then needs no newline),
      and the new file is read from offset 0.
    * **Truncation**: when the file at the path is the same but shorter than the read
      position, reading starts again at 0 (a copy-and-truncate rotation that refills the file
      beyond the old position before it is looked at cannot be seen).
    * Each event is logged once at INFO on the ``streamcount.sources`` logger.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        start_offset: int = 0,
        identity: tuple[int, int] | None = None,
        poll_interval_seconds: float = 0.2,
        max_record_bytes: int = 65536,
        start_at: str = "beginning",
        follow: bool = True,
    ) -> None:
        if start_at not in ("beginning", "end"):
            raise ConfigError("input.start_at", start_at, "must be 'beginning' or 'end'")
        if start_offset < 0:
            raise ConfigError("start_offset", start_offset, "must be >= 0")
        if max_record_bytes < 1:
            raise ConfigError("input.max_record_bytes", max_record_bytes, "must be >= 1")
        self.path = os.fspath(path)
        self.poll_interval_seconds = poll_interval_seconds
        self.max_record_bytes = max_record_bytes
        self.follow = follow
        self._file: IO[bytes] | None = None
        self._identity: tuple[int, int] | None = None
        self._read_pos = 0  # file position of the next byte to read
        self._lines = _LineSplitter(0, max_record_bytes)
        self._exhausted = False
        self._closed = False
        self._waiting_logged = False
        self._old_done = False  # rotation seen: finish the old file, then switch
        # where the first open starts: (offset, identity it belongs to, start at end?)
        self._resume: tuple[int, tuple[int, int] | None, bool] | None = (
            start_offset,
            identity,
            start_at == "end" and start_offset == 0 and identity is None,
        )
        self._try_open()
        if self._file is None and not follow:
            raise InputError(f"input.path = {self.path!r}: no such file")

    # -- construction from a checkpoint ---------------------------------------------------

    @classmethod
    def from_position(
        cls, path: str | os.PathLike[str], position: dict[str, Any], **kwargs: Any
    ) -> FollowedFile:
        """Resume where :meth:`position` said.

        If the file at ``path`` is still the same file (device and inode) and at least
        ``offset`` bytes long, reading resumes at ``offset``. If it is another file (rotated
        while we were down), the old file's new name is unknown, so its unread tail is lost:
        the new file is read from 0 and a warning is logged. If the same file is shorter, it
        was truncated: read from 0 (warning). A position recorded for another path is
        ignored (warning) and ``start_at`` applies.
        """
        fspath = os.fspath(path)
        try:
            recorded = position["path"]
            offset = int(position["offset"])
            device, inode = position.get("device"), position.get("inode")
        except (KeyError, TypeError, ValueError):
            raise InputError(
                f"input position {position!r} is not valid: expected path, device, inode "
                "and offset as written by FollowedFile.position()"
            ) from None
        if recorded != fspath:
            logger.warning("checkpoint position is for %s, not %s; ignoring it", recorded, fspath)
            return cls(fspath, **kwargs)
        ident = None if device is None or inode is None else (int(device), int(inode))
        kwargs.pop("start_offset", None)
        kwargs.pop("identity", None)
        return cls(fspath, start_offset=offset, identity=ident, **kwargs)

    # -- opening ---------------------------------------------------------------------------

    def _try_open(self) -> None:
        try:
            f = open(self.path, "rb", buffering=0)  # noqa: SIM115 - kept open while following
        except FileNotFoundError:
            if self.follow and not self._waiting_logged:
                logger.info("waiting for %s to appear", self.path)
                self._waiting_logged = True
            return
        except OSError as exc:
            raise InputError(f"input.path = {self.path!r}: cannot be opened ({exc})") from None
        st = os.fstat(f.fileno())
        if self._waiting_logged:
            logger.info("%s appeared; reading it", self.path)
            self._waiting_logged = False
        self._file = f
        self._identity = _identity(st)
        offset, drop = 0, False
        if self._resume is not None:
            want, ident, at_end = self._resume
            self._resume = None
            if at_end:
                offset = st.st_size
                drop = offset > 0 and os.pread(f.fileno(), 1, offset - 1) != b"\n"
            elif ident is not None and ident != self._identity:
                logger.warning(
                    "%s is another file than the checkpoint's (device/inode %s, now %s): it "
                    "was rotated while stopped; the old file's unread tail is lost, reading "
                    "the new file from offset 0",
                    self.path,
                    ident,
                    self._identity,
                )
            elif want > st.st_size:
                logger.warning(
                    "%s is %d bytes, shorter than the checkpoint offset %d: it was truncated "
                    "while stopped; reading from offset 0",
                    self.path,
                    st.st_size,
                    want,
                )
            else:
                offset = want
        self._read_pos = offset
        self._lines.reset(offset, drop_partial=drop)

    # -- reading ---------------------------------------------------------------------------

    @property
    def exhausted(self) -> bool:
        """True in ``follow=False`` mode once the file is read to its end."""
        return self._exhausted

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RawRecord]:
        """The complete lines available now, at most ``max_records``.

        Waits (polling every ``poll_interval_seconds``) up to ``timeout`` seconds when
        nothing is available; returns ``[]`` if nothing arrived in time.
        """
        if self._closed:
            raise InputError(f"input.path = {self.path!r}: read after close()")
        deadline = time.monotonic() + timeout
        while True:
            out: list[RawRecord] = []
            self._read_available(out, max(1, max_records))
            if out or self._exhausted:
                return out
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                return out
            time.sleep(min(self.poll_interval_seconds, remaining))

    def _read_available(self, out: list[RawRecord], limit: int) -> None:
        if self._exhausted:
            return
        if self._file is None:
            self._try_open()
            if self._file is None:
                return
        lines = self._lines
        lines.drain(out, limit)
        while len(out) < limit:
            data = os.pread(self._file.fileno(), _READ_BYTES, self._read_pos)
            if data:
                self._read_pos += len(data)
                lines.push(data, out, limit)
                continue
            # end of the open file
            if not self.follow:
                lines.finish(out)
                self._exhausted = True
                return
            if not self._check_path(out):
                return

    def _check_path(self, out: list[RawRecord]) -> bool:
        """At the end of the open file: look for rotation or truncation.

        Returns True when reading should go on (a new file was opened or the file was
        rewound), False when there is nothing more for now.
        """
        assert self._file is not None
        try:
            st = os.stat(self.path)
        except FileNotFoundError:
            return False  # renamed away and not recreated yet: keep the old file open
        except OSError:
            return False
        if _identity(st) != self._identity:
            # Rotated. A writer may still have appended to the old file after our last read:
            # read on until the old file really has nothing more, then switch.
            if os.fstat(self._file.fileno()).st_size > self._read_pos:
                return True
            lines = self._lines
            lines.finish(out)
            logger.info(
                "%s was rotated (device/inode %s -> %s); finished the old file at offset %d, "
                "reading the new file from offset 0",
                self.path,
                self._identity,
                _identity(st),
                lines.offset,
            )
            self._file.close()
            self._file = None
            self._identity = None
            lines.reset(0)  # position() now means the new file, even before it opens
            self._try_open()
            return self._file is not None
        if st.st_size < self._read_pos:
            logger.info(
                "%s was truncated (size %d < read position %d); reading again from offset 0",
                self.path,
                st.st_size,
                self._read_pos,
            )
            self._read_pos = 0
            self._lines.reset(0)
            return True
        return False

    def position(self) -> dict[str, Any]:
        """Where to resume: path, device, inode and the offset just after the last record.

        Pass it to :meth:`from_position`. ``device`` and ``inode`` are ``None`` while the
        file has not been opened yet.
        """
        device, inode = self._identity if self._identity is not None else (None, None)
        offset = self._lines.offset
        if self._identity is None and self._resume is not None:
            offset = self._resume[0]
        return {"path": self.path, "device": device, "inode": inode, "offset": offset}

    def close(self) -> None:
        """Close the file; safe to call twice."""
        self._closed = True
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self) -> FollowedFile:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


_EOF = object()


class StdinSource:
    """Standard input, read line by line on a daemon thread into a bounded queue.

    Offsets are byte counts since the start of the input; ``position()`` cannot be resumed
    from (a pipe cannot be re-read), it only reports how far reading got.

    Parameters
    ----------
    stream:
        A binary stream to read instead of ``sys.stdin.buffer`` (tests).
    max_record_bytes:
        Longer lines come out cut short with ``too_long=True``.
    queue_size:
        Records buffered ahead of the reader; the thread waits when it is full.
    """

    def __init__(
        self,
        stream: IO[bytes] | None = None,
        *,
        max_record_bytes: int = 65536,
        queue_size: int = 10000,
    ) -> None:
        self._stream = stream if stream is not None else sys.stdin.buffer
        self.max_record_bytes = max_record_bytes
        self._queue: queue.Queue[object] = queue.Queue(maxsize=queue_size)
        self._stop = threading.Event()
        self._exhausted = False
        self._offset = 0
        self._error: BaseException | None = None
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
        lines = _LineSplitter(0, self.max_record_bytes)
        # read1 returns what a pipe has now instead of waiting to fill the whole block
        read = getattr(self._stream, "read1", self._stream.read)
        try:
            while not self._stop.is_set():
                data = read(_READ_BYTES)
                out: list[RawRecord] = []
                if not data:
                    lines.finish(out)
                else:
                    lines.push(data, out, sys.maxsize)
                for record in out:
                    if not self._put(record):
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

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RawRecord]:
        """Records read so far (at most ``max_records``), waiting up to ``timeout`` seconds."""
        out: list[RawRecord] = []
        if self._exhausted:
            return out
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
            assert isinstance(item, RawRecord)
            out.append(item)
            self._offset = item.end_offset
            if len(out) >= max_records:
                break
            try:
                item = self._queue.get_nowait()
            except queue.Empty:
                break
        return out

    def position(self) -> dict[str, Any]:
        """``{"path": "-", "offset": bytes returned so far}``."""
        return {"path": "-", "device": None, "inode": None, "offset": self._offset}

    def close(self) -> None:
        """Stop the reader thread (a read already blocked on the pipe ends with it)."""
        self._stop.set()


class IterableSource:
    """Records from an iterable of ``bytes`` (or ``str``, encoded as UTF-8).

    Each element is one record (a trailing newline is removed). Offsets count bytes as if
    the records were written one per line.

    Examples
    --------
    >>> src = IterableSource([b"tea jam", b"scone"])
    >>> [(r.data, r.offset, r.end_offset) for r in src.read()]
    [(b'tea jam', 0, 8), (b'scone', 8, 14)]
    >>> src.exhausted
    True
    """

    def __init__(self, records: Iterable[bytes | str], *, max_record_bytes: int = 65536) -> None:
        self._records: Iterator[bytes | str] = iter(records)
        self.max_record_bytes = max_record_bytes
        self._offset = 0
        self._exhausted = False

    @property
    def exhausted(self) -> bool:
        return self._exhausted

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RawRecord]:
        out: list[RawRecord] = []
        while len(out) < max_records:
            try:
                item = next(self._records)
            except StopIteration:
                self._exhausted = True
                break
            data = item.encode("utf-8") if isinstance(item, str) else bytes(item)
            if data.endswith(b"\n"):
                data = data[:-1]
            end = self._offset + len(data) + 1
            if len(data) > self.max_record_bytes:
                out.append(RawRecord(data[: self.max_record_bytes], self._offset, end, True))
            else:
                out.append(RawRecord(data, self._offset, end))
            self._offset = end
        return out

    def position(self) -> dict[str, Any]:
        return {"path": None, "device": None, "inode": None, "offset": self._offset}

    def close(self) -> None:
        self._exhausted = True
