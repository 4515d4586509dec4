"""JSON lines: one JSON object per line, fields named by ``input.jsonl``.

See :class:`JsonlDecoder` for the rules. The same decoder serves a followed file, HTTP ingest
bodies (one object or NDJSON lines) and ``streamcount replay``.

:meth:`JsonlDecoder.decode` parses a batch with msgspec (chosen by measurement over orjson and
the standard library: bench/bench_parse.py, README) into a record type holding only the
configured fields, so the others are skipped, never built. When every items list of the batch
is a flat list of plain ASCII strings (no escapes), the lists are kept as their JSON text and
coded with numpy as basket lines are (:class:`~streamcount.intake.records.Tokens`, no Python
string per item); otherwise the names are built as strings. What it cannot take as it is (a
record msgspec refuses, dotted paths, item objects, names that are not plain ASCII strings,
anything to set aside) goes record by record through :meth:`JsonlDecoder.feed`, which parses
with the standard library as before, so the transactions and the rejections are the same.
"""

from __future__ import annotations

import codecs
import json
from operator import attrgetter
from typing import Any, cast

import msgspec
import numpy as np

from streamcount.config.settings import MAX_TIMESTAMP, JsonlConfig
from streamcount.errors import ParseError
from streamcount.intake.formats.basket import code_tokens
from streamcount.intake.formats.text import (
    CONTROL_CHARS,
    LineDecoder,
    check_control,
    decode_text,
    dedupe,
    item_name,
    parse_ts,
    show,
    too_many_items_error,
)
from streamcount.intake.records import Decoded, RecordBatch, Tokens, Transaction

__all__ = ["JsonlDecoder"]

_MISSING = object()


def _lookup(obj: dict[str, Any], path: str, what: str, offset: int | None, raw: bytes) -> Any:
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
                f"{what} path {path!r}: {'.'.join(walked)!r} = {show(node)} is not an object",
                offset=offset,
                raw=raw,
            )
        if part not in node:
            return _MISSING
        node = node[part]
        walked.append(part)
    return node


def _record_decoder(config: JsonlConfig, *, raw: bool = False) -> msgspec.json.Decoder[Any] | None:
    """A msgspec decoder of records holding only the configured fields (top-level names; the
    others are skipped), or ``None`` when the configuration needs the general path (dotted
    paths, item objects, one name for two fields). ``raw``: the items field is kept as its
    JSON text (``msgspec.Raw``), not decoded."""
    fields = (config.items_field, config.ts_field, config.id_field)
    if config.item_name_field is not None or len(set(fields)) < 3:
        return None
    if any("." in f for f in fields):
        return None
    record = msgspec.defstruct(
        "Record",
        [
            ("items", msgspec.Raw if raw else Any, msgspec.UNSET),
            ("ts", Any, None),
            ("id", Any, None),
        ],
        rename=dict(zip(("items", "ts", "id"), fields, strict=True)),
    )
    return msgspec.json.Decoder(record)


#: what may stand outside the strings of a JSON array of strings (and the newlines joining
#: the arrays of a batch)
_ARRAY_BYTES = np.zeros(256, dtype=bool)
_ARRAY_BYTES[[ord(c) for c in "[], \t\r\n"]] = True


