"""What flows from a source to a decoder, and from a decoder to the counting pipeline.

A source hands out :class:`RecordBatch` objects: consecutive records (one line each, without
its newline) read together, with where each starts in the source. A decoder turns a batch into
:class:`Decoded` transactions plus the records it set aside. The same two types serve the live
service, ``streamcount replay`` and the tests, so there is one decoding path per format.

Offsets are positions in the source: byte offsets for files and standard input (of the
decompressed stream for ``.gz`` files), and ``None`` where a source has no byte positions
(an HTTP request body); a message-bus source numbers its messages instead.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamcount.errors import ParseError

__all__ = [
    "BusStats",
    "Decoded",
    "RecordBatch",
    "SourceHealth",
    "Tokens",
    "Transaction",
    "line_offsets",
]


def line_offsets(lines: Sequence[bytes], start: int) -> np.ndarray:
    """Start offsets of consecutive newline-terminated ``lines`` beginning at ``start``.

    >>> line_offsets([b"tea jam", b"", b"scone"], 10).tolist()
    [10, 18, 19]
    """
    out = np.empty(len(lines), dtype=np.int64)
    if len(lines):
        lengths = np.fromiter(map(len, lines), dtype=np.int64, count=len(lines))
        out[0] = start
        np.cumsum(lengths[:-1] + 1, out=out[1:])
        out[1:] += start
    return out


@dataclass(slots=True)
class RecordBatch:
    """Records read together from one source, in source order.

    Attributes
    ----------
    lines:
        The records, each without its newline. A record cut short by the source (longer than
        ``input.max_record_bytes``) holds its first bytes only, and ``too_long`` marks it.
    offsets:
        Where each record starts in the source (int64, one per record), or ``None`` when the
        source has no positions.
    end_offset:
        Just after the last record (after its newline), or ``None``.
    too_long:
        Per record, whether the source cut it short (``None``: none was).
    source:
        The source's name (``file``, ``stdin``, ``http``...), written into dead letters.
    on_done:
        Called once the batch has been decoded and counted, with the transactions accepted
        and the records set aside (HTTP ingest answers its request from it).
    """

    lines: list[bytes]
    offsets: np.ndarray | None = None
    end_offset: int | None = None
    too_long: np.ndarray | None = None
    source: str = "memory"
    on_done: Callable[[int, list[ParseError]], None] | None = field(default=None, repr=False)

    def __len__(self) -> int:
        return len(self.lines)

    def offset(self, i: int) -> int | None:
        """Where record ``i`` starts, or ``None``."""
        return None if self.offsets is None else int(self.offsets[i])

    def end_of(self, i: int) -> int | None:
        """Just after record ``i`` (after its newline), or ``None``."""
        if self.offsets is None:
            return None
        if i + 1 < len(self.lines):
            return int(self.offsets[i + 1])
        return self.end_offset

    @classmethod
    def from_lines(
        cls,
        lines: Sequence[bytes | str],
        *,
        start: int = 0,
        source: str = "memory",
        max_record_bytes: int | None = None,
    ) -> RecordBatch:
        """A batch of whole records (tests, examples, in-memory feeds); offsets count bytes as
        if the records were written one per line from ``start``.

        >>> b = RecordBatch.from_lines(["tea jam", b"scone"])
        >>> b.lines, b.offsets.tolist(), b.end_offset
        ([b'tea jam', b'scone'], [0, 8], 14)
        """
        data = [x.encode("utf-8") if isinstance(x, str) else bytes(x) for x in lines]
        data = [d[:-1] if d.endswith(b"\n") else d for d in data]
        offsets = line_offsets(data, start)
        end = start + sum(map(len, data)) + len(data)
        too_long = None
        if max_record_bytes is not None and any(len(d) > max_record_bytes for d in data):
            too_long = np.array([len(d) > max_record_bytes for d in data], dtype=bool)
            data = [d[:max_record_bytes] for d in data]
        return cls(data, offsets, end, too_long, source)


@dataclass(frozen=True, slots=True)
class Transaction:
    """One basket: the distinct items bought together, with optional time and id.

    Attributes
    ----------
    items:
        Distinct item names in order of first appearance.
    ts:
        Event time in epoch seconds, or ``None`` when the record has none.
    id:
        The record's id (JSON ``id_field`` or the CSV order id), always a string.
    offset:
        Where the record (for CSV, the first row of the order) starts in the source.
    end_offset:
        Just after the record (for CSV, after the last row of the order).
    """

    items: tuple[str, ...]
    ts: float | None = None
    id: str | None = None
    offset: int | None = None
    end_offset: int | None = None


@dataclass(slots=True)
class Tokens:
    """Transactions as codes into a table of distinct names: what a decoder that avoids one
    Python object per item hands over (basket lines).

    Attributes
    ----------
    names:
        The distinct names the codes index (one Python string per distinct name, not per
        occurrence; in no particular order).
    codes:
        int32 codes into ``names`` of every transaction one after another, each
        transaction's codes distinct and in the order its items were read.
    lengths:
        int64, how many codes belong to each transaction.

    Examples
    --------
    >>> t = Tokens(["jam", "tea"], np.array([1, 0, 0], dtype=np.int32), np.array([2, 1]))
    >>> t.baskets()
    [['tea', 'jam'], ['jam']]
    >>> t.select(np.array([False, True])).baskets()
    [['jam']]
    """

    names: list[str]
    codes: np.ndarray
    lengths: np.ndarray

    def __len__(self) -> int:
        return int(self.lengths.shape[0])

    def baskets(self) -> list[list[str]]:
        """One list of names per transaction (one Python object per item: for views and
        for paths that need names, not for counting)."""
        names = self.names
        flat = [names[c] for c in self.codes.tolist()]
        ends = np.cumsum(self.lengths).tolist()
        starts = [0, *ends[:-1]] if ends else []
        return [flat[a:b] for a, b in zip(starts, ends, strict=True)]

    def select(self, keep: np.ndarray) -> Tokens:
        """The transactions whose ``keep`` flag is set (the name table is kept as it is)."""
        keep = np.asarray(keep, dtype=bool)
        rows = np.repeat(keep, self.lengths)
        return Tokens(self.names, self.codes[rows], self.lengths[keep])

    def concat(self, other: Tokens) -> Tokens:
        """These transactions, then ``other``'s (one name table: one dict operation per
        distinct name of ``other``)."""
        index = {name: i for i, name in enumerate(self.names)}
        names = list(self.names)
        table = np.empty(len(other.names), dtype=np.int32)
        for j, name in enumerate(other.names):
            code = index.get(name)
            if code is None:
                code = index[name] = len(names)
                names.append(name)
            table[j] = code
        return Tokens(
            names,
            np.concatenate((self.codes, table[other.codes])).astype(np.int32, copy=False),
            np.concatenate((self.lengths, other.lengths)).astype(np.int64, copy=False),
        )


class Decoded:
    """Transactions decoded from one or more batches, in order, and the records set aside.

    Attributes
    ----------
    baskets:
        One list of distinct item names per transaction. A decoder may hand over
        :attr:`tokens` instead; the lists are then built from them when first asked for.
    ts:
        Per transaction event time, or ``None`` for a format without times (basket lines).
    offsets:
        Per transaction, where its (first) record starts in the source, or ``None`` when
        unknown; used to dead-letter a transaction the engine sets aside.
    errors:
        Records set aside, each a :class:`~streamcount.errors.ParseError` with its offset.
    source:
        The source's name.
    raws:
        Per transaction, the record it came from (``None`` where a transaction spans records,
        e.g. a CSV order); what the dead-letter file shows when the engine sets it aside.
    tokens:
        The same transactions as codes into a table of distinct names (:class:`Tokens`), or
        ``None``; the counting pipeline interns them in bulk (no Python object per item).
    """

    __slots__ = ("_baskets", "errors", "offsets", "raws", "source", "tokens", "ts")

    def __init__(
        self,
        baskets: list[list[str]] | None = None,
        ts: list[float | None] | None = None,
        offsets: list[int | None] | None = None,
        errors: list[ParseError] | None = None,
        source: str = "memory",
        raws: list[bytes | None] | None = None,
        *,
        tokens: Tokens | None = None,
    ) -> None:
        if baskets is None and tokens is None:
            baskets = []
        self._baskets = baskets
        self.ts = ts
        self.offsets = offsets
        self.errors: list[ParseError] = [] if errors is None else errors
        self.source = source
        self.raws = raws
        self.tokens = tokens

    @property
    def baskets(self) -> list[list[str]]:
        if self._baskets is None:
            assert self.tokens is not None
            self._baskets = self.tokens.baskets()
        return self._baskets

    @baskets.setter
    def baskets(self, value: list[list[str]]) -> None:
        self._baskets = value
        self.tokens = None

    def __len__(self) -> int:
        if self._baskets is None and self.tokens is not None:
            return len(self.tokens)
        return len(self.baskets)

    def __repr__(self) -> str:
        return (
            f"Decoded(baskets={self.baskets!r}, ts={self.ts!r}, offsets={self.offsets!r}, "
            f"errors={self.errors!r}, source={self.source!r}, raws={self.raws!r})"
        )

    @classmethod
    def from_transactions(
        cls, txs: Sequence[Transaction], *, source: str = "memory", timed: bool = True
    ) -> Decoded:
        """Transactions as a :class:`Decoded` (``timed=False`` drops the times)."""
        return cls(
            [list(t.items) for t in txs],
            [t.ts for t in txs] if timed else None,
            [t.offset for t in txs],
            [],
            source,
        )

    def extend(self, other: Decoded) -> None:
        """Append ``other`` (which must agree on having times) in place."""
        n = len(self)
        m = len(other)
        if self._baskets is None and other._baskets is None:
            assert self.tokens is not None and other.tokens is not None
            self.tokens = self.tokens.concat(other.tokens)
        else:
            self.baskets = self.baskets + other.baskets
        if other.ts is not None or self.ts is not None:
            self.ts = (self.ts or [None] * n) + (other.ts or [None] * m)
        if other.offsets is not None or self.offsets is not None:
            self.offsets = (self.offsets or [None] * n) + (other.offsets or [None] * m)
        if other.raws is not None or self.raws is not None:
            self.raws = (self.raws or [None] * n) + (other.raws or [None] * m)
        self.errors.extend(other.errors)

    def raw(self, i: int) -> bytes:
        """The record transaction ``i`` came from, or its items as a basket line."""
        raw = None if self.raws is None else self.raws[i]
        return raw if raw is not None else " ".join(self.baskets[i]).encode("utf-8")

    def transactions(self) -> list[Transaction]:
        """The decoded transactions as :class:`Transaction` objects."""
        n = len(self)
        ts = self.ts if self.ts is not None else [None] * n
        offsets = self.offsets if self.offsets is not None else [None] * n
        return [
            Transaction(tuple(b), t, None, o)
            for b, t, o in zip(self.baskets, ts, offsets, strict=True)
        ]


@dataclass(frozen=True, slots=True)
class BusStats:
    """What the source reports for readiness and metrics (totals since it started).

    Attributes
    ----------
    connected:
        Connected to a server with the consumer set up.
    lag_messages:
        Messages in the stream for this consumer not yet counted (on the server or fetched).
    redeliveries:
        Messages the server delivered more than once.
    reconnects:
        Connections made after the first.
    gap_messages:
        Messages lost to an accepted retention gap.
    terminated:
        Messages terminated because none of their records could be decoded.
    """

    connected: bool
    lag_messages: int
    redeliveries: int
    reconnects: int
    gap_messages: int
    terminated: int


@dataclass(frozen=True, slots=True)
class SourceHealth:
    """How a source is doing, for readiness, the metrics and /v1/status.

    Attributes
    ----------
    connected:
        The source can deliver records (a bus source is connected with its consumer set up;
        files and pipes always are).
    bus:
        A message-bus source's running totals, ``None`` for other sources.
    gap:
        The last retention gap a bus source found (records lost while the service was down),
        ``None`` when there was none.
    """

    connected: bool = True
    bus: BusStats | None = None
    gap: dict[str, Any] | None = None
