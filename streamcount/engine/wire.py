"""Wire format of one closed pane's summary, for sending panes between processes.

A worker that counts part of a feed sends each closed pane's Lossy Counting summary to whoever
merges the parts; summaries of disjoint parts add up with their error bounds (the pane-sum rule
of :mod:`streamcount.engine.panesum`). This module turns one summary into bytes and back, and
cuts the bytes into messages no larger than a bus allows. Nothing here knows about the bus.

Payload (all integers little-endian)::

    magic "SCPW" | version u16 | flags u16 | body | SHA-256 of everything before it (32 bytes)

    body:   pane_index i64 | transactions u64 | epsilon f64 | start f64 | end f64
            | max_itemset_size u8
            | fingerprint, catalogue, worker: each u16 length + UTF-8
            | names: count u32, lengths (array), bytes (array)
            | per itemset size k = 1..max_itemset_size:
              rows u32, item ids (array of rows x k), f (array), delta (array)

    array:  width u8 (1, 2, 4 or 8: unsigned integers of that many bytes) | count u32 | data

``flags`` bit 0: ``start`` is set, bit 1: ``end`` is set. Item ids index the payload's own
``names`` list: the names of the items the summary tracks, in the sender's id order, so the
receiver never needs the sender's vocabulary (item *names* travel, not worker-local ids), and
rows keep their lexicographic order. Each array takes the narrowest width its values need, so
a pane at epsilon 0.001 with itemsets up to 3 (tens of thousands of entries) is a few hundred
kilobytes.

Chunks, for a bus with a largest message (NATS: ``max_payload``, 1 MB by default)::

    magic "SCPC" | version u16 | flags u16 | SHA-256 of the whole payload (32) | payload length
    u64 | chunk index u32 | chunk count u32 | CRC-32 of this chunk (header with this field 0,
    and body) u32 | body

:func:`join_chunks` (or a :class:`Reassembler` fed one message at a time) refuses a damaged,
missing, duplicated or foreign chunk, and checks the payload against the SHA-256 that every
chunk carries; :func:`decode_pane` checks the payload's own SHA-256 before reading anything
else. Every refusal is a :class:`WireError` saying what was wrong.
"""

from __future__ import annotations

import hashlib
import math
import struct
import zlib
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from streamcount.engine.counters import Level
from streamcount.errors import StreamcountError

__all__ = [
    "CHUNK_HEADER_BYTES",
    "DEFAULT_MAX_BYTES",
    "WIRE_VERSION",
    "PaneMeta",
    "Reassembler",
    "WireError",
    "chunks",
    "decode_pane",
    "encode_pane",
    "join_chunks",
]

#: the version written; a reader refuses any other
WIRE_VERSION = 1
#: NATS's default ``max_payload``: the largest message a server accepts unless configured
DEFAULT_MAX_BYTES = 1 << 20

_MAGIC = b"SCPW"
_CHUNK_MAGIC = b"SCPC"
_DIGEST = 32
_HEAD = struct.Struct("<4sHH")
_FIXED = struct.Struct("<qQdddB")
_CHUNK = struct.Struct("<4sHH32sQIII")
#: bytes of a chunk's header; a chunk carries at most ``max_bytes`` minus this of payload
CHUNK_HEADER_BYTES = _CHUNK.size
_WIDTHS: dict[int, np.dtype[Any]] = {
    1: np.dtype("<u1"),
    2: np.dtype("<u2"),
    4: np.dtype("<u4"),
    8: np.dtype("<u8"),
}


class WireError(StreamcountError):
    """Bytes that are not a valid pane summary or chunk (damaged, truncated, missing parts,
    another version)."""


