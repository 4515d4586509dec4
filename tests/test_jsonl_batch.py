"""JSON lines decoded a batch at a time (msgspec, configured fields only) against the record
path (the standard library, one record at a time): same transactions, times, offsets and the
same rejections with the same wording, on generated records with every kind of value the
rules treat apart (numbers as names, booleans, floats, empty and non-ASCII names, control
characters, lone surrogate escapes, NaN and out-of-range numbers, malformed lines)."""

from __future__ import annotations

import gzip
import json

from data_files import data_path
from hypothesis import event, given, settings
from hypothesis import strategies as st

from streamcount.config.load import config_from_mapping
from streamcount.config.settings import JsonlConfig
from streamcount.intake.formats import JsonlDecoder
from streamcount.intake.formats.text import LineDecoder
from streamcount.intake.records import Decoded, RecordBatch
from streamcount.pipeline import Pipeline

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
    st.sampled_from(["2024-05-01T12:30:00Z", "yesterday", True, 1e20, 10**400, -(10**20)]),
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
def _record(draw: st.DrawFn, mostly_plain: bool) -> bytes:
    if draw(st.integers(0, 30 if mostly_plain else 7)) == 0:
        return draw(_RAW)
    obj: dict[str, object] = {}
    if draw(st.integers(0, 15)):
        plain = mostly_plain or draw(st.booleans())
        values = st.sampled_from(["tea", "jam", "scone", "7", "12"]) if plain else _VALUES
        obj["items"] = draw(st.lists(values, max_size=7))
    if draw(st.booleans()):
        obj["ts"] = draw(st.integers(0, 2 * 10**9) if draw(st.integers(0, 9)) else _TS)
    if draw(st.booleans()):
        obj["id"] = draw(st.sampled_from(["o1", 7]) if draw(st.integers(0, 9)) else _IDS)
    if draw(st.booleans()):
        obj["extra"] = {"nested": [1, {"x": "y"}]}
    return json.dumps(obj, ensure_ascii=draw(st.booleans())).encode()


def _view(out: Decoded) -> tuple[object, ...]:
    """What a decoder hands on (errors with their wording)."""
    return (
        out.baskets,
        out.ts,
        out.offsets,
        out.raws,
        [(e.reason, e.offset, e.detail, e.raw) for e in out.errors],
    )


@settings(max_examples=500, deadline=None)
@given(
    records=st.booleans().flatmap(lambda p: st.lists(_record(p), min_size=1, max_size=20)),
    cap=st.integers(2, 6),
    require_ts=st.booleans(),
)
def test_batch_path_equals_record_path(records: list[bytes], cap: int, require_ts: bool) -> None:
    decoder = JsonlDecoder(JsonlConfig(), max_basket_items=cap, require_ts=require_ts)
    batch = RecordBatch.from_lines(records, start=7)
    fast = decoder.decode(batch)
    slow = LineDecoder.decode(decoder, batch)
    event("items coded on their JSON text" if fast.tokens is not None else "names built")
    assert _view(fast) == _view(slow)


def test_other_field_names_and_fallback_configs() -> None:
    line = b'{"order": "o1", "when": 60, "lines": ["tea", "jam", "tea", "007", "7"], "id": "x"}'
    fast = JsonlDecoder(JsonlConfig(id_field="order", ts_field="when", items_field="lines"))
    out = fast.decode(RecordBatch.from_lines([line]))
    assert out.tokens is not None  # coded on the JSON text
    assert (out.baskets, out.ts) == ([["tea", "jam", "007", "7"]], [60.0])
    nested = JsonlDecoder(JsonlConfig(items_field="o.lines", item_name_field="sku"))
    rec = b'{"o": {"lines": [{"sku": "tea"}, {"sku": 7}]}}'
    assert nested.decode(RecordBatch.from_lines([rec])).baskets == [["tea", "7"]]


def _orders(n: int) -> list[bytes]:
    """The first ``n`` transactions of T10I4D100K (tests/data/README.md) as JSON orders."""
    with gzip.open(data_path("T10I4D100K.dat.gz"), "rt", encoding="ascii") as fh:
        lines = [next(fh).split() for _ in range(n)]
    return [
        json.dumps({"id": f"o{i}", "ts": 1000 + i, "items": items}).encode()
        for i, items in enumerate(lines)
    ]


def test_coded_orders_count_what_lists_of_names_count() -> None:
    config = config_from_mapping(
        {
            "engine": {
                "epsilon": 0.01,
                "max_itemset_size": 2,
                "window_size": 4000,
                "pane_size": 1000,
                "batch_size": 500,
            },
            # the future-time guard on, with a clock that puts the last 300 orders ahead
            "input": {"max_future_seconds": 10},
        },
        source="test",
    )
    clock = lambda: 1000 + 9000 - 300 - 10  # noqa: E731
    coded = Pipeline(config, alerts=False, clock=clock)
    names = Pipeline(config, alerts=False, clock=clock)
    decoder = JsonlDecoder(JsonlConfig())
    records = _orders(9000)
    for i in range(0, len(records), 2500):
        out = decoder.decode(RecordBatch.from_lines(records[i : i + 2500], start=i))
        assert out.tokens is not None
        a = coded.add(out)
        b = names.add(Decoded(out.tokens.baskets(), out.ts, out.offsets, [], raws=out.raws))
        assert a.accepted == b.accepted
        assert [(e.reason, e.offset) for e in a.rejected] == [
            (e.reason, e.offset) for e in b.rejected
        ]
    # stamps 1000..9999, clock 9690, limit 10 s: the stamps 9701..9999 are ahead
    assert coded.rejected_counts == names.rejected_counts == {"too_early": 9999 - 9700}
    assert list(coded.engine.vocabulary.names) == list(names.engine.vocabulary.names)
    snap_a, snap_b = coded.engine.snapshot(), names.engine.snapshot()
    assert (snap_a.first_seq, snap_a.last_seq) == (snap_b.first_seq, snap_b.last_seq)
    assert [(s.items, s.count) for s in snap_a.frequent(0.01)] == [
        (s.items, s.count) for s in snap_b.frequent(0.01)
    ]


def test_an_integer_time_past_any_float_is_wrong_type_not_a_crash() -> None:
    # found by the property test above: float(10**400) raises OverflowError
    record = b'{"items": ["tea"], "ts": 1' + b"0" * 400 + b"}"
    decoder = JsonlDecoder(JsonlConfig())
    batch = RecordBatch.from_lines([record, b'{"items": ["jam"], "ts": 5}'])
    for out in (decoder.decode(batch), LineDecoder.decode(decoder, batch)):
        assert out.baskets == [["jam"]]
        assert [e.reason for e in out.errors] == ["wrong_type"]
        assert "finite number" in out.errors[0].detail