def _string_arrays(joined: bytes, n: int) -> Tokens | None:
    """``n`` JSON arrays (valid JSON, ASCII, no escapes), one per line of ``joined``, as
    :class:`~streamcount.intake.records.Tokens`; ``None`` unless each is one flat array of
    non-empty strings.

    >>> _string_arrays(b'["7", "007", "7"]\\n[ "tea" ]', 2).baskets()
    [['7', '007'], ['tea']]
    >>> _string_arrays(b'[["7"]]\\n"tea"', 2) is None
    True
    """
    buf = np.frombuffer(joined, dtype=np.uint8)
    quote = buf == _QUOTE
    quotes = np.flatnonzero(quote)
    if quotes.shape[0] % 2:
        return None
    opens, closes = quotes[0::2], quotes[1::2]
    if (closes - opens < 2).any():  # an empty name: feed skips it
        return None
    # an opening quote and what follows it up to the closing one: odd parity of the quotes
    # so far (a running count in uint8 wraps, which keeps its parity)
    in_string = np.cumsum(quote, dtype=np.uint8) & np.uint8(1) > 0
    outside = ~(in_string | quote)
    if (outside & ~_ARRAY_BYTES[buf]).any():  # a number, object, true, null...
        return None
    newlines = np.flatnonzero(buf == _NEWLINE)
    brackets = np.flatnonzero((buf == _OPEN) & outside)
    if brackets.shape[0] != n:
        return None
    per_row = np.bincount(np.searchsorted(newlines, brackets), minlength=n)
    if not (per_row == 1).all():  # one flat array per line
        return None
    bounds = np.empty(n + 1, dtype=np.int64)
    bounds[0] = 0
    bounds[1:-1] = np.searchsorted(opens, newlines)
    bounds[-1] = opens.shape[0]
    names, codes, counts = code_tokens(joined, buf, in_string & ~quote, opens + 1, closes, bounds)
    return Tokens(names, codes, counts.astype(np.int64, copy=False))


_ITEMS, _TS, _ID = attrgetter("items"), attrgetter("ts"), attrgetter("id")
_NONE = type(None)


def _whole_batch(
    parser: msgspec.json.Decoder[Any], lines: list[bytes], require_ts: bool
) -> tuple[list[msgspec.Raw], list[float | None], list[int], list[int], str] | None:
    """Every record of a batch parsed and checked with C-level passes (no Python code per
    record), or ``None`` when one of them needs a closer look (a record msgspec refuses,
    items absent, times or ids of mixed or unusual types)."""
    try:
        recs = list(map(parser.decode, lines))
    except msgspec.DecodeError:
        return None
    arrays = list(map(_ITEMS, recs))
    if msgspec.UNSET in arrays:
        return None
    stamps = list(map(_TS, recs))
    kinds = set(map(type, stamps))
    ts: list[float | None]
    if kinds == {_NONE} and not require_ts:
        ts = stamps
    elif kinds <= {int, float}:
        try:
            values = np.array(stamps, dtype=np.float64)
        except OverflowError:  # an integer past any float
            return None
        if not (np.abs(values) < MAX_TIMESTAMP).all():  # NaN and infinities fail too
            return None
        ts = values.tolist()
    else:
        return None
    ids = list(map(_ID, recs))
    kinds = set(map(type, ids))
    if kinds == {str}:
        ids_text = "".join(ids)
    elif kinds <= {int, _NONE}:
        ids_text = ""
    else:
        return None
    return arrays, ts, list(range(len(lines))), [], ids_text


_QUOTE, _OPEN, _NEWLINE = ord('"'), ord("["), ord("\n")


#: JSON values msgspec gives that the batch path takes as they are (bool is not an int here)
_PLAIN_TS = (int, float)


def _all_plain(
    batch: RecordBatch,
    rows: list[int],
    ts: list[float | None],
    *,
    baskets: list[list[str]] | None = None,
    tokens: Tokens | None = None,
) -> Decoded:
    """A batch none of whose records needs the record path: lines ``rows`` hold its
    transactions (the other lines hold no record), as ``baskets`` or ``tokens``, with their
    times."""
    offsets = batch.offsets
    kept = None if offsets is None else offsets[rows].tolist()
    raws: list[bytes | None] = [batch.lines[i] for i in rows]
    return Decoded(baskets, ts, kept, [], batch.source, raws, tokens=tokens)


def _plain_time(value: object, require_ts: bool) -> tuple[bool, float | None]:
    """``(True, seconds)`` for a time the batch path takes as it is (an int or float within
    range, or none where none is needed), ``(False, None)`` for one the record path must
    judge (and word).

    >>> _plain_time(3, True), _plain_time(None, False), _plain_time(float("nan"), False)
    ((True, 3.0), (True, None), (False, None))
    """
    if value is None:
        return not require_ts, None
    if type(value) in _PLAIN_TS:
        number = cast("int | float", value)
        if abs(number) < MAX_TIMESTAMP:  # not NaN, inf, huge
            return True, float(number)
    return False, None