@dataclass(frozen=True, slots=True)
class PaneMeta:
    """What travels with a pane's counts.

    Attributes
    ----------
    pane_index:
        The pane number (``floor(ts / pane_seconds)`` for a time-based window).
    transactions:
        Transactions the summary counted (``n``).
    epsilon:
        The summary's Lossy Counting error (0: exact).
    max_itemset_size:
        Largest itemset size counted (the number of levels).
    fingerprint:
        The sender's settings fingerprint; a receiver refuses panes whose fingerprint differs
        from its own.
    catalogue:
        The version of the item catalogue the names come from (free text).
    start, end:
        The pane's time span (epoch seconds), or ``None``.
    worker:
        Who sent it (free text, e.g. the worker's name).
    """

    pane_index: int
    transactions: int
    epsilon: float
    max_itemset_size: int
    fingerprint: str
    catalogue: str
    start: float | None = None
    end: float | None = None
    worker: str = ""

    @property
    def absent_bound(self) -> int:
        """``ceil(n / w)``, ``w = ceil(1 / epsilon)``: the bound on the count of an itemset
        the summary does not track (0 when exact)."""
        if self.epsilon == 0:
            return 0
        width = math.ceil(1.0 / self.epsilon - 1e-12)
        return -(-self.transactions // width)


# -- encoding ------------------------------------------------------------------------------------


def _text(value: str) -> bytes:
    return value.encode("utf-8", "surrogatepass")


def _put_str(out: list[bytes], value: str, what: str) -> None:
    data = _text(value)
    if len(data) > 0xFFFF:
        raise ValueError(f"{what} is {len(data)} bytes; at most 65535 travel")
    out.append(struct.pack("<H", len(data)))
    out.append(data)


def _put_array(out: list[bytes], values: np.ndarray, what: str) -> None:
    flat = np.ascontiguousarray(values).reshape(-1)
    if flat.size and int(flat.min()) < 0:
        raise ValueError(f"{what} holds a negative value; only non-negative integers travel")
    top = int(flat.max()) if flat.size else 0
    width = next(w for w in (1, 2, 4, 8) if top < 1 << (8 * w))
    if flat.size >= 1 << 32:
        raise ValueError(f"{what} has {flat.size} values; at most 2**32 - 1 travel")
    out.append(struct.pack("<BI", width, flat.size))
    out.append(flat.astype(_WIDTHS[width], copy=False).tobytes())


def encode_pane(summary: Any, names: Sequence[str], meta: PaneMeta) -> bytes:
    """One closed pane's summary as a self-checking payload (see the module notes).

    Parameters
    ----------
    summary:
        The pane's summary: ``levels`` (one :class:`~streamcount.engine.counters.Level` per
        itemset size, ids indexing ``names``) and, when present, ``n``.
    names:
        The sender's item names by id (its vocabulary); only those the summary tracks travel.
    meta:
        The header; ``transactions`` and ``max_itemset_size`` must agree with the summary.

    Raises
    ------
    ValueError
        The summary and ``meta`` disagree, or a value cannot travel (a negative count, an id
        outside ``names``, a string longer than 65,535 bytes).
    """
    levels: Sequence[Level] = tuple(summary.levels)
    if len(levels) != meta.max_itemset_size:
        raise ValueError(
            f"the summary has {len(levels)} levels but meta.max_itemset_size is "
            f"{meta.max_itemset_size}"
        )
    n = getattr(summary, "n", meta.transactions)
    if n != meta.transactions:
        raise ValueError(f"the summary counted {n} transactions, meta says {meta.transactions}")
    if not 1 <= meta.max_itemset_size <= 255:
        raise ValueError(f"max_itemset_size = {meta.max_itemset_size}: must be in 1..255")
    used = np.unique(np.concatenate([lv.items.reshape(-1) for lv in levels] or [np.zeros(0)]))
    used = used.astype(np.int64)
    if used.size and (used[0] < 0 or used[-1] >= len(names)):
        raise ValueError(f"item ids reach {int(used[-1])}, but {len(names)} names were given")
    encoded = [_text(names[i]) for i in used.tolist()]

    flags = (1 if meta.start is not None else 0) | (2 if meta.end is not None else 0)
    out: list[bytes] = [_HEAD.pack(_MAGIC, WIRE_VERSION, flags)]
    out.append(
        _FIXED.pack(
            meta.pane_index,
            meta.transactions,
            meta.epsilon,
            0.0 if meta.start is None else meta.start,
            0.0 if meta.end is None else meta.end,
            meta.max_itemset_size,
        )
    )
    _put_str(out, meta.fingerprint, "the fingerprint")
    _put_str(out, meta.catalogue, "the catalogue version")
    _put_str(out, meta.worker, "the worker name")
    out.append(struct.pack("<I", len(encoded)))
    _put_array(out, np.fromiter(map(len, encoded), np.int64, len(encoded)), "name lengths")
    _put_array(out, np.frombuffer(b"".join(encoded), dtype=np.uint8), "names")
    for k, level in enumerate(levels, start=1):
        items = np.asarray(level.items)
        if (
            items.ndim != 2
            or items.shape[1] != k
            or not len(level.f) == len(level.delta) == len(items)
        ):
            raise ValueError(f"level {k}: items of shape {items.shape} do not match f and delta")
        rows = int(items.shape[0])
        out.append(struct.pack("<I", rows))
        local = np.searchsorted(used, items.reshape(-1)) if rows else items.reshape(-1)
        _put_array(out, local, f"level {k} item ids")
        _put_array(out, np.asarray(level.f), f"level {k} f")
        _put_array(out, np.asarray(level.delta), f"level {k} delta")
    body = b"".join(out)
    return body + hashlib.sha256(body).digest()


# -- decoding ------------------------------------------------------------------------------------


class _Reader:
    """Reads the body of a payload whose checksum already matched; any inconsistency left
    (which only a faulty encoder could produce) is a :class:`WireError`."""

    def __init__(self, data: memoryview, pos: int, end: int) -> None:
        self.data, self.pos, self.end = data, pos, end

    def take(self, n: int, what: str) -> memoryview:
        if n < 0 or self.pos + n > self.end:
            raise WireError(f"pane summary truncated in {what}")
        view = self.data[self.pos : self.pos + n]
        self.pos += n
        return view

    def unpack(self, fmt: struct.Struct, what: str) -> tuple[Any, ...]:
        return fmt.unpack(self.take(fmt.size, what))

    def text(self, what: str) -> str:
        (size,) = struct.unpack("<H", self.take(2, what))
        try:
            return bytes(self.take(size, what)).decode("utf-8", "surrogatepass")
        except UnicodeDecodeError as exc:
            raise WireError(f"{what} is not UTF-8: {exc}") from None

    def array(self, what: str, count: int | None = None) -> np.ndarray:
        width, size = struct.unpack("<BI", self.take(5, what))
        dtype = _WIDTHS.get(width)
        if dtype is None:
            raise WireError(f"{what}: unknown value width {width}")
        if count is not None and size != count:
            raise WireError(f"{what}: {size} values where {count} were expected")
        raw = self.take(size * width, what)
        values = np.frombuffer(raw, dtype=dtype)
        if width == 8 and size and int(values.max()) >= 1 << 63:
            raise WireError(f"{what}: a value beyond the signed 64-bit range")
        return values.astype(np.int64)

    def blob(self, what: str) -> bytes:
        width, size = struct.unpack("<BI", self.take(5, what))
        if width != 1:
            raise WireError(f"{what}: bytes written {width} to a value")
        return bytes(self.take(size, what))


def _check_payload(data: bytes | bytearray | memoryview) -> memoryview:
    view = memoryview(data)
    if len(view) < _HEAD.size + _DIGEST or bytes(view[:4]) != _MAGIC:
        raise WireError("not a streamcount pane summary (no 'SCPW' magic at the start)")
    _, version, _ = _HEAD.unpack(view[: _HEAD.size])
    if version != WIRE_VERSION:
        raise WireError(
            f"pane summary of wire version {version}; this streamcount reads version "
            f"{WIRE_VERSION} (run the same streamcount version on every process)"
        )
    body, digest = view[:-_DIGEST], bytes(view[-_DIGEST:])
    if hashlib.sha256(body).digest() != digest:
        raise WireError("pane summary damaged: its SHA-256 checksum does not match")
    return view


def decode_pane(
    data: bytes | bytearray | memoryview,
) -> tuple[PaneMeta, tuple[Level, ...], list[str]]:
    """Read a payload made by :func:`encode_pane`: ``(meta, levels, names)``, the levels'
    item ids indexing ``names``.

    Raises
    ------
    WireError
        Wrong magic or version, a checksum that does not match, or an inconsistent body.
    """
    view = _check_payload(data)
    _, _, flags = _HEAD.unpack(view[: _HEAD.size])
    r = _Reader(view, _HEAD.size, len(view) - _DIGEST)
    pane, n, epsilon, start, end, k_max = r.unpack(_FIXED, "the header")
    fingerprint = r.text("the fingerprint")
    catalogue = r.text("the catalogue version")
    worker = r.text("the worker name")
    meta = PaneMeta(
        pane,
        n,
        epsilon,
        k_max,
        fingerprint,
        catalogue,
        start if flags & 1 else None,
        end if flags & 2 else None,
        worker,
    )
    (count,) = r.unpack(struct.Struct("<I"), "the name count")
    lengths = r.array("the name lengths", count)
    blob = r.blob("the names")
    if int(lengths.sum()) != len(blob):
        raise WireError("the names' lengths do not add up to their bytes")
    names: list[str] = []
    pos = 0
    try:
        for size in lengths.tolist():
            names.append(blob[pos : pos + size].decode("utf-8", "surrogatepass"))
            pos += size
    except UnicodeDecodeError as exc:
        raise WireError(f"an item name is not UTF-8: {exc}") from None
    levels = []
    for k in range(1, k_max + 1):
        (rows,) = r.unpack(struct.Struct("<I"), f"level {k}")
        items = r.array(f"level {k} item ids", rows * k).reshape(rows, k)
        f = r.array(f"level {k} f", rows)
        delta = r.array(f"level {k} delta", rows)
        if rows and int(items.max()) >= len(names):
            raise WireError(f"level {k}: an item id beyond the {len(names)} names")
        if k > 1 and rows and not (np.diff(items, axis=1) > 0).all():
            raise WireError(f"level {k}: a row whose item ids do not ascend")
        levels.append(Level(items.astype(np.int32), f, delta))
    if r.pos != r.end:
        raise WireError(f"{r.end - r.pos} bytes left over after the last level")
    return meta, tuple(levels), names


# -- chunks --------------------------------------------------------------------------------------


def chunks(data: bytes, max_bytes: int = DEFAULT_MAX_BYTES) -> list[bytes]:
    """``data`` cut into messages of at most ``max_bytes`` bytes each, headers included.

    >>> parts = chunks(b"x" * 100, max_bytes=CHUNK_HEADER_BYTES + 40)
    >>> len(parts), join_chunks(reversed(parts)) == b"x" * 100
    (3, True)
    """
    room = max_bytes - CHUNK_HEADER_BYTES
    if room < 1:
        raise ValueError(
            f"max_bytes = {max_bytes}: must exceed the {CHUNK_HEADER_BYTES}-byte header"
        )
    digest = hashlib.sha256(data).digest()
    count = max(1, -(-len(data) // room))
    if count >= 1 << 32:
        raise ValueError(f"{len(data)} bytes would need {count} chunks")
    out = []
    view = memoryview(data)
    for index in range(count):
        body = view[index * room : (index + 1) * room]
        head = _CHUNK.pack(_CHUNK_MAGIC, WIRE_VERSION, 0, digest, len(data), index, count, 0)
        crc = zlib.crc32(body, zlib.crc32(head))
        out.append(head[:-4] + struct.pack("<I", crc) + body)
    return out


@dataclass(frozen=True, slots=True)
class _Chunk:
    digest: bytes
    total: int
    index: int
    count: int
    body: bytes


def _parse_chunk(part: bytes | bytearray | memoryview) -> _Chunk:
    view = memoryview(part)
    if len(view) < CHUNK_HEADER_BYTES or bytes(view[:4]) != _CHUNK_MAGIC:
        raise WireError("not a streamcount chunk (no 'SCPC' magic at the start)")
    _, version, _, digest, total, index, count, crc = _CHUNK.unpack(view[:CHUNK_HEADER_BYTES])
    if version != WIRE_VERSION:
        raise WireError(f"chunk of wire version {version}; this streamcount reads {WIRE_VERSION}")
    head = bytes(view[: CHUNK_HEADER_BYTES - 4]) + b"\0\0\0\0"
    body = view[CHUNK_HEADER_BYTES:]
    if zlib.crc32(body, zlib.crc32(head)) != crc:
        raise WireError(f"chunk {index + 1} of {count} damaged: its CRC-32 does not match")
    if count < 1 or index >= count:
        raise WireError(f"chunk {index + 1} of {count}: an index beyond the count")
    return _Chunk(digest, total, index, count, bytes(body))


def _assemble(parts: dict[int, _Chunk], first: _Chunk) -> bytes:
    missing = [i + 1 for i in range(first.count) if i not in parts]
    if missing:
        shown = ", ".join(map(str, missing[:10])) + (" ..." if len(missing) > 10 else "")
        raise WireError(f"chunks {shown} of {first.count} are missing")
    data = b"".join(parts[i].body for i in range(first.count))
    if len(data) != first.total:
        raise WireError(f"chunks hold {len(data)} bytes, their header says {first.total}")
    if hashlib.sha256(data).digest() != first.digest:
        raise WireError("reassembled payload damaged: its SHA-256 does not match the chunks'")
    return data


def _admit(parts: dict[int, _Chunk], chunk: _Chunk) -> None:
    first = next(iter(parts.values()), None)
    if first is not None and (first.total, first.count) != (chunk.total, chunk.count):
        raise WireError(
            f"chunk {chunk.index + 1} disagrees with the others on the payload "
            f"({chunk.count} chunks of {chunk.total} bytes, not {first.count} of {first.total})"
        )
    if chunk.index in parts:
        raise WireError(f"chunk {chunk.index + 1} of {chunk.count} received twice")
    parts[chunk.index] = chunk


def join_chunks(parts: Iterable[bytes | bytearray | memoryview]) -> bytes:
    """The payload the chunks were cut from, in any order; refuses a damaged, missing,
    duplicated or foreign chunk (:class:`WireError`)."""
    got: dict[int, _Chunk] = {}
    digest = None
    for part in parts:
        chunk = _parse_chunk(part)
        if digest is not None and chunk.digest != digest:
            raise WireError("chunks of two different payloads were mixed")
        digest = chunk.digest
        _admit(got, chunk)
    if not got:
        raise WireError("no chunk given")
    return _assemble(got, next(iter(got.values())))


class Reassembler:
    """Payloads rebuilt from chunks arriving one at a time, several payloads interleaved.

    :meth:`add` returns the payload when its last chunk arrives, else ``None``. A chunk that
    is damaged, or a second copy of one already held, raises :class:`WireError` (deliveries
    are deduplicated before, by the bus's sequence numbers).
    """

    def __init__(self) -> None:
        self._open: dict[bytes, dict[int, _Chunk]] = {}

    def add(self, part: bytes | bytearray | memoryview) -> bytes | None:
        chunk = _parse_chunk(part)
        parts = self._open.setdefault(chunk.digest, {})
        try:
            _admit(parts, chunk)
        except WireError:
            if not parts:
                del self._open[chunk.digest]
            raise
        if len(parts) < chunk.count:
            return None
        del self._open[chunk.digest]
        return _assemble(parts, chunk)

    @property
    def pending(self) -> list[tuple[str, int, int]]:
        """Payloads still incomplete: ``(SHA-256 prefix, chunks held, chunks expected)``."""
        return [
            (digest.hex()[:16], len(parts), next(iter(parts.values())).count)
            for digest, parts in self._open.items()
            if parts
        ]

    def discard(self, prefix: str) -> None:
        """Forget an incomplete payload (e.g. after a timeout), by its SHA-256 prefix."""
        for digest in [d for d in self._open if d.hex().startswith(prefix)]:
            del self._open[digest]
