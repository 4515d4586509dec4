"""A followed file: appends, rotation by rename, truncation, resumption from an offset."""

from __future__ import annotations

import logging
import os
import time
from typing import IO, Any

from streamcount.errors import ConfigError, InputError
from streamcount.intake.records import RecordBatch, SourceHealth
from streamcount.intake.sources.lines import LineSplitter

__all__ = ["FollowedFile"]

logger = logging.getLogger(__name__)

_READ_BYTES = 1 << 16


def _add(out: list[RecordBatch], batch: RecordBatch) -> int:
    if len(batch):
        out.append(batch)
    return len(batch)


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
    * Each event is logged once at INFO on the ``streamcount.intake.sources.file`` logger.
    """

    name = "file"
    ingest = None

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
        # start_at and max_record_bytes are checked with the other settings (config.checks)
        if start_offset < 0:
            raise ConfigError("start_offset", start_offset, "must be >= 0")
        self.path = os.fspath(path)
        self.poll_interval_seconds = poll_interval_seconds
        self.max_record_bytes = max_record_bytes
        self.follow = follow
        self._file: IO[bytes] | None = None
        self._identity: tuple[int, int] | None = None
        self._read_pos = 0  # file position of the next byte to read
        self._lines = LineSplitter(0, max_record_bytes, source="file")
        self._exhausted = False
        self._caught_up = False
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

    @property
    def caught_up(self) -> bool:
        """True when the last read reached the end of what the file holds."""
        return self._caught_up

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        """The complete lines available now, at most ``max_records``.

        Waits (polling every ``poll_interval_seconds``) up to ``timeout`` seconds when
        nothing is available; returns ``[]`` if nothing arrived in time.
        """
        if self._closed:
            raise InputError(f"input.path = {self.path!r}: read after close()")
        deadline = time.monotonic() + timeout
        while True:
            out: list[RecordBatch] = []
            self._read_available(out, max(1, max_records))
            if out or self._exhausted:
                return out
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                return out
            time.sleep(min(self.poll_interval_seconds, remaining))

    def _read_available(self, out: list[RecordBatch], limit: int) -> None:
        self._caught_up = False
        if self._exhausted:
            self._caught_up = True
            return
        if self._file is None:
            self._try_open()
            if self._file is None:
                self._caught_up = True
                return
        lines = self._lines
        taken = _add(out, lines.take(limit))
        while taken < limit:
            data = os.pread(self._file.fileno(), _READ_BYTES, self._read_pos)
            if data:
                self._read_pos += len(data)
                lines.push(data)
                taken += _add(out, lines.take(limit - taken))
                continue
            # end of the open file
            if not self.follow:
                _add(out, lines.finish())
                self._exhausted = True
                self._caught_up = True
                return
            if not self._check_path(out):
                self._caught_up = True
                return

    def _check_path(self, out: list[RecordBatch]) -> bool:
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
            _add(out, lines.finish())
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

    def health(self) -> SourceHealth:
        """Always able to deliver what it has."""
        return SourceHealth()

    def drain(self) -> list[RecordBatch]:
        """Nothing is owed to a sender: what is not read now is read after a restart."""
        return []

    def acknowledge(self, position: object) -> None:
        """Nothing to do: a file keeps its data whatever has been checkpointed."""
        return None

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
