"""Shared pieces of the record formats: text decoding, timestamps, item names, and the base of
decoders that read one record at a time.

Every check here raises :class:`~streamcount.errors.ParseError` with a reason from
:data:`streamcount.errors.REASONS`, the record's offset and its raw bytes, so the caller can
dead-letter it and carry on.
"""

from __future__ import annotations

import math
import re
import unicodedata
from datetime import UTC, datetime
from typing import Any

import numpy as np

from streamcount.config.settings import MAX_TIMESTAMP
from streamcount.errors import ParseError
from streamcount.intake.deadletter import RAW_CHARS
from streamcount.intake.records import Decoded, RecordBatch, Transaction

__all__ = [
    "CONTROL_CHARS",
    "NORMALIZE_FORMS",
    "LineDecoder",
    "check_control",
    "decode_text",
    "dedupe",
    "item_name",
    "normalize_name",
    "parse_ts",
    "show",
    "too_long_error",
    "too_many_items_error",
]

_SHOW_CHARS = 80

#: Characters refused in item names and order ids (reason ``control_chars``): C0 controls but
#: tab, DEL and the C1 controls, the line and paragraph separators, and the bidirectional marks
#: (U+061C, U+200E, U+200F), embeddings, overrides and isolates (Unicode UAX #9), which can make
#: one name look like another where it is shown (``tea`` + U+202E + ``lam`` is shown as
#: ``teamal``).
CONTROL_CHARS = re.compile(
    r"[\x00-\x08\x0a-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069]"
)
#: values of ``input.normalize``: ``nfc`` (Unicode canonical composition) or ``none`` (as read)
NORMALIZE_FORMS: tuple[str, ...] = ("nfc", "none")


def show(value: object) -> str:
    """``repr`` of a value, truncated so a message stays readable."""
    text = repr(value)
    if len(text) > _SHOW_CHARS:
        text = text[: _SHOW_CHARS - 3] + "..."
    return text


def check_control(text: str, where: str, offset: int | None, raw: bytes) -> None:
    r"""Raise ``control_chars`` when ``text`` holds one of :data:`CONTROL_CHARS`.

    >>> check_control("tea\u202emal", "item", 0, b"")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    streamcount.errors.ParseError: control_chars at offset 0: item = 'tea\u202emal' holds U+202E...
    """
    found = CONTROL_CHARS.search(text)
    if found is not None:
        char = found.group()
        label = unicodedata.name(char, "a control character")
        raise ParseError(
            "control_chars",
            f"{where} = {show(text)} holds U+{ord(char):04X} ({label}) at position {found.start()}",
            offset=offset,
            raw=raw,
        )


def normalize_name(name: str, nfc: bool) -> str:
    r"""``name`` in Unicode normal form C when ``nfc`` (ASCII is returned as it is).

    >>> [len(normalize_name("cafe\u0301", nfc)) for nfc in (True, False)]
    [4, 5]
    """
    if nfc and not name.isascii():
        return unicodedata.normalize("NFC", name)
    return name


def dedupe(items: list[str]) -> list[str]:
    """Drop repeated items, keeping the order of first appearance."""
    if len(items) > 1 and len(set(items)) != len(items):
        return list(dict.fromkeys(items))
    return items


def decode_text(record: bytes, offset: int | None, encoding: str, max_record_bytes: int) -> str:
    """Length check, then strict decoding; the two reasons every format shares."""
    if len(record) > max_record_bytes:
        raise ParseError(
            "too_long",
            too_long_detail(f"{len(record)} bytes", max_record_bytes),
            offset=offset,
            raw=record[:max_record_bytes],
        )
    try:
        text = record.decode(encoding)
    except UnicodeDecodeError as exc:
        raise ParseError(
            "bad_encoding",
            f"byte {exc.start} ({show(record[exc.start : exc.start + 4])}) is not valid "
            f"{encoding}: {exc.reason}",
            offset=offset,
            raw=record,
        ) from None
    if offset == 0 and text.startswith("\ufeff"):
        text = text[1:]  # a byte-order mark at the start of a file is not data
    return text


def too_many_items_error(
    n: int, max_basket_items: int, offset: int | None, raw: bytes, what: str
) -> ParseError:
    return ParseError(
        "too_many_items",
        f"{what} has {n} distinct items, more than max_basket_items = {max_basket_items}; "
        "baskets are set aside whole, never truncated",
        offset=offset,
        raw=raw,
    )