class JsonlDecoder(LineDecoder):
    """One JSON object per line.

    Field names come from :class:`~streamcount.config.JsonlConfig`; each may be a dotted
    path into nested objects (``order.lines``). Rules:

    * the items field is required (``missing_field``) and must be a list (``wrong_type``);
      its elements are strings or numbers (numbers become ``str(n)``), or, with
      ``item_name_field`` set, objects holding the name under that (dotted) key;
      empty-string names are skipped; no names left is ``empty``;
    * ``ts`` is optional (``null`` or absent gives ``None``, unless ``require_ts``); a number
      is epoch seconds, a string is ISO-8601 (``Z`` or an offset; naive times are UTC);
    * ``id`` is optional; a string or an integer, kept as a string;
    * an item name or id holding a character of
      :data:`~streamcount.intake.formats.text.CONTROL_CHARS` sets the record aside
      (``control_chars``); names are NFC-normalised unless ``normalize`` is ``none``.

    Examples
    --------
    >>> d = JsonlDecoder(JsonlConfig(items_field="order.lines", item_name_field="sku"))
    >>> rec = b'{"id": 7, "ts": "1970-01-01T00:01:00Z", "order": {"lines": [{"sku": "tea"}]}}'
    >>> d.feed(rec, 0, len(rec) + 1)[0]
    Transaction(items=('tea',), ts=60.0, id='7', offset=0, end_offset=78)
    """

    __slots__ = (
        "_raw_records",
        "_records",
        "config",
        "encoding",
        "max_basket_items",
        "max_record_bytes",
        "nfc",
        "require_ts",
    )

    def __init__(
        self,
        config: JsonlConfig | None = None,
        max_basket_items: int = 200,
        max_record_bytes: int = 65536,
        encoding: str = "utf-8",
        *,
        require_ts: bool = False,
        normalize: str = "nfc",
    ) -> None:
        self.nfc = normalize == "nfc"  # input.normalize, checked with the settings
        self.config = config or JsonlConfig()
        self.max_basket_items = max_basket_items
        self.max_record_bytes = max_record_bytes
        self.encoding = encoding
        self.require_ts = require_ts
        #: the batch path's parser (UTF-8 feeds only: msgspec reads UTF-8)
        utf8 = codecs.lookup(encoding).name == "utf-8"
        self._records = _record_decoder(self.config) if utf8 else None
        self._raw_records = _record_decoder(self.config, raw=True) if utf8 else None

    def decode(self, batch: RecordBatch) -> Decoded:
        """The whole batch through msgspec; each record it cannot take as it is through
        :meth:`feed` (same transactions, same rejections, in order).

        Items lists of plain ASCII strings (the common case) are coded on their JSON text as
        basket lines are (:func:`~streamcount.intake.formats.basket.code_tokens`), without a
        Python string per item; other batches are decoded to names."""
        if self._raw_records is not None and batch.too_long is None and batch.lines:
            out = self._decode_raw(batch)
            if out is not None:
                return out
        return self._decode_names(batch)

    def _decode_names(self, batch: RecordBatch) -> Decoded:
        """:meth:`decode` with the names built as Python strings."""
        parser = self._records
        lines = batch.lines
        if parser is None or batch.too_long is not None or not lines:
            return LineDecoder.decode(self, batch)
        if max(map(len, lines)) > self.max_record_bytes:
            return LineDecoder.decode(self, batch)
        parse = parser.decode
        cap = self.max_basket_items
        require_ts = self.require_ts
        baskets: list[list[str]] = []
        ts: list[float | None] = []
        texts: list[str] = []  # per transaction: its names and id, joined
        rows: list[int] = []  # the record of each transaction
        slow: list[int] = []  # records for feed
        for i, line in enumerate(lines):
            try:
                rec = parse(line)
            except msgspec.DecodeError:  # ValidationError too
                slow.append(i)
                continue
            names = rec.items
            if type(names) is not list or not names:
                slow.append(i)
                continue
            try:
                text = "".join(names)  # a TypeError unless every element is a string
            except TypeError:
                if set(map(type, names)) != {int}:
                    slow.append(i)
                    continue
                names = list(map(str, names))
                text = "".join(names)
            if "" in names:
                slow.append(i)
                continue
            if len(set(names)) != len(names):
                names = list(dict.fromkeys(names))
            plain, value = _plain_time(rec.ts, require_ts)
            if not plain:
                slow.append(i)
                continue
            record_id = rec.id
            if record_id is not None:
                if type(record_id) is int:
                    record_id = str(record_id)
                elif type(record_id) is not str:
                    slow.append(i)
                    continue
            if len(names) > cap:
                slow.append(i)
                continue
            baskets.append(names)
            ts.append(value)
            texts.append(text if record_id is None else text + record_id)
            rows.append(i)
        # names and ids must be plain ASCII without control characters: one search over the
        # batch, then record by record only if it finds something
        text = "".join(texts)
        if not text.isascii() or CONTROL_CHARS.search(text) is not None:
            keep = []
            for j, one in enumerate(texts):
                if one.isascii() and CONTROL_CHARS.search(one) is None:
                    keep.append(j)
                else:
                    slow.append(rows[j])
            baskets = [baskets[j] for j in keep]
            ts = [ts[j] for j in keep]
            rows = [rows[j] for j in keep]
        if not slow:
            return _all_plain(batch, rows, ts, baskets=baskets)
        return self._merge(batch, baskets, ts, rows, sorted(slow))

    def _decode_raw(self, batch: RecordBatch) -> Decoded | None:
        """:meth:`decode` on the items' JSON text, or ``None`` when some record's items are
        not a list of plain ASCII strings without escapes (the names path takes the batch)."""
        parser = self._raw_records
        assert parser is not None
        lines = batch.lines
        if max(map(len, lines)) > self.max_record_bytes:
            return None
        got = _whole_batch(parser, lines, self.require_ts)
        if got is None:
            got = self._record_by_record(parser, lines)
        arrays, ts, rows, slow, ids_text = got
        if not rows:
            return None
        joined = b"\n".join(arrays)  # JSON strings hold no raw newline
        if not joined.isascii() or b"\\" in joined or b"\x7f" in joined:
            return None  # escapes, DEL or non-ASCII names: the names path checks them
        if not ids_text.isascii() or CONTROL_CHARS.search(ids_text) is not None:
            return None
        tokens = _string_arrays(joined, len(rows))
        if tokens is None:
            return None
        counts = tokens.lengths
        bad = (counts == 0) | (counts > self.max_basket_items)
        if bad.any():  # "empty" and "too_many_items" are worded by feed
            slow.extend(np.asarray(rows)[bad].tolist())
            tokens = tokens.select(~bad)
            keep = np.flatnonzero(~bad).tolist()
            ts = [ts[j] for j in keep]
            rows = [rows[j] for j in keep]
        if slow:
            return self._merge(batch, tokens.baskets(), ts, rows, sorted(slow))
        return _all_plain(batch, rows, ts, tokens=tokens)

    def _record_by_record(
        self, parser: msgspec.json.Decoder[Any], lines: list[bytes]
    ) -> tuple[list[msgspec.Raw], list[float | None], list[int], list[int], str]:
        """:func:`_whole_batch` one record at a time, setting aside (for :meth:`feed`) the
        records it cannot take: ``(items' JSON, times, rows taken, rows set aside, ids)``."""
        parse = parser.decode
        require_ts = self.require_ts
        arrays: list[msgspec.Raw] = []
        ts: list[float | None] = []
        ids: list[str] = []
        rows: list[int] = []
        slow: list[int] = []
        unset = msgspec.UNSET
        for i, line in enumerate(lines):
            try:
                rec = parse(line)
            except msgspec.DecodeError:  # ValidationError too
                slow.append(i)
                continue
            items = rec.items
            if items is unset:
                slow.append(i)
                continue
            plain, value = _plain_time(rec.ts, require_ts)
            if not plain:
                slow.append(i)
                continue
            record_id = rec.id
            if record_id is not None:
                if type(record_id) is str:
                    ids.append(record_id)
                elif type(record_id) is not int:
                    slow.append(i)
                    continue
            arrays.append(items)
            ts.append(value)
            rows.append(i)
        return arrays, ts, rows, slow, "".join(ids)

    def _merge(
        self,
        batch: RecordBatch,
        baskets: list[list[str]],
        ts: list[float | None],
        rows: list[int],
        slow: list[int],
    ) -> Decoded:
        """The batch's transactions in record order: ``rows`` decoded by the batch path,
        ``slow`` through :meth:`feed`."""
        out = Decoded(source=batch.source, ts=[], offsets=[], raws=[])
        assert out.ts is not None and out.offsets is not None and out.raws is not None
        fast = iter(zip(rows, baskets, ts, strict=True))
        pending = next(fast, None)
        for i in slow:
            while pending is not None and pending[0] < i:
                self._append(out, batch, *pending)
                pending = next(fast, None)
            start = batch.offset(i)
            try:
                got = self.feed(batch.lines[i], start, batch.end_of(i))
            except ParseError as exc:
                out.errors.append(exc.with_traceback(None))
                continue
            for t in got:
                out.baskets.append(list(t.items))
                out.ts.append(t.ts)
                out.offsets.append(t.offset)
                out.raws.append(batch.lines[i])
        while pending is not None:
            self._append(out, batch, *pending)
            pending = next(fast, None)
        return out

    @staticmethod
    def _append(
        out: Decoded, batch: RecordBatch, i: int, basket: list[str], ts: float | None
    ) -> None:
        assert out.ts is not None and out.offsets is not None and out.raws is not None
        out.baskets.append(basket)
        out.ts.append(ts)
        out.offsets.append(batch.offset(i))
        out.raws.append(batch.lines[i])

    def feed(self, record: bytes, offset: int | None, end_offset: int | None) -> list[Transaction]:
        text = decode_text(record, offset, self.encoding, self.max_record_bytes)
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
                f"record = {show(obj)}: expected a JSON object",
                offset=offset,
                raw=record,
            )
        cfg = self.config
        value = _lookup(obj, cfg.items_field, "items_field", offset, record)
        if value is _MISSING:
            raise ParseError(
                "missing_field",
                f"no field {cfg.items_field!r} (input.jsonl.items_field) in record "
                f"with keys {show(sorted(obj))}",
                offset=offset,
                raw=record,
            )
        if not isinstance(value, list):
            raise ParseError(
                "wrong_type",
                f"field {cfg.items_field!r} = {show(value)}: expected a list of items",
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
                        f"{where} = {show(element)}: expected an object holding "
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
            name = item_name(element, where, offset, record, nfc=self.nfc)
            if name:
                names.append(name)
        items = dedupe(names)
        if not items:
            raise ParseError(
                "empty",
                f"field {cfg.items_field!r} = {show(value)} holds no item names",
                offset=offset,
                raw=record,
            )
        if len(items) > self.max_basket_items:
            raise too_many_items_error(len(items), self.max_basket_items, offset, record, "record")
        ts_value = _lookup(obj, cfg.ts_field, "ts_field", offset, record)
        ts: float | None = None
        if ts_value is not _MISSING and ts_value is not None:
            ts = parse_ts(ts_value, f"field {cfg.ts_field!r}", offset, record)
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
                    f"field {cfg.id_field!r} = {show(id_value)}: an id must be a string or "
                    "an integer",
                    offset=offset,
                    raw=record,
                )
            record_id = str(id_value)
            check_control(record_id, f"field {cfg.id_field!r}", offset, record)
        return [Transaction(tuple(items), ts, record_id, offset, end_offset)]
