"""Record formats: raw records (one line each) turned into transactions.

Three formats, chosen by ``input.format``:

``basket``
    One transaction per line; items separated by whitespace and/or commas
    (``tea, scone  jam``). Blank lines are skipped (they are not transactions).
``jsonl``
    One JSON object per line. ``input.jsonl.items_field`` (a dotted path such as
    ``order.lines``) names the list of items, ``ts_field`` and ``id_field`` the optional
    timestamp and id; ``item_name_field`` picks the name out of each element when the list
    holds objects.
``csv``
    One row per line item (order id, item, timestamp, optional quantity); the rows of an
    order are grouped into one transaction by :class:`CsvOrderDecoder` (its docstring states
    the rule for when an order closes).

Every decoder follows the :class:`Decoder` protocol. A bad record raises
:class:`~streamcount.errors.ParseError` whose ``reason`` is one of :data:`REASONS`; the caller
dead-letters it and carries on; a raising ``feed`` leaves the decoder's state unchanged (one
exception: the CSV decoder marks an order that grew too large so its later rows are set aside).
Items of a transaction are de-duplicated in order of first appearance (a basket is a set), and
a record with more distinct items than ``max_basket_items`` is set aside whole, never
truncated.

:func:`iter_file_chunks` is the bulk reader used for replaying a file as fast as possible;
for the basket format it avoids building one object per transaction.

Offsets are byte offsets in the (decompressed) source: ``offset`` is where a record starts
and ``end_offset`` is just after it (after its newline).
"""

from __future__ import annotations

import contextlib
import csv
import gc
import gzip
import json
import math
import sys
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from typing import IO, TYPE_CHECKING, Any, Protocol

from streamcount.config.settings import MAX_TIMESTAMP, CsvConfig, InputConfig, JsonlConfig
from streamcount.errors import ConfigError, InputError, ParseError

if TYPE_CHECKING:
    from streamcount.intake.sources import RawRecord

__all__ = [
    "FORMATS",
    "MAX_TIMESTAMP",
    "REASONS",
    "BasketDecoder",
    "Chunk",
    "CsvOrderDecoder",
    "Decoder",
    "JsonlDecoder",
    "Transaction",
    "decode_basket_records",
    "decode_raw",
    "iter_file_chunks",
    "make_decoder",
]

#: the record formats :func:`make_decoder` knows
FORMATS = ("basket", "jsonl", "csv")

#: every reason a decoder gives for rejecting a record (``too_late`` is the engine's)
REASONS = (
    "malformed",
    "bad_encoding",
    "too_long",
    "too_many_items",
    "missing_field",
    "wrong_type",
    "empty",
)

_SHOW_CHARS = 80
_BLOCK_BYTES = 1 << 20  # bulk reads: large enough that per-block overhead vanishes


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


