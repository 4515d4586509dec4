"""JSON lines decoded a batch at a time (msgspec, configured fields only) against the record
path (the standard library, one record at a time): same transactions, times, offsets and the
same rejections with the same wording, on generated records with every kind of value the
rules treat apart (numbers as names, booleans, floats, empty and non-ASCII names, control
characters, lone surrogate escapes, NaN and out-of-range numbers, malformed lines)."""

from __future__ import annotations

import json

from hypothesis import event, given, settings
from hypothesis import strategies as st

from streamcount.config.settings import JsonlConfig
from streamcount.intake.formats import JsonlDecoder
from streamcount.intake.formats.text import LineDecoder
from streamcount.intake.records import Decoded, RecordBatch

_NAMES = st.sampled_from(
    ["tea", "jam", "7", "007", "", "caf\u00e9", "cafe\u0301", "tea\u202ejam", "a\nb", "\u00a0"]
)
_VALUES = st.one_of(
    _NAMES,
    st.integers(-5, 10**20),
    st.sampled_from([True, None, 1.5, 2.0, 1e300]),
)
_TS = st.one_of(
    st.none(),
    st.integers(0, 2 * 10**9),
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e13, max_value=1e13),
    st.sampled_from(["2024-05-01T12:30:00Z", "yesterday", True, 1e20]),
)
_IDS = st.one_of(st.none(), st.integers(0, 10**6), _NAMES, st.sampled_from([1.5, False, [1]]))
_RAW = st.sampled_from(
    [
        b"",
        b"   ",
        b"[1, 2]",
        b'{"items": [NaN]}',
        b'{"items": [1e400]}',
        b'{"items": ["\\ud800"]}',
        b'{"items": ["tea"]} trailing',
        b'{"items": "tea"}',
        b'{"ts": 5}',
        b'{"items": ["tea", "\xff"]}',
        b'{"items": ["tea"], "items": ["jam"]}',
        b'{"items": null}',
        b'{"items": []}',
    ]
)


@st.composite
def _record(draw: st.DrawFn) -> bytes:
    if draw(st.integers(0, 7)) == 0:
        return draw(_RAW)
    obj: dict[str, object] = {}
    if draw(st.integers(0, 15)):
        plain = draw(st.booleans())
        values = st.sampled_from(["tea", "jam", "scone", "7", "12"]) if plain else _VALUES
        obj["items"] = draw(st.lists(values, max_size=7))
    if draw(st.booleans()):
        obj["ts"] = draw(_TS)
    if draw(st.booleans()):
        obj["id"] = draw(_IDS)
    if draw(st.booleans()):
        obj["extra"] = {"nested": [1, {"x": "y"}]}
    return json.dumps(obj, ensure_ascii=draw(st.booleans())).encode()


def _view(out: Decoded) -> tuple[object, ...]:
    return (
        out.baskets,
        out.ts,
        out.offsets,
        out.raws,
        [(e.reason, e.offset, e.detail, e.raw) for e in out.errors],
    )


@settings(max_examples=300, deadline=None)
@given(
    records=st.lists(_record(), min_size=1, max_size=20),
    cap=st.integers(2, 6),
    require_ts=st.booleans(),
)
def test_batch_path_equals_record_path(records: list[bytes], cap: int, require_ts: bool) -> None:
    decoder = JsonlDecoder(JsonlConfig(), max_basket_items=cap, require_ts=require_ts)
    batch = RecordBatch.from_lines(records, start=7)
    fast = decoder.decode(batch)
    slow = LineDecoder.decode(decoder, batch)
    event(f"{len(fast.errors) > 0} errors")
    assert _view(fast) == _view(slow)


def test_other_field_names_and_fallback_configs() -> None:
    line = b'{"order": "o1", "when": 60, "lines": ["tea", "jam", "tea"], "id": "x"}'
    fast = JsonlDecoder(JsonlConfig(id_field="order", ts_field="when", items_field="lines"))
    out = fast.decode(RecordBatch.from_lines([line]))
    assert (out.baskets, out.ts) == ([["tea", "jam"]], [60.0])
    nested = JsonlDecoder(JsonlConfig(items_field="o.lines", item_name_field="sku"))
    rec = b'{"o": {"lines": [{"sku": "tea"}, {"sku": 7}]}}'
    assert nested.decode(RecordBatch.from_lines([rec])).baskets == [["tea", "7"]]
