"""Reading a whole file as fast as possible (``streamcount replay``, benchmarks, tests).

:func:`iter_batches` cuts a file (or standard input) into
:class:`~streamcount.intake.records.RecordBatch` objects of about a megabyte of whole lines,
the same type a followed file hands the live service, so replay and the service decode with the
same decoder. A line longer than ``max_record_bytes`` comes out cut short and marked
``too_long``; its rest is skipped as it is read, never held in memory.
"""

from __future__ import annotations

import contextlib
import gzip
import io
import sys
from collections.abc import Iterator
from typing import IO

import numpy as np

from streamcount.errors import ConfigError, InputError
from streamcount.intake.records import RecordBatch, line_offsets

__all__ = ["BLOCK_BYTES", "iter_batches", "open_input", "part_starts"]

#: bytes read at a time: large enough that per-block overhead vanishes
BLOCK_BYTES = 1 << 20


@contextlib.contextmanager
def open_input(path: str) -> Iterator[IO[bytes] | io.BufferedIOBase]:
    """Open a file (gzip recognised by its first bytes) or standard input for ``-``.

    Raises
    ------
    InputError
        The file is missing, a directory or unreadable (the message names the path).
    """
    if path == "-":
        yield sys.stdin.buffer
        return
    try:
        raw = open(path, "rb")  # noqa: SIM115 - closed below
    except FileNotFoundError:
        raise InputError(f"input.path = {path!r}: no such file") from None
    except IsADirectoryError:
        raise InputError(f"input.path = {path!r}: is a directory, not a file") from None
    except OSError as exc:
        raise InputError(f"input.path = {path!r}: cannot be opened ({exc.strerror})") from None
    try:
        if raw.read(2) == b"\x1f\x8b":
            raw.seek(0)
            with gzip.GzipFile(fileobj=raw, mode="rb") as gz:
                yield gz
        else:
            raw.seek(0)
            yield raw
    finally:
        raw.close()


def _batch(lines: list[bytes], base: int, end: int, limit: int, cut: list[int]) -> RecordBatch:
    """A batch of ``lines`` starting at ``base``; ``cut`` lists records already cut short."""
    offsets = line_offsets(lines, base)
    too_long = None
    # lengths from the offsets (each line and its newline), the last one from the end
    longest = np.empty(len(lines), dtype=np.int64)
    if len(lines):
        np.subtract(offsets[1:], offsets[:-1] + 1, out=longest[:-1])
        longest[-1] = len(lines[-1])
    long_lines = np.flatnonzero(longest > limit).tolist()
    if long_lines or cut:
        too_long = np.zeros(len(lines), dtype=bool)
        for i in long_lines:
            lines[i] = lines[i][:limit]
        too_long[long_lines + cut] = True
    return RecordBatch(lines, offsets, end, too_long, "file")


def iter_batches(
    path: str,
    *,
    max_record_bytes: int = 65536,
    block_bytes: int = BLOCK_BYTES,
    start: int = 0,
    stop: int | None = None,
) -> Iterator[RecordBatch]:
    """Read ``path`` as batches of whole lines, in order.

    Parameters
    ----------
    path:
        A file (gzip-compressed files are recognised by their first bytes) or ``-`` for
        standard input.
    max_record_bytes:
        Longer lines are cut to their first ``max_record_bytes`` bytes and marked too long.
    block_bytes:
        Bytes read at a time (a batch holds the whole lines of one block).
    start, stop:
        Read only bytes ``start..stop-1`` of a plain file (not stdin, not gzip). Reads keep
        to the grid of ``block_bytes`` from the start of the file, so a part that starts just
        after the last newline of a block yields exactly the batches a reading of the whole
        file yields there (see :func:`part_starts`).

    Yields
    ------
    RecordBatch
        Offsets are byte offsets in the decompressed stream; the last line needs no newline.
        Offsets of the records after an over-long line are exact.
    """
    if block_bytes < 1:
        raise ConfigError("block_bytes", block_bytes, "must be at least 1")
    limit = max_record_bytes
    offset = start  # of the first byte of ``pending``
    pending = b""
    skipping: tuple[bytes, int] | None = None  # (head, bytes seen) of an over-long line
    with open_input(path) as stream:
        if start or stop is not None:
            if path == "-" or not hasattr(stream, "seekable") or isinstance(stream, gzip.GzipFile):
                raise InputError(f"input.path = {path!r}: only a plain file can be read in parts")
            stream.seek(start)
        pos = start
        while True:
            size = block_bytes - pos % block_bytes
            if stop is not None:
                size = max(min(size, stop - pos), 0)
            try:
                block = stream.read(size) if size else b""
                pos += len(block)
            except (OSError, EOFError, gzip.BadGzipFile) as exc:
                raise InputError(f"input.path = {path!r}: read failed ({exc})") from None
            if skipping is not None:
                head, seen = skipping
                nl = block.find(b"\n")
                if nl < 0 and block:
                    skipping = (head, seen + len(block))
                    continue
                # the over-long line ends here (or at the end of input): one cut record
                length = seen + (nl if nl >= 0 else 0)
                end = offset + length + (1 if nl >= 0 else 0)
                yield RecordBatch(
                    [head], np.array([offset], dtype=np.int64), end, np.ones(1, dtype=bool), "file"
                )
                offset = end
                skipping = None
                if nl < 0:  # the input ended inside the over-long line
                    break
                block = block[nl + 1 :]
                if not block:  # the newline was the block's last byte: read on
                    continue
            if block:
                data = pending + block if pending else block
                cut = data.rfind(b"\n")
                if cut < 0:
                    pending = data
                    if len(pending) > limit + block_bytes:
                        skipping = (pending[:limit], len(pending))
                        pending = b""
                    continue
                pending = data[cut + 1 :]
                lines = data[:cut].split(b"\n")
                end = offset + cut + 1
            else:
                if not pending:
                    break
                lines, end, pending = [pending], offset + len(pending), b""
            yield _batch(lines, offset, end, limit, [])
            offset = end
            if not block:
                break


def part_starts(path: str, size: int, parts: int, block_bytes: int = BLOCK_BYTES) -> list[int]:
    """Where to cut a plain file of ``size`` bytes into about ``parts`` parts that read (with
    :func:`iter_batches` ``start``/``stop``) exactly as the whole file reads: each cut is just
    after the last newline of a block of the ``block_bytes`` grid, so every batch of the
    whole file falls in one part. Returns the ascending cut offsets, ``0`` first (a block
    without a newline cannot be cut after; fewer parts then).
    """
    blocks = -(-size // block_bytes)
    cuts = [0]
    if parts <= 1 or blocks <= 1:
        return cuts
    with open(path, "rb") as fh:
        for j in range(1, parts):
            block = max(round(j * blocks / parts), 1)  # cut in the block ending at block*B
            if block * block_bytes >= size:
                break
            fh.seek((block - 1) * block_bytes)
            data = fh.read(block_bytes)
            nl = data.rfind(b"\n")
            cut = (block - 1) * block_bytes + nl + 1
            if nl >= 0 and cut > cuts[-1] and cut < size:
                cuts.append(cut)
    return cuts