class Decoder(Protocol):
    """Turns raw records into transactions; implemented by the three decoders below."""

    def feed(self, record: bytes, offset: int, end_offset: int) -> list[Transaction]:
        """Decode one record (no newline); raise ParseError (state unchanged) if it is bad."""
        ...

    def flush_due(self, event_time: float) -> list[Transaction]:
        """Transactions held back that are due to close at ``event_time``."""
        ...

    def flush_all(self) -> list[Transaction]:
        """Every transaction still held back (end of input, shutdown)."""
        ...

    def safe_offset(self, consumed_end: int) -> int:
        """Source offset from which re-reading reproduces the decoder's pending state."""
        ...

    def state_dict(self) -> dict[str, Any]:
        """The pending state as a JSON-able mapping (empty for stateless decoders)."""
        ...

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned."""
        ...


# ---------------------------------------------------------------------------------------------
# shared helpers


def _show(value: object) -> str:
    """``repr`` of a value, truncated so a message stays readable."""
    text = repr(value)
    if len(text) > _SHOW_CHARS:
        text = text[: _SHOW_CHARS - 3] + "..."
    return text


def _check_encoding(encoding: str) -> None:
    """Reject encodings in which a newline or comma is not the ASCII byte (e.g. UTF-16)."""
    try:
        probe = "\n, ".encode(encoding)
    except LookupError:
        raise ConfigError(
            "input.encoding", encoding, "is not a known text encoding; use e.g. 'utf-8'"
        ) from None
    if probe != b"\n, ":
        raise ConfigError(
            "input.encoding",
            encoding,
            "records are split on newline bytes, so the encoding must be ASCII-compatible "
            "(utf-8, latin-1, cp1252...); re-encode the feed as UTF-8",
        )


def _dedupe(items: list[str]) -> list[str]:
    """Drop repeated items, keeping the order of first appearance."""
    if len(items) > 1 and len(set(items)) != len(items):
        return list(dict.fromkeys(items))
    return items


def _decode_text(record: bytes, offset: int, encoding: str, max_record_bytes: int) -> str:
    """Length check, then strict decoding; the two reasons every format shares."""
    if len(record) > max_record_bytes:
        raise ParseError(
            "too_long",
            f"record is {len(record)} bytes, more than max_record_bytes = {max_record_bytes}",
            offset=offset,
            raw=record[:max_record_bytes],
        )
    try:
        text = record.decode(encoding)
    except UnicodeDecodeError as exc:
        raise ParseError(
            "bad_encoding",
            f"byte {exc.start} ({_show(record[exc.start : exc.start + 4])}) is not valid "
            f"{encoding}: {exc.reason}",
            offset=offset,
            raw=record,
        ) from None
    if offset == 0 and text.startswith("\ufeff"):
        text = text[1:]  # a byte-order mark at the start of a file is not data
    return text


def _too_many(n: int, max_basket_items: int, offset: int, raw: bytes, what: str) -> ParseError:
    return ParseError(
        "too_many_items",
        f"{what} has {n} distinct items, more than max_basket_items = {max_basket_items}; "
        "baskets are set aside whole, never truncated",
        offset=offset,
        raw=raw,
    )


def _parse_ts(value: object, where: str, offset: int, raw: bytes) -> float:
    """Epoch seconds from a number or an ISO-8601 string (naive times are UTC)."""
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ParseError(
            "wrong_type",
            f"{where} = {_show(value)}: expected epoch seconds (a number) or an ISO-8601 string",
            offset=offset,
            raw=raw,
        )
    if isinstance(value, str):
        try:
            moment = datetime.fromisoformat(value.strip())
        except ValueError:
            raise ParseError(
                "wrong_type",
                f"{where} = {_show(value)}: not an ISO-8601 date-time "
                "(e.g. '2024-05-01T12:30:00Z')",
                offset=offset,
                raw=raw,
            ) from None
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=UTC)
        return moment.timestamp()
    ts = float(value)
    if not math.isfinite(ts) or abs(ts) >= MAX_TIMESTAMP:
        raise ParseError(
            "wrong_type",
            f"{where} = {_show(value)}: a timestamp must be epoch seconds, a finite number "
            f"below {MAX_TIMESTAMP:.0e} (milliseconds or nanoseconds are not accepted)",
            offset=offset,
            raw=raw,
        )
    return ts


def _item_name(value: object, where: str, offset: int, raw: bytes) -> str:
    if isinstance(value, str):
        if not value.isascii():
            try:  # JSON escapes can smuggle lone surrogates, which cannot be stored as UTF-8
                value.encode("utf-8")
            except UnicodeEncodeError:
                raise ParseError(
                    "bad_encoding",
                    f"{where} = {_show(value)}: not valid Unicode (a lone surrogate escape)",
                    offset=offset,
                    raw=raw,
                ) from None
        return value
    if isinstance(value, int | float) and not isinstance(value, bool):
        return str(value)
    raise ParseError(
        "wrong_type",
        f"{where} = {_show(value)}: an item name must be a string or a number",
        offset=offset,
        raw=raw,
    )


class _Stateless:
    """The parts of the protocol a decoder without pending state shares."""

    __slots__ = ()

    def flush_due(self, event_time: float) -> list[Transaction]:
        return []

    def flush_all(self) -> list[Transaction]:
        return []

    def safe_offset(self, consumed_end: int) -> int:
        return consumed_end

    def state_dict(self) -> dict[str, Any]:
        return {}

    def load_state(self, state: dict[str, Any]) -> None:
        return None


# ---------------------------------------------------------------------------------------------
# basket


class BasketDecoder(_Stateless):
    """One transaction per line, items separated by whitespace and/or commas.

    Parameters
    ----------
    max_basket_items:
        More distinct items than this rejects the line (``too_many_items``).
    max_record_bytes:
        Longer lines are rejected (``too_long``).
    encoding:
        Text encoding of the feed (ASCII-compatible).

    Examples
    --------
    >>> d = BasketDecoder(max_basket_items=10)
    >>> d.feed(b"tea, scone jam tea", 0, 19)
    [Transaction(items=('tea', 'scone', 'jam'), ts=None, id=None, offset=0, end_offset=19)]
    >>> d.feed(b"  ,  ", 19, 25)
    []
    """

    __slots__ = ("encoding", "max_basket_items", "max_record_bytes")

    def __init__(
        self, max_basket_items: int = 200, max_record_bytes: int = 65536, encoding: str = "utf-8"
    ) -> None:
        _check_encoding(encoding)
        self.max_basket_items = max_basket_items
        self.max_record_bytes = max_record_bytes
        self.encoding = encoding

    def feed(self, record: bytes, offset: int, end_offset: int) -> list[Transaction]:
        text = _decode_text(record, offset, self.encoding, self.max_record_bytes)
        items = _dedupe(text.replace(",", " ").split())
        if not items:
            return []
        if len(items) > self.max_basket_items:
            raise _too_many(len(items), self.max_basket_items, offset, record, "line")
        return [Transaction(tuple(items), offset=offset, end_offset=end_offset)]


def decode_basket_records(
    decoder: BasketDecoder, records: Sequence[RawRecord]
) -> tuple[list[list[str]], list[RawRecord], list[ParseError]]:
    """Decode many basket lines at once: ``(baskets, the record of each, errors)``.

    The common case (every line decodes, no repeats, none too long or too large) is one
    decode and one split per line in C loops; otherwise each record goes through
    :func:`decode_raw`, so the result is the same as decoding them one by one.
    """
    if not records:
        return [], [], []
    if not any(r.too_long for r in records):
        block = b"\n".join(r.data for r in records)
        try:
            text = block.decode(decoder.encoding)
        except UnicodeDecodeError:
            text = None
        if text is not None and max(len(r.data) for r in records) <= decoder.max_record_bytes:
            parsed = [line.split() for line in text.replace(",", " ").split("\n")]
            clean = (
                len(parsed) == len(records)
                and sum(map(len, parsed)) == sum(map(len, map(frozenset, parsed)))
                and max(map(len, parsed)) <= decoder.max_basket_items
            )
            if clean:
                keep = [i for i, p in enumerate(parsed) if p]
                if len(keep) == len(parsed):
                    return parsed, list(records), []
                return [parsed[i] for i in keep], [records[i] for i in keep], []
    baskets: list[list[str]] = []
    origins: list[RawRecord] = []
    errors: list[ParseError] = []
    for rec in records:
        try:
            got = decode_raw(decoder, rec, decoder.max_record_bytes)
        except ParseError as exc:
            errors.append(exc.with_traceback(None))  # no frame cycle kept alive
            continue
        for tx in got:
            baskets.append(list(tx.items))
            origins.append(rec)
    return baskets, origins, errors


# ---------------------------------------------------------------------------------------------
# JSON lines

_MISSING = object()


def _lookup(obj: dict[str, Any], path: str, what: str, offset: int, raw: bytes) -> Any:
    """Follow a dotted path; ``_MISSING`` when a key is absent.

    A key containing a literal dot is found too: the whole path is tried first.
    """
    if path in obj:
        return obj[path]
    node: Any = obj
    walked: list[str] = []
    for part in path.split("."):
        if not isinstance(node, dict):
            raise ParseError(
                "wrong_type",
                f"{what} path {path!r}: {'.'.join(walked)!r} = {_show(node)} is not an object",
                offset=offset,
                raw=raw,
            )
        if part not in node:
            return _MISSING
        node = node[part]
        walked.append(part)
    return node


class JsonlDecoder(_Stateless):
    """One JSON object per line.

    Field names come from :class:`~streamcount.config.JsonlConfig`; each may be a dotted
    path into nested objects (``order.lines``). Rules:

    * the items field is required (``missing_field``) and must be a list (``wrong_type``);
      its elements are strings or numbers (numbers become ``str(n)``), or, with
      ``item_name_field`` set, objects holding the name under that (dotted) key;
      empty-string names are skipped; no names left is ``empty``;
    * ``ts`` is optional (``null`` or absent gives ``None``, unless ``require_ts``); a number
      is epoch seconds, a string is ISO-8601 (``Z`` or an offset; naive times are UTC);
    * ``id`` is optional; a string or an integer, kept as a string.

    Examples
    --------
    >>> d = JsonlDecoder(JsonlConfig(items_field="order.lines", item_name_field="sku"))
    >>> rec = b'{"id": 7, "ts": "1970-01-01T00:01:00Z", "order": {"lines": [{"sku": "tea"}]}}'
    >>> d.feed(rec, 0, len(rec) + 1)[0]
    Transaction(items=('tea',), ts=60.0, id='7', offset=0, end_offset=78)
    """

    __slots__ = ("config", "encoding", "max_basket_items", "max_record_bytes", "require_ts")

    def __init__(
        self,
        config: JsonlConfig | None = None,
        max_basket_items: int = 200,
        max_record_bytes: int = 65536,
        encoding: str = "utf-8",
        *,
        require_ts: bool = False,
    ) -> None:
        _check_encoding(encoding)
        self.config = config or JsonlConfig()
        self.max_basket_items = max_basket_items
        self.max_record_bytes = max_record_bytes
        self.encoding = encoding
        self.require_ts = require_ts

    def feed(self, record: bytes, offset: int, end_offset: int) -> list[Transaction]:
        text = _decode_text(record, offset, self.encoding, self.max_record_bytes)
        if not text.strip():
            return []
        try:
            obj = json.loads(text)
        except (ValueError, RecursionError) as exc:
            raise ParseError(
                "malformed", f"not valid JSON: {exc}", offset=offset, raw=record
            ) from None
        if not isinstance(obj, dict):
            raise ParseError(
                "wrong_type",
                f"record = {_show(obj)}: expected a JSON object",
                offset=offset,
                raw=record,
            )
        cfg = self.config
        value = _lookup(obj, cfg.items_field, "items_field", offset, record)
        if value is _MISSING:
            raise ParseError(
                "missing_field",
                f"no field {cfg.items_field!r} (input.jsonl.items_field) in record "
                f"with keys {_show(sorted(obj))}",
                offset=offset,
                raw=record,
            )
        if not isinstance(value, list):
            raise ParseError(
                "wrong_type",
                f"field {cfg.items_field!r} = {_show(value)}: expected a list of items",
                offset=offset,
                raw=record,
            )
        names: list[str] = []
        name_field = cfg.item_name_field
        for pos, element in enumerate(value):
            where = f"{cfg.items_field}[{pos}]"
            if name_field is not None:
                if not isinstance(element, dict):
                    raise ParseError(
                        "wrong_type",
                        f"{where} = {_show(element)}: expected an object holding "
                        f"{name_field!r} (input.jsonl.item_name_field)",
                        offset=offset,
                        raw=record,
                    )
                element = _lookup(element, name_field, "item_name_field", offset, record)
                if element is _MISSING:
                    raise ParseError(
                        "missing_field",
                        f"{where} has no field {name_field!r} (input.jsonl.item_name_field)",
                        offset=offset,
                        raw=record,
                    )
                where = f"{where}.{name_field}"
            name = _item_name(element, where, offset, record)
            if name:
                names.append(name)
        items = _dedupe(names)
        if not items:
            raise ParseError(
                "empty",
                f"field {cfg.items_field!r} = {_show(value)} holds no item names",
                offset=offset,
                raw=record,
            )
        if len(items) > self.max_basket_items:
            raise _too_many(len(items), self.max_basket_items, offset, record, "record")
        ts_value = _lookup(obj, cfg.ts_field, "ts_field", offset, record)
        ts: float | None = None
        if ts_value is not _MISSING and ts_value is not None:
            ts = _parse_ts(ts_value, f"field {cfg.ts_field!r}", offset, record)
        elif self.require_ts:
            raise ParseError(
                "missing_field",
                f"no timestamp in field {cfg.ts_field!r} (input.jsonl.ts_field); a time-based "
                "window needs one on every record",
                offset=offset,
                raw=record,
            )
        id_value = _lookup(obj, cfg.id_field, "id_field", offset, record)
        record_id: str | None = None
        if id_value is not _MISSING and id_value is not None:
            if isinstance(id_value, bool) or not isinstance(id_value, str | int):
                raise ParseError(
                    "wrong_type",
                    f"field {cfg.id_field!r} = {_show(id_value)}: an id must be a string or "
                    "an integer",
                    offset=offset,
                    raw=record,
                )
            record_id = str(id_value)
        return [Transaction(tuple(items), ts, record_id, offset, end_offset)]


# ---------------------------------------------------------------------------------------------
# CSV order lines


@dataclass(slots=True)
class _OpenOrder:
    items: dict[str, None]  # insertion-ordered set
    offset: int
    end_offset: int
    last_ts: float | None
    rejected: bool = False  # grew past max_basket_items: dropped whole when it closes


class CsvOrderDecoder:
    """CSV order lines (one row per line item) grouped into one transaction per order.

    Columns are named by :class:`~streamcount.config.CsvConfig`: with ``header: true`` the
    first non-blank row names the columns and the ``*_field`` keys refer to those names (a
    key naming no column raises :class:`~streamcount.errors.InputError` at the header); with
    ``header: false`` each ``*_field`` must be a 0-based column number such as ``"0"``.

    **When an order closes.** Orders stay open while their rows arrive and may interleave.
    Let ``t`` be the event time of an accepted row of order ``X`` and ``gap`` be
    ``order_close_seconds``. Before the row joins ``X``, every *other* open order ``Y``
    closes when

    * ``t - last_ts(Y) >= gap`` (with ``gap = 0`` this is "the order id changed"), or
    * ``t`` or ``last_ts(Y)`` is unknown (rows without a time close on an id change).

    Besides, :meth:`flush_due` closes every order whose last row is ``gap`` or more before
    the given event time, and :meth:`flush_all` closes all of them. A row of an order that
    has already closed starts a new order with the same id. Closed orders come out sorted by
    time, then by where they started. A transaction's ``ts`` is the latest time among its
    rows, ``offset`` where its first row starts and ``end_offset`` where its last row ends.

    **Rows set aside** (``feed`` raises, the row joins no order and closes none):
    unreadable CSV (``malformed``), a short row or a blank order id (``missing_field``), a
    blank item (``empty``), a quantity that is not a number or a time that is neither
    epoch seconds nor ISO-8601 (``wrong_type``), a quantity ``<= 0`` (``empty``: returns and
    cancellations add nothing to a basket), and every row of an order once it has more than
    ``max_basket_items`` distinct items (``too_many_items``; the whole order is dropped,
    never truncated). A quantity above 0 does not multiply: a basket is a set.

    **Checkpoints.** Either store :meth:`state_dict` and resume the source at the consumed
    end (exact), or store :meth:`safe_offset` and re-read from there with a fresh decoder
    (exact when orders do not interleave; with interleaving, orders that closed after the
    oldest open order began are emitted again).

    Examples
    --------
    >>> d = CsvOrderDecoder(CsvConfig(order_close_seconds=0))
    >>> rows = [b"order_id,item,ts", b"A,tea,10", b"A,jam,11", b"B,tea,12"]
    >>> out, pos = [], 0
    >>> for row in rows:
    ...     out += d.feed(row, pos, pos + len(row) + 1)
    ...     pos += len(row) + 1
    >>> out
    [Transaction(items=('tea', 'jam'), ts=11.0, id='A', offset=17, end_offset=35)]
    >>> d.safe_offset(pos)
    35
    >>> d.flush_all()[0].items
    ('tea',)
    """

    __slots__ = (
        "_columns",
        "_idx",
        "_orders",
        "config",
        "encoding",
        "max_basket_items",
        "max_record_bytes",
        "require_ts",
    )

    def __init__(
        self,
        config: CsvConfig | None = None,
        max_basket_items: int = 200,
        max_record_bytes: int = 65536,
        encoding: str = "utf-8",
        *,
        require_ts: bool = False,
    ) -> None:
        _check_encoding(encoding)
        self.config = config or CsvConfig()
        if len(self.config.delimiter) != 1:
            raise ConfigError(
                "input.csv.delimiter", self.config.delimiter, "must be a single character"
            )
        self.max_basket_items = max_basket_items
        self.max_record_bytes = max_record_bytes
        self.encoding = encoding
        self.require_ts = require_ts
        self._columns: list[str] | None = None
        self._idx: tuple[int, int, int, int | None] | None = None
        self._orders: dict[str, _OpenOrder] = {}
        if not self.config.header:
            self._idx = self._indices_by_number()

    # -- columns ---------------------------------------------------------------------------

    def _fields(self) -> list[tuple[str, str | None]]:
        cfg = self.config
        return [
            ("order_field", cfg.order_field),
            ("item_field", cfg.item_field),
            ("ts_field", cfg.ts_field),
            ("quantity_field", cfg.quantity_field),
        ]

    def _indices_by_number(self) -> tuple[int, int, int, int | None]:
        found: list[int | None] = []
        for key, name in self._fields():
            if name is None:
                found.append(None)
                continue
            if not name.isdigit():
                raise ConfigError(
                    f"input.csv.{key}",
                    name,
                    "with input.csv.header = false, columns are named by 0-based number; "
                    "write e.g. '0', or set header: true",
                )
            found.append(int(name))
        return found[0], found[1], found[2], found[3]  # type: ignore[return-value]

    def _set_header(self, columns: list[str], offset: int) -> None:
        names = [c.strip() for c in columns]
        found: list[int | None] = []
        for key, name in self._fields():
            if name is None:
                found.append(None)
                continue
            if name not in names:
                raise InputError(
                    f"input.csv.{key} = {name!r}: no such column in the header at offset "
                    f"{offset} (columns: {_show(names)}); set input.csv.{key} to one of them"
                )
            found.append(names.index(name))
        self._columns = names
        self._idx = (found[0], found[1], found[2], found[3])  # type: ignore[assignment]

    # -- the protocol ----------------------------------------------------------------------

    def feed(self, record: bytes, offset: int, end_offset: int) -> list[Transaction]:
        text = _decode_text(record, offset, self.encoding, self.max_record_bytes)
        text = text.rstrip("\r\n")
        if not text.strip():
            return []
        try:
            row = next(csv.reader([text], delimiter=self.config.delimiter, strict=True))
        except csv.Error as exc:
            raise ParseError(
                "malformed", f"not a valid CSV row: {exc}", offset=offset, raw=record
            ) from None
        if self._idx is None:
            self._set_header(row, offset)
            return []
        if self._columns is not None and [c.strip() for c in row] == self._columns:
            return []  # the header again (files concatenated): not an order line
        i_order, i_item, i_ts, i_qty = self._idx
        cfg = self.config

        def cell(index: int, name: str) -> str:
            if index >= len(row):
                raise ParseError(
                    "missing_field",
                    f"row has {len(row)} columns, so no column {name!r} (number {index})",
                    offset=offset,
                    raw=record,
                )
            return row[index].strip()

        order_id = cell(i_order, cfg.order_field)
        if not order_id:
            raise ParseError(
                "missing_field",
                f"column {cfg.order_field!r} (the order id) is blank",
                offset=offset,
                raw=record,
            )
        item = cell(i_item, cfg.item_field)
        if not item:
            raise ParseError(
                "empty", f"column {cfg.item_field!r} (the item) is blank", offset=offset, raw=record
            )
        ts_text = cell(i_ts, cfg.ts_field)
        ts: float | None = None
        if ts_text:
            try:
                ts = float(ts_text)
            except ValueError:
                ts = _parse_ts(ts_text, f"column {cfg.ts_field!r}", offset, record)
            else:
                ts = _parse_ts(ts, f"column {cfg.ts_field!r}", offset, record)
        elif self.require_ts:
            raise ParseError(
                "missing_field",
                f"column {cfg.ts_field!r} (the time) is blank; a time-based window needs one",
                offset=offset,
                raw=record,
            )
        if i_qty is not None and cfg.quantity_field is not None:
            qty_text = cell(i_qty, cfg.quantity_field)
            try:
                qty = float(qty_text)
            except ValueError:
                raise ParseError(
                    "wrong_type",
                    f"column {cfg.quantity_field!r} = {_show(qty_text)}: not a number",
                    offset=offset,
                    raw=record,
                ) from None
            if not qty > 0:  # also catches nan
                raise ParseError(
                    "empty",
                    f"column {cfg.quantity_field!r} = {_show(qty_text)}: a quantity <= 0 adds "
                    "nothing to a basket (returns and cancellations are not counted)",
                    offset=offset,
                    raw=record,
                )
        current = self._orders.get(order_id)
        if current is not None and current.rejected:
            raise ParseError(
                "too_many_items",
                f"order {order_id!r} already has more than max_basket_items = "
                f"{self.max_basket_items} distinct items; the whole order is set aside",
                offset=offset,
                raw=record,
            )
        if (
            current is not None
            and item not in current.items
            and len(current.items) >= self.max_basket_items
        ):
            # Reject now (state unchanged apart from marking the order) so memory stays
            # bounded: the order's items are dropped, its later rows are set aside too.
            n = len(current.items) + 1
            current.items.clear()
            current.rejected = True
            raise ParseError(
                "too_many_items",
                f"order {order_id!r} reaches {n} distinct items with {item!r}, more than "
                f"max_basket_items = {self.max_basket_items}; the whole order is set aside, "
                "never truncated",
                offset=offset,
                raw=record,
            )
        closed = self._close_others(order_id, ts)  # never closes ``order_id`` itself
        if current is None:
            self._orders[order_id] = _OpenOrder({item: None}, offset, end_offset, ts)
        else:
            current.items[item] = None
            current.end_offset = end_offset
            if ts is not None and (current.last_ts is None or ts > current.last_ts):
                current.last_ts = ts
        return closed

    def _close_others(self, order_id: str, ts: float | None) -> list[Transaction]:
        gap = self.config.order_close_seconds
        due = [
            oid
            for oid, order in self._orders.items()
            if oid != order_id
            and (ts is None or order.last_ts is None or ts - order.last_ts >= gap)
        ]
        return self._close(due)

    def _close(self, order_ids: Sequence[str]) -> list[Transaction]:
        out: list[Transaction] = []
        for oid in order_ids:
            order = self._orders.pop(oid)
            if order.rejected:
                continue
            out.append(
                Transaction(tuple(order.items), order.last_ts, oid, order.offset, order.end_offset)
            )
        out.sort(key=lambda t: (t.ts is None, t.ts or 0.0, t.offset))
        return out

    def flush_due(self, event_time: float) -> list[Transaction]:
        gap = self.config.order_close_seconds
        due = [
            oid
            for oid, order in self._orders.items()
            if order.last_ts is not None and event_time - order.last_ts >= gap
        ]
        return self._close(due)

    def flush_all(self) -> list[Transaction]:
        return self._close(list(self._orders))

    def safe_offset(self, consumed_end: int) -> int:
        if not self._orders:
            return consumed_end
        return min(consumed_end, min(o.offset for o in self._orders.values()))

    @property
    def open_orders(self) -> int:
        """Orders currently open (held back until they close)."""
        return len(self._orders)

    def state_dict(self) -> dict[str, Any]:
        return {
            "columns": self._columns,
            "orders": [
                {
                    "id": oid,
                    "items": list(o.items),
                    "offset": o.offset,
                    "end_offset": o.end_offset,
                    "last_ts": o.last_ts,
                    "rejected": o.rejected,
                }
                for oid, o in self._orders.items()
            ],
        }

    def load_state(self, state: dict[str, Any]) -> None:
        try:
            columns = state.get("columns")
            orders = {
                str(o["id"]): _OpenOrder(
                    dict.fromkeys(str(i) for i in o["items"]),
                    int(o["offset"]),
                    int(o["end_offset"]),
                    None if o["last_ts"] is None else float(o["last_ts"]),
                    bool(o.get("rejected", False)),
                )
                for o in state.get("orders", [])
            }
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise InputError(f"CSV decoder state {_show(state)} is not valid: {exc}") from None
        if self.config.header:
            if columns is not None:
                self._set_header(list(columns), 0)
            else:
                self._columns, self._idx = None, None
        self._orders = orders


# ---------------------------------------------------------------------------------------------
# choosing a decoder, and raw records from a source


def make_decoder(
    input_config: InputConfig, max_basket_items: int, *, require_ts: bool = False
) -> Decoder:
    """The decoder for ``input_config.format`` (``basket``, ``jsonl`` or ``csv``).

    Parameters
    ----------
    input_config:
        The ``input`` section (format, encoding, max_record_bytes, jsonl, csv).
    max_basket_items:
        ``engine.max_basket_items``.
    require_ts:
        Reject JSON/CSV records without a time (``missing_field``); set it when the engine
        uses a time-based window.
    """
    fmt = input_config.format
    limit = input_config.max_record_bytes
    encoding = input_config.encoding
    if fmt == "basket":
        return BasketDecoder(max_basket_items, limit, encoding)
    if fmt == "jsonl":
        return JsonlDecoder(
            input_config.jsonl, max_basket_items, limit, encoding, require_ts=require_ts
        )
    if fmt == "csv":
        return CsvOrderDecoder(
            input_config.csv, max_basket_items, limit, encoding, require_ts=require_ts
        )
    raise ConfigError("input.format", fmt, f"must be one of {', '.join(FORMATS)}")


def decode_raw(decoder: Decoder, raw: RawRecord, max_record_bytes: int) -> list[Transaction]:
    """Feed one :class:`~streamcount.sources.RawRecord` to a decoder.

    A record the source already cut short (``raw.too_long``) raises ``too_long`` without
    reaching the decoder.
    """
    if raw.too_long:
        raise ParseError(
            "too_long",
            f"record is {raw.end_offset - raw.offset - 1} bytes or more, more than "
            f"max_record_bytes = {max_record_bytes}; only its first "
            f"{len(raw.data)} bytes are kept",
            offset=raw.offset,
            raw=raw.data,
        )
    return decoder.feed(raw.data, raw.offset, raw.end_offset)


# ---------------------------------------------------------------------------------------------
# bulk reading for replay


@dataclass(slots=True)
class Chunk:
    """A run of consecutive records read by :func:`iter_file_chunks`.

    Attributes
    ----------
    items:
        One list of distinct item names per transaction.
    ts, ids:
        Per transaction time and id (JSON/CSV); ``None`` for the basket format.
    errors:
        Records set aside, each a :class:`~streamcount.errors.ParseError` with its offset.
    end_offset:
        Source offset just after the last record this chunk consumed.
    """

    items: list[list[str]]
    ts: list[float | None] | None
    ids: list[str | None] | None
    errors: list[ParseError] = field(default_factory=list)
    end_offset: int = 0

    def __len__(self) -> int:
        return len(self.items)

    def transactions(self) -> list[Transaction]:
        """The chunk as :class:`Transaction` objects (without offsets)."""
        ts = self.ts if self.ts is not None else [None] * len(self.items)
        ids = self.ids if self.ids is not None else [None] * len(self.items)
        return [Transaction(tuple(i), t, d) for i, t, d in zip(self.items, ts, ids, strict=True)]


@contextlib.contextmanager
def _gc_paused() -> Iterator[None]:
    """Pause the cyclic collector while building many small acyclic lists.

    Parsing a block creates one list per line; each allocation counts towards a collection,
    and a collection walks everything the caller holds, which more than doubles the cost of
    parsing. Lists of strings cannot form cycles, so nothing is lost by pausing. The pause is
    process-wide but lasts one slice (a few milliseconds for 8192 lines).
    """
    enabled = gc.isenabled()
    if enabled:
        gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


@contextlib.contextmanager
def _open_input(path: str) -> Iterator[IO[bytes]]:
    """Open a file (gzip detected by its magic bytes) or standard input for ``-``."""
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
                yield gz  # type: ignore[misc]
        else:
            raw.seek(0)
            yield raw
    finally:
        raw.close()


def _basket_slice(
    lines: list[bytes],
    base: int,
    last_has_newline: bool,
    encoding: str,
    max_record_bytes: int,
    max_basket_items: int,
) -> tuple[list[list[str]], list[ParseError], int]:
    """Parse lines of a basket file; returns (items, errors, end offset).

    The common case stays in C loops: one decode, one split per line, one frozenset per line
    to detect repeats (the strings' hashes are cached, so interning them later is cheaper).
    Only a slice with a problem falls back to a per-line pass that computes offsets.
    """
    end = base + sum(map(len, lines)) + len(lines) - (0 if last_has_newline else 1)
    block = b"\n".join(lines)
    try:
        text = block.decode(encoding)
    except UnicodeDecodeError:
        text = None
    if text is not None and (
        len(block) <= max_record_bytes or max(map(len, lines)) <= max_record_bytes
    ):
        if base == 0 and text.startswith("\ufeff"):
            text = text[1:]
        with _gc_paused():
            parsed = [line.split() for line in text.replace(",", " ").split("\n")]
            n_items = sum(map(len, parsed))
            clean = (
                n_items == sum(map(len, map(frozenset, parsed)))
                and max(map(len, parsed), default=0) <= max_basket_items
            )
            if clean:
                if [] in parsed:
                    parsed = [p for p in parsed if p]
                return parsed, [], end
    # Slow path: something in this slice is wrong (or only repeats an item).
    items: list[list[str]] = []
    errors: list[ParseError] = []
    decoder = BasketDecoder(max_basket_items, max_record_bytes, encoding)
    offset = base
    last = len(lines) - 1
    for n, line in enumerate(lines):
        next_offset = offset + len(line) + (0 if n == last and not last_has_newline else 1)
        try:
            got = decoder.feed(line, offset, next_offset)
        except ParseError as exc:
            errors.append(exc.with_traceback(None))  # no frame cycle kept alive
        else:
            if got:
                items.append(list(got[0].items))
        offset = next_offset
    return items, errors, end


def iter_file_chunks(
    path: str,
    fmt: str,
    input_config: InputConfig | None = None,
    max_basket_items: int = 200,
    chunk_size: int = 8192,
) -> Iterator[Chunk]:
    """Read a whole file as chunks of transactions, as fast as possible (replay, tests).

    Parameters
    ----------
    path:
        A file (gzip-compressed files are recognised by their first bytes) or ``-`` for
        standard input (read as plain text).
    fmt:
        ``basket``, ``jsonl`` or ``csv``.
    input_config:
        Supplies ``encoding``, ``max_record_bytes`` and the ``jsonl`` / ``csv`` field names
        (its own ``format`` is ignored); defaults to :class:`~streamcount.config.InputConfig`.
    max_basket_items:
        ``engine.max_basket_items``.
    chunk_size:
        Lines per chunk (blank lines and rejected records included, so a chunk may hold
        fewer transactions).

    Yields
    ------
    Chunk
        For ``basket``, ``ts`` and ``ids`` are ``None`` and no per-transaction object is
        built. Offsets are in the decompressed stream; the last line needs no newline.
        For ``csv``, orders still open at the end of the file close into the last chunk.

    Raises
    ------
    InputError
        The file is missing or unreadable (the message names the path).
    """
    cfg = replace(input_config or InputConfig(), format=fmt)
    decoder = make_decoder(cfg, max_basket_items)  # validates fmt and encoding
    limit = cfg.max_record_bytes
    if chunk_size < 1:
        raise ConfigError("chunk_size", chunk_size, "must be at least 1")

    def emit(lines: list[bytes], base: int, last_nl: bool) -> Iterator[Chunk]:
        for start in range(0, len(lines), chunk_size):
            part = lines[start : start + chunk_size]
            final = last_nl or start + chunk_size < len(lines)
            if fmt == "basket":
                items, errors, end = _basket_slice(
                    part, base, final, cfg.encoding, limit, max_basket_items
                )
                yield Chunk(items, None, None, errors, end)
            else:
                yield _decoded_chunk(decoder, part, base, final)
            base += sum(map(len, part)) + len(part)

    offset = 0  # of the first byte of ``pending``
    pending = b""
    skipping: tuple[bytes, int] | None = None  # (head, bytes seen) of an over-long line
    carried: list[ParseError] = []
    with _open_input(path) as stream:
        while True:
            try:
                block = stream.read(_BLOCK_BYTES)
            except (OSError, EOFError, gzip.BadGzipFile) as exc:
                raise InputError(f"input.path = {path!r}: read failed ({exc})") from None
            if skipping is not None:
                head, seen = skipping
                nl = block.find(b"\n")
                if nl < 0 and block:
                    skipping = (head, seen + len(block))
                    continue
                length = seen + (nl if nl >= 0 else 0)
                carried.append(
                    ParseError(
                        "too_long",
                        f"record is {length} bytes, more than max_record_bytes = {limit}",
                        offset=offset,
                        raw=head,
                    )
                )
                offset += length + (1 if nl >= 0 else 0)
                skipping = None
                block = block[nl + 1 :] if nl >= 0 else b""
                if not block and nl < 0:
                    break
            if block:
                data = pending + block if pending else block
                cut = data.rfind(b"\n")
                if cut < 0:
                    pending = data
                    if len(pending) > limit + _BLOCK_BYTES:
                        skipping = (pending[:limit], len(pending))
                        pending = b""
                    continue
                pending = data[cut + 1 :]
                lines = data[:cut].split(b"\n")
                last_nl = True
            else:
                if not pending:
                    break
                lines, last_nl, pending = [pending], False, b""
            for chunk in emit(lines, offset, last_nl):
                if carried:
                    chunk.errors[:0] = carried
                    carried = []
                yield chunk
            offset += sum(map(len, lines)) + len(lines) - (0 if last_nl else 1)
            if not block:
                break
    tail = decoder.flush_all()
    if tail or carried:
        chunk = _transactions_chunk(tail, offset, fmt)
        chunk.errors[:0] = carried
        yield chunk


def _transactions_chunk(txs: list[Transaction], end: int, fmt: str) -> Chunk:
    if fmt == "basket":
        return Chunk([list(t.items) for t in txs], None, None, [], end)
    return Chunk([list(t.items) for t in txs], [t.ts for t in txs], [t.id for t in txs], [], end)


def _decoded_chunk(decoder: Decoder, lines: list[bytes], base: int, last_nl: bool) -> Chunk:
    txs: list[Transaction] = []
    errors: list[ParseError] = []
    offset = base
    last = len(lines) - 1
    for n, line in enumerate(lines):
        end = offset + len(line) + (0 if n == last and not last_nl else 1)
        try:
            txs.extend(decoder.feed(line, offset, end))
        except ParseError as exc:
            errors.append(exc.with_traceback(None))  # no frame cycle kept alive
        offset = end
    chunk = _transactions_chunk(txs, offset, "jsonl")
    chunk.errors.extend(errors)
    return chunk
