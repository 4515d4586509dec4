"""JSON lines: one JSON object per line, fields named by ``input.jsonl``.

See :class:`JsonlDecoder` for the rules. The same decoder serves a followed file, HTTP ingest
bodies (one object or NDJSON lines) and ``streamcount replay``.
"""

from __future__ import annotations

import json
from typing import Any

from streamcount.config.settings import JsonlConfig
from streamcount.errors import ParseError
from streamcount.intake.formats.text import (
    LineDecoder,
    check_control,
    decode_text,
    dedupe,
    item_name,
    parse_ts,
    show,
    too_many_items_error,
)
from streamcount.intake.records import Transaction

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
