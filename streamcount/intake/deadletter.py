"""Dead-letter file: every record set aside, one JSON line each, for a person to inspect.

Each line is a JSON object::

    {"time": 1714566600.25, "source": "orders.jsonl", "offset": 1234,
     "reason": "missing_field", "detail": "no field 'items' ...",
     "raw": "{\\"id\\": 7}", "raw_truncated": false}

``time`` is wall-clock epoch seconds when the record was set aside; ``raw`` is the record
decoded as UTF-8 with invalid bytes written as ``\\xNN`` escapes, cut to 4096 characters
(``raw_truncated`` says so). Lines are buffered and reach the disk on :meth:`flush` (the app
calls it once per batch) or :meth:`close`; there is no fsync, a crash may lose the last batch.

A writer that cannot write (disk full, permissions) logs a warning and keeps counting: a
dead-letter problem never stops counting.
"""

from __future__ import annotations

import json
import logging
import os
import time
from collections import Counter
from collections.abc import Callable
from typing import IO

from streamcount.errors import ParseError

__all__ = ["RAW_CHARS", "DeadLetterFile"]

logger = logging.getLogger(__name__)

#: characters of the raw record kept per dead-letter line
RAW_CHARS = 4096


class DeadLetterFile:
    """Append rejected records to a JSON-lines file and count them by reason.

    Parameters
    ----------
    path:
        The file (appended to; parent directories are created), or ``None`` for a writer
        that only counts.
    clock:
        Wall-clock source for the ``time`` field (injected in tests).

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
        self._file: IO[str] | None = None
        self._counts: Counter[str] = Counter()
        self.failed_writes = 0
        if self.path is not None:
            parent = os.path.dirname(os.path.abspath(self.path))
            os.makedirs(parent, exist_ok=True)

    def write(self, error: ParseError, *, source: str) -> None:
        """Count the record by reason and append one JSON line for it (buffered)."""
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
        try:
            if self._file is None:
                self._file = open(self.path, "a", encoding="utf-8")  # noqa: SIM115
            self._file.write(line + "\n")
        except OSError as exc:
            self._failed(exc)

    def _failed(self, exc: OSError) -> None:
        self.failed_writes += 1
        if self.failed_writes == 1 or self.failed_writes % 1000 == 0:
            logger.warning(
                "dead-letter file %s cannot be written (%s); %d record(s) not written so far, "
                "counting goes on",
                self.path,
                exc,
                self.failed_writes,
            )

    def flush(self) -> None:
        """Push buffered lines to the file (no fsync)."""
        if self._file is not None:
            try:
                self._file.flush()
            except OSError as exc:
                self._failed(exc)

    def close(self) -> None:
        """Flush and close; a later :meth:`write` opens the file again (append)."""
        if self._file is not None:
            try:
                self._file.close()
            except OSError as exc:
                self._failed(exc)
            self._file = None

    def counts(self) -> dict[str, int]:
        """Records set aside so far, by reason (written or not)."""
        return dict(self._counts)

    def __enter__(self) -> DeadLetterFile:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