def parse_ts(value: object, where: str, offset: int | None, raw: bytes) -> float:
    """Epoch seconds from a number or an ISO-8601 string (naive times are UTC)."""
    if isinstance(value, bool) or not isinstance(value, int | float | str):
        raise ParseError(
            "wrong_type",
            f"{where} = {show(value)}: expected epoch seconds (a number) or an ISO-8601 string",
            offset=offset,
            raw=raw,
        )
    if isinstance(value, str):
        try:
            moment = datetime.fromisoformat(value.strip())
        except ValueError:
            raise ParseError(
                "wrong_type",
                f"{where} = {show(value)}: not an ISO-8601 date-time (e.g. '2024-05-01T12:30:00Z')",
                offset=offset,
                raw=raw,
            ) from None
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=UTC)
        return moment.timestamp()
    try:
        ts = float(value)
    except OverflowError:  # an integer past any float
        ts = math.inf
    if not math.isfinite(ts) or abs(ts) >= MAX_TIMESTAMP:
        raise ParseError(
            "wrong_type",
            f"{where} = {show(value)}: a timestamp must be epoch seconds, a finite number "
            f"below {MAX_TIMESTAMP:.0e} (milliseconds or nanoseconds are not accepted)",
            offset=offset,
            raw=raw,
        )
    return ts


def item_name(
    value: object, where: str, offset: int | None, raw: bytes, *, nfc: bool = True
) -> str:
    """An item name from a decoded value: a string (checked for :data:`CONTROL_CHARS`,
    NFC-normalised when ``nfc``) or a number (``str(n)``)."""
    if isinstance(value, str):
        check_control(value, where, offset, raw)
        if not value.isascii():
            try:  # JSON escapes can smuggle lone surrogates, which cannot be stored as UTF-8
                value.encode("utf-8")
            except UnicodeEncodeError:
                raise ParseError(
                    "bad_encoding",
                    f"{where} = {show(value)}: not valid Unicode (a lone surrogate escape)",
                    offset=offset,
                    raw=raw,
                ) from None
            return normalize_name(value, nfc)
        return value
    if isinstance(value, int | float) and not isinstance(value, bool):
        return str(value)
    raise ParseError(
        "wrong_type",
        f"{where} = {show(value)}: an item name must be a string or a number",
        offset=offset,
        raw=raw,
    )


def too_long_error(batch: RecordBatch, i: int, max_record_bytes: int) -> ParseError:
    """The rejection of record ``i``, which the source cut short (longer than the limit)."""
    start, end = batch.offset(i), batch.end_of(i)
    size = f"{end - start - 1} bytes or more" if start is not None and end is not None else "long"
    return ParseError(
        "too_long",
        too_long_detail(size, max_record_bytes),
        offset=start,
        raw=batch.lines[i],
    )


def too_long_detail(size: str, max_record_bytes: int) -> str:
    """The one wording of ``too_long``: the record's size, the limit, and what the dead-letter
    file keeps of it (its first :data:`~streamcount.intake.deadletter.RAW_CHARS` characters)."""
    return (
        f"record is {size}, more than input.max_record_bytes = {max_record_bytes}; the "
        f"dead-letter file keeps its first {RAW_CHARS} characters"
    )


class LineDecoder:
    """Base of the decoders that take one record at a time (JSON lines, CSV order lines).

    Subclasses implement :meth:`feed`; :meth:`decode` runs it over a whole batch and collects
    the records it sets aside. Decoders without pending state inherit the rest of the protocol
    as it is here (nothing held back).
    """

    __slots__ = ()
    max_record_bytes: int

    def feed(self, record: bytes, offset: int | None, end_offset: int | None) -> list[Transaction]:
        """Decode one record (no newline); raise ParseError (state unchanged) if it is bad."""
        raise NotImplementedError

    def decode(self, batch: RecordBatch) -> Decoded:
        """Every record of ``batch`` through :meth:`feed`, in order."""
        txs: list[Transaction] = []
        raws: list[bytes | None] = []
        errors: list[ParseError] = []
        cut = batch.too_long if batch.too_long is not None else np.zeros(len(batch), dtype=bool)
        for i, line in enumerate(batch.lines):
            if cut[i]:
                errors.append(too_long_error(batch, i, self.max_record_bytes))
                continue
            start = batch.offset(i)
            try:
                got = self.feed(line, start, batch.end_of(i))
            except ParseError as exc:
                errors.append(exc.with_traceback(None))  # no frame cycle kept alive
                continue
            txs.extend(got)
            # a transaction made of this record alone keeps it for the dead-letter file
            raws.extend(
                line if t.offset == start and t.end_offset == batch.end_of(i) else None for t in got
            )
        out = Decoded.from_transactions(txs, source=batch.source)
        out.errors = errors
        out.raws = raws
        return out

    def close_due(self, event_time: float) -> list[Transaction]:
        """Transactions held back that are due to close at ``event_time`` (none here)."""
        return []

    def close_all(self) -> list[Transaction]:
        """Every transaction still held back: end of input or shutdown (none here)."""
        return []

    @property
    def held(self) -> int:
        """Transactions held back, e.g. CSV orders still open (none here)."""
        return 0

    def safe_offset(self, consumed_end: int) -> int:
        """Source offset from which re-reading reproduces the decoder's pending state."""
        return consumed_end

    def state_dict(self) -> dict[str, Any]:
        """The pending state as a JSON-able mapping (empty without pending state)."""
        return {}

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned."""
        return None
