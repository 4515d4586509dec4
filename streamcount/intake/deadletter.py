"""Dead-letter file: every record set aside, one JSON line each, for a person to inspect.

Each line is a JSON object::

    {"time": 1714566600.25, "source": "orders.jsonl", "offset": 1234,
     "reason": "missing_field", "detail": "no field 'items' ...",
     "raw": "{\\"id\\": 7}", "raw_truncated": false}

``time`` is wall-clock epoch seconds when the record was set aside; ``raw`` is the record
decoded as UTF-8 with invalid bytes written as ``\\xNN`` escapes, cut to 4096 characters
(``raw_truncated`` says so). Lines are buffered in memory (at most :data:`BUFFER_BYTES`) and
reach the disk on :meth:`flush` (the app calls it once per batch) or :meth:`close`; there is no
fsync, a crash may lose the last batch.

A writer that cannot write (disk full, permissions) keeps counting: a dead-letter problem never
stops counting. Every record that does not reach the file is counted in
:attr:`DeadLetterFile.failed_writes` (the service exposes it as
``streamcount_dead_letters_lost_total``), and the log says what failed, where, how to get out
of it and how many records are lost so far: once when the failures start, then at most once a
minute while they go on, and once when writing works again.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import time
from collections import Counter
from collections.abc import Callable
from typing import BinaryIO

from streamcount.errors import ParseError, describe_os_error

__all__ = ["BUFFER_BYTES", "RAW_CHARS", "DeadLetterFile"]

logger = logging.getLogger(__name__)

#: characters of the raw record kept per dead-letter line
RAW_CHARS = 4096
#: lines held in memory before they are written without waiting for :meth:`flush`
BUFFER_BYTES = 1 << 20
#: while writes keep failing, the loss is logged again at most this often (seconds)
_REPEAT_WARNING_SECONDS = 60.0


class DeadLetterFile:
    """Append rejected records to a JSON-lines file and count them by reason.

    Parameters
    ----------
    path:
        The file (appended to; parent directories are created), or ``None`` for a writer
        that only counts.
    clock:
        Wall-clock source for the ``time`` field (injected in tests).

    Attributes
    ----------
    failed_writes:
        Records set aside that could not be written to the file (lost), counted one by one;
        a line cut short by a full disk counts as lost.

    Examples
    --------
    >>> from streamcount.errors import ParseError
    >>> dl = DeadLetterFile(None)
    >>> dl.write(ParseError("empty", "no items", offset=0, raw=b"{}"), source="demo")
    >>> dl.counts()
    {'empty': 1}
    """

    def __init__(
        self, path: str | os.PathLike[str] | None, *, clock: Callable[[], float] = time.time
    ) -> None:
        self.path = None if path is None else os.fspath(path)
        self._clock = clock
        self._file: BinaryIO | None = None
        self._counts: Counter[str] = Counter()
        self._pending: list[bytes] = []
        self._pending_bytes = 0
        #: a line was cut short in the file: the next write starts on a new line
        self._torn = False
        self._failing = False
        self._warned_at = -float("inf")
        self.failed_writes = 0
        if self.path is not None:
            parent = os.path.dirname(os.path.abspath(self.path))
            os.makedirs(parent, exist_ok=True)

    def write(self, error: ParseError, *, source: str) -> None:
        """Count the record by reason and buffer one JSON line for it."""
        self._counts[error.reason] += 1
        if self.path is None:
            return
        raw = error.raw
        text = (
            raw.decode("utf-8", errors="backslashreplace")
            if isinstance(raw, bytes | bytearray)
            else str(raw)
        )
        truncated = len(text) > RAW_CHARS
        line = json.dumps(
            {
                "time": self._clock(),
                "source": source,
                "offset": error.offset,
                "reason": error.reason,
                "detail": error.detail,
                "raw": text[:RAW_CHARS] if truncated else text,
                "raw_truncated": truncated,
            },
            ensure_ascii=False,
        )
        # surrogates escaped, so a lone one from a JSON escape cannot make the line unwritable
        data = (line + "\n").encode("utf-8", errors="backslashreplace")
        self._pending.append(data)
        self._pending_bytes += len(data)
        if self._pending_bytes >= BUFFER_BYTES:
            self.flush()

    def flush(self) -> None:
        """Write the buffered lines to the file (no fsync); count those that do not get there."""
        if not self._pending:
            return
        lines, self._pending, self._pending_bytes = self._pending, [], 0
        prefix = b"\n" if self._torn else b""
        data = memoryview(prefix + b"".join(lines))
        written = 0
        try:
            if self._file is None:
                assert self.path is not None
                self._file = open(self.path, "ab", buffering=0)  # noqa: SIM115 - kept open
            while written < len(data):
                n = self._file.write(data[written:])
                if not n:  # a raw file reports no progress with 0 or None
                    raise OSError(f"no byte written at offset {written}")
                written += n
        except OSError as exc:
            self._lost(lines, max(0, written - len(prefix)), exc)
            return
        self._torn = False
        if self._failing:
            self._failing = False
            logger.info(
                "dead-letter file %s is written again; %d records were lost in all",
                self.path,
                self.failed_writes,
            )

    def _lost(self, lines: list[bytes], written: int, exc: OSError) -> None:
        """``lines`` were to be written; the first ``written`` bytes of them got there."""
        done = kept = 0
        for line in lines:
            if done + len(line) > written:
                break
            done += len(line)
            kept += 1
        self._torn = written > done  # part of a line reached the file
        self.failed_writes += len(lines) - kept
        if self._file is not None:  # opened again at the next flush (the path may be fixed)
            with contextlib.suppress(OSError):
                self._file.close()
            self._file = None
        now = time.monotonic()
        if not self._failing or now - self._warned_at >= _REPEAT_WARNING_SECONDS:
            logger.warning(
                "records set aside cannot be written: %s; %d records lost so far (counted in "
                "streamcount_dead_letters_lost_total), counting goes on",
                describe_os_error("dead-letter", self.path, exc),
                self.failed_writes,
            )
            self._warned_at = now
        self._failing = True

    def close(self) -> None:
        """Flush and close; a later :meth:`write` opens the file again (append)."""
        self.flush()
        if self._file is not None:
            try:
                self._file.close()
            except OSError as exc:
                logger.warning("%s", describe_os_error("dead-letter", self.path, exc))
            self._file = None

    def counts(self) -> dict[str, int]:
        """Records set aside so far, by reason (written or not)."""
        return dict(self._counts)

    def __enter__(self) -> DeadLetterFile:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
