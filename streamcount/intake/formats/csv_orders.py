"""CSV order lines: one row per line item, the rows of an order grouped into one transaction.

See :class:`CsvOrderDecoder` for when an order closes and which rows are set aside.
"""

from __future__ import annotations

import csv
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from streamcount.config.settings import CsvConfig
from streamcount.errors import InputError, ParseError
from streamcount.intake.formats.text import (
    LineDecoder,
    check_control,
    decode_text,
    normalize_name,
    parse_ts,
    show,
)
from streamcount.intake.records import Transaction

__all__ = ["CsvOrderDecoder"]


@dataclass(slots=True)
class _OpenOrder:
    items: dict[str, None]  # insertion-ordered set
    offset: int | None
    end_offset: int | None
    last_ts: float | None
    rejected: bool = False  # grew past max_basket_items: dropped whole when it closes


class CsvOrderDecoder(LineDecoder):
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

    Besides, :meth:`close_due` closes every order whose last row is ``gap`` or more before
    the given event time, and :meth:`close_all` closes all of them. A row of an order that
    has already closed starts a new order with the same id. Closed orders come out sorted by
    time, then by where they started. A transaction's ``ts`` is the latest time among its
    rows, ``offset`` where its first row starts and ``end_offset`` where its last row ends.

    **Rows set aside** (``feed`` raises, the row joins no order and closes none):
    unreadable CSV (``malformed``), a short row or a blank order id (``missing_field``), an
    order id or item cell holding a character of
    :data:`~streamcount.intake.formats.text.CONTROL_CHARS` (``control_chars``), a
    blank item (``empty``), a quantity that is not a number or a time that is neither
    epoch seconds nor ISO-8601 (``wrong_type``), a quantity ``<= 0`` (``empty``: returns and
    cancellations add nothing to a basket), and every row of an order once it has more than
    ``max_basket_items`` distinct items (``too_many_items``; the whole order is dropped,
    never truncated). A quantity above 0 does not multiply: a basket is a set. Item names
    are NFC-normalised unless ``normalize`` is ``none``; order ids are kept as written.

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
    >>> d.close_all()[0].items
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
        "nfc",
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
        normalize: str = "nfc",
    ) -> None:
        self.nfc = normalize == "nfc"  # input.normalize, checked with the settings
        self.config = config or CsvConfig()
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

    def _columns_of(self, column: Callable[[str, str], int]) -> tuple[int, int, int, int | None]:
        """The order, item, time and quantity columns, each found by ``column(key, name)``."""
        cfg = self.config
        qty = cfg.quantity_field
        return (
            column("order_field", cfg.order_field),
            column("item_field", cfg.item_field),
            column("ts_field", cfg.ts_field),
            None if qty is None else column("quantity_field", qty),
        )

    def _indices_by_number(self) -> tuple[int, int, int, int | None]:
        def number(key: str, name: str) -> int:
            # with header: false the config rules allow only column numbers
            assert name.isdigit(), f"input.csv.{key} = {name!r} is not a column number"
            return int(name)

        return self._columns_of(number)

    def _set_header(self, columns: list[str], offset: int | None) -> None:
        names = [c.strip() for c in columns]

        def position(key: str, name: str) -> int:
            if name not in names:
                raise InputError(
                    f"input.csv.{key} = {name!r}: no such column in the header at offset "
                    f"{offset} (columns: {show(names)}); set input.csv.{key} to one of them"
                )
            return names.index(name)

        idx = self._columns_of(position)
        self._columns = names
        self._idx = idx

    # -- the protocol ----------------------------------------------------------------------

    def feed(self, record: bytes, offset: int | None, end_offset: int | None) -> list[Transaction]:
        text = decode_text(record, offset, self.encoding, self.max_record_bytes)
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

        def cell(index: int, name: str, *, checked: bool = False) -> str:
            if index >= len(row):
                raise ParseError(
                    "missing_field",
                    f"row has {len(row)} columns, so no column {name!r} (number {index})",
                    offset=offset,
                    raw=record,
                )
            if checked:  # before stripping, which would hide a separator at either end
                check_control(row[index], f"column {name!r}", offset, record)
            return row[index].strip()

        order_id = cell(i_order, cfg.order_field, checked=True)
        if not order_id:
            raise ParseError(
                "missing_field",
                f"column {cfg.order_field!r} (the order id) is blank",
                offset=offset,
                raw=record,
            )
        item = normalize_name(cell(i_item, cfg.item_field, checked=True), self.nfc)
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
                ts = parse_ts(ts_text, f"column {cfg.ts_field!r}", offset, record)
            else:
                ts = parse_ts(ts, f"column {cfg.ts_field!r}", offset, record)
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
                    f"column {cfg.quantity_field!r} = {show(qty_text)}: not a number",
                    offset=offset,
                    raw=record,
                ) from None
            if not qty > 0:  # also catches nan
                raise ParseError(
                    "empty",
                    f"column {cfg.quantity_field!r} = {show(qty_text)}: a quantity <= 0 adds "
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
        out.sort(key=lambda t: (t.ts is None, t.ts or 0.0, -1 if t.offset is None else t.offset))
        return out

    def close_due(self, event_time: float) -> list[Transaction]:
        gap = self.config.order_close_seconds
        due = [
            oid
            for oid, order in self._orders.items()
            if order.last_ts is not None and event_time - order.last_ts >= gap
        ]
        return self._close(due)

    def close_all(self) -> list[Transaction]:
        return self._close(list(self._orders))

    def safe_offset(self, consumed_end: int) -> int:
        if not self._orders:
            return consumed_end
        starts = [o.offset for o in self._orders.values() if o.offset is not None]
        return min([consumed_end, *starts])

    @property
    def held(self) -> int:
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
                    None if o["offset"] is None else int(o["offset"]),
                    None if o["end_offset"] is None else int(o["end_offset"]),
                    None if o["last_ts"] is None else float(o["last_ts"]),
                    bool(o.get("rejected", False)),
                )
                for o in state.get("orders", [])
            }
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise InputError(f"CSV decoder state {show(state)} is not valid: {exc}") from None
        if self.config.header:
            if columns is not None:
                self._set_header(list(columns), 0)
            else:
                self._columns, self._idx = None, None
        self._orders = orders
