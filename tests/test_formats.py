"""Record formats: every rejection reason with a real bad record, and bulk reading checked
against per-line decoding and against the published dataset sizes."""

from __future__ import annotations

import calendar
import contextlib
import gzip
import json
import random
from dataclasses import replace
from datetime import UTC, datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pytest
from data_files import data_path

from streamcount.config.settings import CsvConfig, InputConfig, JsonlConfig
from streamcount.errors import REASONS, InputError, ParseError
from streamcount.intake.bulk import BLOCK_BYTES, iter_batches
from streamcount.intake.formats import (
    FORMATS,
    BasketDecoder,
    CsvOrderDecoder,
    JsonlDecoder,
    format_for_path,
    make_decoder,
)
from streamcount.intake.records import Decoded, RecordBatch, Transaction


def feed_lines(decoder, lines: list[bytes]) -> tuple[list[Transaction], list[ParseError], int]:
    """Feed lines as a file would hold them (newline after each); collect output."""
    out: list[Transaction] = []
    errors: list[ParseError] = []
    pos = 0
    for line in lines:
        end = pos + len(line) + 1
        try:
            out += decoder.feed(line, pos, end)
        except ParseError as exc:
            errors.append(exc)
        pos = end
    return out, errors, pos


def reason_of(decoder, record: bytes) -> ParseError:
    with pytest.raises(ParseError) as info:
        decoder.feed(record, 5, 5 + len(record) + 1)
    assert info.value.offset == 5
    assert info.value.reason in REASONS
    return info.value


# ---------------------------------------------------------------------------------- basket


def test_basket_separators_duplicates_and_blank_lines():
    # the documented rule: a line of only whitespace is not a record (skipped, not counted);
    # a line of separators without an item is a record with no items (``empty``)
    d = BasketDecoder(max_basket_items=10)
    lines = [b"tea,scone jam", b"", b"  , ,\t", b"jam\tjam, tea,,tea", b"milk\r", b" \t"]
    out, errors, _ = feed_lines(d, lines)
    assert [(e.reason, e.offset) for e in errors] == [("empty", 15)]
    assert [t.items for t in out] == [("tea", "scone", "jam"), ("jam", "tea"), ("milk",)]
    assert [(t.offset, t.end_offset) for t in out] == [(0, 14), (22, 40), (40, 46)]
    # the whole-batch path gives the same transactions and the same rejection
    whole = d.decode(RecordBatch.from_lines(lines))
    assert whole.baskets == [list(t.items) for t in out]
    assert whole.offsets == [0, 22, 40]
    assert [(e.reason, e.offset) for e in whole.errors] == [("empty", 15)]


def test_basket_too_many_items_is_never_truncated():
    d = BasketDecoder(max_basket_items=3)
    # four items, but only three distinct after removing the repeat: accepted whole
    assert d.feed(b"a b c a", 0, 8)[0].items == ("a", "b", "c")
    err = reason_of(d, b"a b c d")
    assert err.reason == "too_many_items"
    assert "4 distinct items" in err.detail
    assert "max_basket_items = 3" in err.detail


def test_basket_bad_encoding_and_too_long():
    d = BasketDecoder(max_basket_items=10, max_record_bytes=16)
    err = reason_of(d, b"tea \xff\xfe jam")
    assert err.reason == "bad_encoding"
    assert "byte 4" in err.detail
    assert err.raw == b"tea \xff\xfe jam"
    err = reason_of(d, b"x" * 17)
    assert err.reason == "too_long"
    assert "17 bytes" in err.detail
    assert d.feed(b"x" * 16, 0, 17)[0].items == ("x" * 16,)


def test_byte_order_mark_at_start_of_file_is_dropped():
    d = BasketDecoder()
    assert d.feed("\ufefftea jam".encode(), 0, 10)[0].items == ("tea", "jam")


@pytest.mark.parametrize("fmt", sorted(FORMATS))
def test_records_cut_by_the_source_are_too_long_in_every_format(fmt):
    d = make_decoder(
        InputConfig(
            format=fmt, csv=CsvConfig(header=False, order_field="0", item_field="1", ts_field="2")
        ),
        10,
    )
    batch = RecordBatch(
        [b"abcd", b"tea"],
        np.array([10, 111], dtype=np.int64),
        115,
        np.array([True, False]),
        "file",
    )
    out = d.decode(batch)
    (err,) = [e for e in out.errors if e.reason == "too_long"]
    assert err.offset == 10
    assert err.raw == b"abcd"
    assert "100 bytes or more" in err.detail


# ----------------------------------------------------------------------------------- jsonl


def test_jsonl_nested_paths_and_item_objects():
    cfg = JsonlConfig(
        id_field="meta.order",
        ts_field="meta.at",
        items_field="order.lines",
        item_name_field="p.sku",
    )
    d = JsonlDecoder(cfg, max_basket_items=10)
    rec = json.dumps(
        {
            "meta": {"order": 991, "at": 1700000000.5},
            "order": {"lines": [{"p": {"sku": "tea"}}, {"p": {"sku": 7}}, {"p": {"sku": "tea"}}]},
        }
    ).encode()
    (t,) = d.feed(rec, 0, len(rec) + 1)
    assert t == Transaction(("tea", "7"), 1700000000.5, "991", 0, len(rec) + 1)


def test_jsonl_key_with_a_literal_dot_is_found():
    d = JsonlDecoder(JsonlConfig(items_field="order.lines"))
    (t,) = d.feed(b'{"order.lines": ["a", "b"]}', 0, 1)
    assert t.items == ("a", "b")


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        # independent oracle: calendar.timegm on the UTC wall-clock fields
        ("2024-05-01T12:30:00Z", calendar.timegm((2024, 5, 1, 12, 30, 0))),
        ("2024-05-01T12:30:00", calendar.timegm((2024, 5, 1, 12, 30, 0))),  # naive = UTC
        ("2024-05-01 14:30:00+02:00", calendar.timegm((2024, 5, 1, 12, 30, 0))),
        ("2024-05-01T12:30:00.250-01:00", calendar.timegm((2024, 5, 1, 13, 30, 0)) + 0.25),
        ("2024-05-01", calendar.timegm((2024, 5, 1, 0, 0, 0))),
    ],
)
def test_jsonl_iso_timestamps(text, expected):
    d = JsonlDecoder()
    rec = json.dumps({"items": ["a"], "ts": text}).encode()
    assert d.feed(rec, 0, 1)[0].ts == pytest.approx(expected, abs=1e-6)


def test_jsonl_iso_timestamp_agrees_with_datetime_arithmetic():
    # a second oracle: timedelta from the epoch, computed without fromisoformat
    moment = datetime(2031, 12, 31, 23, 59, 59, tzinfo=timezone(timedelta(hours=-7)))
    expected = (moment - datetime(1970, 1, 1, tzinfo=UTC)).total_seconds()
    rec = json.dumps({"items": ["a"], "ts": moment.isoformat()}).encode()
    assert JsonlDecoder().feed(rec, 0, 1)[0].ts == expected


def test_jsonl_optional_fields_and_ids():
    d = JsonlDecoder()
    (t,) = d.feed(b'{"items": [1, 2.5, "", "x"]}', 0, 1)
    assert t.items == ("1", "2.5", "x")  # numbers become str(n); empty names skipped
    assert t.ts is None
    assert t.id is None
    assert d.feed(b'{"items": ["a"], "id": "o-1", "ts": null}', 0, 1)[0].id == "o-1"
    assert d.feed(b"   ", 0, 1) == []
    strict = JsonlDecoder(require_ts=True)
    assert reason_of(strict, b'{"items": ["a"]}').reason == "missing_field"


@pytest.mark.parametrize(
    ("record", "reason", "named"),
    [
        (b'{"items": ["a", "b"', "malformed", "JSON"),
        (b'["a", "b"]', "wrong_type", "JSON object"),
        (b'{"id": 3}', "missing_field", "'items'"),
        (b'{"items": "a b"}', "wrong_type", "'a b'"),
        (b'{"items": ["a", {"x": 1}]}', "wrong_type", "items[1]"),
        (b'{"items": ["a", null]}', "wrong_type", "items[1]"),
        (b'{"items": ["a", true]}', "wrong_type", "True"),
        (b'{"items": []}', "empty", "'items'"),
        (b'{"items": ["", ""]}', "empty", "'items'"),
        (b'{"items": ["a"], "ts": "yesterday"}', "wrong_type", "'yesterday'"),
        (b'{"items": ["a"], "ts": true}', "wrong_type", "True"),
        (b'{"items": ["a"], "ts": NaN}', "wrong_type", "nan"),
        (b'{"items": ["a"], "id": [1]}', "wrong_type", "[1]"),
        (b'{"items": ["a"], "id": 1.5}', "wrong_type", "1.5"),
        (b'{"items": ["\xc3\x28"]}', "bad_encoding", "utf-8"),
    ],
)
def test_jsonl_rejections(record, reason, named):
    err = reason_of(JsonlDecoder(max_basket_items=5), record)
    assert err.reason == reason
    assert named in err.detail
    assert err.raw == record


def test_jsonl_item_objects_missing_name_and_not_objects():
    d = JsonlDecoder(JsonlConfig(item_name_field="sku"))
    err = reason_of(d, b'{"items": [{"sku": "a"}, {"name": "b"}]}')
    assert (err.reason, "items[1]" in err.detail) == ("missing_field", True)
    err = reason_of(d, b'{"items": ["a"]}')
    assert err.reason == "wrong_type"


def test_jsonl_nested_path_through_a_non_object():
    d = JsonlDecoder(JsonlConfig(items_field="order.lines"))
    err = reason_of(d, b'{"order": ["a"]}')
    assert err.reason == "wrong_type"
    assert "'order'" in err.detail


def test_jsonl_too_many_and_too_long_and_long_values_are_shortened():
    d = JsonlDecoder(max_basket_items=2, max_record_bytes=200)
    assert reason_of(d, b'{"items": ["a", "b", "c"]}').reason == "too_many_items"
    assert d.feed(b'{"items": ["a", "b", "a"]}', 0, 1)[0].items == ("a", "b")
    assert reason_of(d, b'{"items": ["' + b"a" * 300 + b'"]}').reason == "too_long"
    err = reason_of(JsonlDecoder(), b'{"items": "' + b"z" * 500 + b'"}')
    assert err.reason == "wrong_type"
    assert len(err.detail) < 200  # the value's repr is cut to about 80 characters
    assert "..." in err.detail


# ------------------------------------------------------------------------------------- csv


def test_csv_groups_rows_by_order_with_header_and_quantity():
    cfg = CsvConfig(quantity_field="qty", order_close_seconds=0)
    d = CsvOrderDecoder(cfg, max_basket_items=10)
    lines = [
        b"ts,order_id,qty,item",
        b"100,A,2,tea",
        b"101,A,5,jam",
        b"102,A,1,tea",  # repeat: a basket is a set, quantity does not multiply
        b"103,B,1,scone",
        b"",
        b"104,C,1,milk",
    ]
    out, errors, end = feed_lines(d, lines)
    assert errors == []
    assert [(t.id, t.items, t.ts) for t in out] == [
        ("A", ("tea", "jam"), 102.0),
        ("B", ("scone",), 103.0),
    ]
    # A starts at the first data row (after the 21-byte header) and ends after its last row
    assert (out[0].offset, out[0].end_offset) == (21, 21 + 12 + 12 + 12)
    assert d.held == 1
    assert d.safe_offset(end) == end - len(b"104,C,1,milk\n")
    (last,) = d.close_all()
    assert (last.id, last.items) == ("C", ("milk",))
    assert d.safe_offset(end) == end


def test_csv_quantity_rules():
    d = CsvOrderDecoder(CsvConfig(quantity_field="qty"))
    d.feed(b"order_id,item,ts,qty", 0, 21)
    assert reason_of(d, b"A,tea,1,0").reason == "empty"
    assert reason_of(d, b"A,tea,1,-2").reason == "empty"
    err = reason_of(d, b"A,tea,1,two")
    assert (err.reason, "'two'" in err.detail) == ("wrong_type", True)
    assert d.held == 0  # rejected rows join no order


def test_csv_interleaved_orders_close_by_event_time():
    d = CsvOrderDecoder(CsvConfig(order_close_seconds=30), max_basket_items=10)
    out, errors, _ = feed_lines(
        d,
        [
            b"order_id,item,ts",
            b"A,tea,0",
            b"B,jam,5",
            b"A,scone,10",  # A and B interleave: both stay open
            b"B,milk,20",
            b"C,bread,39",  # 29 s after A's last row: A stays open
            b"C,butter,40",  # 30 s after A's last row: A closes; B (20) stays open
        ],
    )
    assert errors == []
    assert [(t.id, t.items) for t in out] == [("A", ("tea", "scone"))]
    assert d.held == 2
    assert d.close_due(49.0) == []
    due = d.close_due(50.0)
    assert [(t.id, t.items, t.ts) for t in due] == [("B", ("jam", "milk"), 20.0)]
    assert [t.id for t in d.close_all()] == ["C"]


def test_csv_rows_without_time_close_on_id_change():
    d = CsvOrderDecoder(CsvConfig(order_close_seconds=300))
    out, _, _ = feed_lines(d, [b"order_id,item,ts", b"A,tea,", b"A,jam,", b"B,tea,"])
    assert [(t.id, t.items, t.ts) for t in out] == [("A", ("tea", "jam"), None)]


def test_csv_iso_time_and_missing_or_bad_cells():
    d = CsvOrderDecoder(CsvConfig(order_close_seconds=0))
    d.feed(b"order_id,item,ts", 0, 17)
    d.feed(b"A,tea,2024-05-01T00:00:10Z", 17, 40)
    (t,) = d.feed(b"B,jam,2024-05-01T00:00:20", 40, 70)
    assert t.ts == calendar.timegm((2024, 5, 1, 0, 0, 10))  # oracle: calendar.timegm
    assert reason_of(d, b"C,tea").reason == "missing_field"
    assert reason_of(d, b",tea,5").reason == "missing_field"
    assert reason_of(d, b"C,,5").reason == "empty"
    assert reason_of(d, b"C,tea,soon").reason == "wrong_type"
    assert reason_of(d, b'C,"tea,5').reason == "malformed"
    assert reason_of(d, b"C,t\xe9a,5").reason == "bad_encoding"
    strict = CsvOrderDecoder(require_ts=True)
    strict.feed(b"order_id,item,ts", 0, 17)
    assert reason_of(strict, b"A,tea,").reason == "missing_field"


def test_csv_header_missing_column_is_an_input_error():
    d = CsvOrderDecoder(CsvConfig(item_field="sku"))
    with pytest.raises(InputError) as info:
        d.feed(b"order_id,item,ts", 0, 17)
    assert not isinstance(info.value, ParseError)
    message = str(info.value)
    assert "input.csv.item_field = 'sku'" in message
    assert "'order_id', 'item', 'ts'" in message


def test_csv_without_header_uses_column_numbers():
    cfg = CsvConfig(header=False, order_field="2", item_field="0", ts_field="1")
    d = CsvOrderDecoder(cfg)
    out, _, _ = feed_lines(d, [b"tea,1,A", b"jam,2,A"])
    assert out == []
    assert d.close_all()[0].items == ("tea", "jam")
    # names instead of numbers with header: false are refused with the other settings
    # (tests/test_configload.py)


def test_csv_delimiter_and_repeated_header():
    d = CsvOrderDecoder(CsvConfig(delimiter=";", order_close_seconds=0))
    out, errors, _ = feed_lines(d, [b"order_id;item;ts", b"A;tea;1", b"order_id;item;ts", b"B;x;2"])
    assert errors == []
    assert [t.id for t in out] == ["A"]


def test_csv_too_many_items_sets_the_whole_order_aside():
    d = CsvOrderDecoder(CsvConfig(order_close_seconds=0), max_basket_items=2)
    out, errors, _ = feed_lines(
        d,
        [b"order_id,item,ts", b"A,a,1", b"A,b,1", b"A,a,1", b"A,c,1", b"A,d,1", b"B,x,2"],
    )
    assert [e.reason for e in errors] == ["too_many_items", "too_many_items"]
    assert out == []  # A is dropped whole, never truncated to two items
    assert [t.id for t in d.close_all()] == ["B"]


def _csv_stream(seed: int, n_rows: int) -> list[bytes]:
    rng = random.Random(seed)
    rows = [b"order_id,item,ts"]
    t = 0.0
    open_ids: list[str] = []
    next_id = 0
    for _ in range(n_rows):
        t += rng.choice([0.5, 1, 2, 7])
        if not open_ids or rng.random() < 0.3:
            open_ids.append(f"o{next_id}")
            next_id += 1
        oid = rng.choice(open_ids[-3:])
        rows.append(f"{oid},p{rng.randrange(12)},{t}".encode())
        if rng.random() < 0.05:
            rows.append(b"broken,row")
    return rows


def test_csv_checkpoint_by_state_dict_is_exact():
    cfg = CsvConfig(order_close_seconds=5)
    lines = _csv_stream(seed=3, n_rows=400)
    d = CsvOrderDecoder(cfg)
    whole, _, _ = feed_lines(d, lines)
    reference = whole + d.close_all()

    cut = 150
    first = CsvOrderDecoder(cfg)
    out, _, _ = feed_lines(first, lines[:cut])
    state = json.loads(json.dumps(first.state_dict()))  # must survive JSON
    second = CsvOrderDecoder(cfg)
    second.load_state(state)
    pos = sum(len(x) + 1 for x in lines[:cut])
    for line in lines[cut:]:
        end = pos + len(line) + 1
        with contextlib.suppress(ParseError):
            out += second.feed(line, pos, end)
        pos = end
    out += second.close_all()
    assert out == reference


def test_csv_replay_from_safe_offset_reproduces_pending_orders():
    # contiguous orders (no interleaving): replay from safe_offset is exact
    cfg = CsvConfig(order_close_seconds=0)
    lines = [b"order_id,item,ts"] + [f"o{i // 3},p{(i * 7) % 5},{i}".encode() for i in range(30)]
    d = CsvOrderDecoder(cfg)
    whole, _, _ = feed_lines(d, lines)
    reference = whole + d.close_all()

    cut = 12  # in the middle of an order
    first = CsvOrderDecoder(cfg)
    out, _, consumed = feed_lines(first, lines[:cut])
    safe = first.safe_offset(consumed)
    assert safe < consumed
    header_state = {"columns": first.state_dict()["columns"], "orders": []}
    second = CsvOrderDecoder(cfg)
    second.load_state(header_state)
    pos = 0
    for line in lines:
        end = pos + len(line) + 1
        if pos >= safe:
            out += second.feed(line, pos, end)
        pos = end
    out += second.close_all()
    assert out == reference


# ---------------------------------------------------------------------------- make_decoder


def test_make_decoder_chooses_by_format():
    # unknown formats and encodings are refused with the other settings
    # (tests/test_configload.py), before any decoder is made
    assert isinstance(make_decoder(InputConfig(format="basket"), 5), BasketDecoder)
    assert isinstance(make_decoder(InputConfig(format="jsonl"), 5), JsonlDecoder)
    assert isinstance(make_decoder(InputConfig(format="csv"), 5), CsvOrderDecoder)
    assert isinstance(make_decoder(InputConfig(format="csv"), 5, fmt="jsonl"), JsonlDecoder)
    d = make_decoder(InputConfig(format="jsonl", max_record_bytes=10), 5)
    assert reason_of(d, b'{"items": ["abc"]}').reason == "too_long"


# ---------------------------------------------------------------------- bulk reading (replay)


def collect(path, fmt="basket", cfg=None, max_items=200, block_bytes=BLOCK_BYTES):
    """Decode a whole file as replay does: batches of whole lines through one decoder."""
    cfg = replace(cfg or InputConfig(), format=fmt)
    decoder = make_decoder(cfg, max_items)
    out = Decoded()
    ends = []
    for batch in iter_batches(
        str(path), max_record_bytes=cfg.max_record_bytes, block_bytes=block_bytes
    ):
        out.extend(decoder.decode(batch))
        ends.append(batch.end_offset)
    out.extend(Decoded.from_transactions(decoder.close_all()))
    assert ends == sorted(ends)
    return out.baskets, out.ts or [], out.errors, ends[-1] if ends else 0


def test_chess_has_3196_transactions_of_37_items():
    # tests/data/README.md (chess): 3,196 transactions, every one exactly 37 items,
    # 75 distinct items (ids 1-75)
    items, _, errors, _ = collect(data_path("chess.dat.gz"))
    assert errors == []
    assert len(items) == 3196
    assert {len(x) for x in items} == {37}
    assert {i for x in items for i in x} == {str(i) for i in range(1, 76)}


def test_retail_has_88162_transactions_and_908576_occurrences():
    # tests/data/README.md (retail): 88,162 transactions, 908,576 item occurrences,
    # 16,470 distinct items, longest 76
    items, _, errors, end = collect(data_path("retail.dat.gz"))
    assert errors == []
    assert len(items) == 88162
    assert sum(map(len, items)) == 908576
    assert len({i for x in items for i in x}) == 16470
    assert max(map(len, items)) == 76
    with gzip.open(data_path("retail.dat.gz"), "rb") as f:
        assert end == len(f.read())


def test_kosarak_repeat_is_read_once():
    # tests/data/README.md (kosarak_prefix): 36,682 transactions, 294,008 item
    # occurrences counting repeats once (line 10,102 names item 86 twice), longest 699
    items, _, errors, _ = collect(data_path("kosarak_prefix.dat.gz"), max_items=1000)
    assert errors == []
    assert len(items) == 36682
    assert sum(map(len, items)) == 294008
    with gzip.open(data_path("kosarak_prefix.dat.gz"), "rb") as f:
        raw_line = f.read().split(b"\n")[10101].split()
    assert raw_line.count(b"86") == 2
    assert items[10101].count("86") == 1
    assert len(items[10101]) == len(set(raw_line))


def _junk_basket_file(path: Path, seed: int, n: int) -> list[bytes]:
    rng = random.Random(seed)
    lines = []
    for _ in range(n):
        kind = rng.random()
        if kind < 0.05:
            line = b""
        elif kind < 0.08:
            line = b" , \t"
        elif kind < 0.11:
            line = b"tea \xff jam"
        elif kind < 0.14:
            line = b"x" * rng.randrange(61, 90)
        else:
            k = rng.randrange(1, 9)
            toks = [f"p{rng.randrange(15)}" for _ in range(k)]
            line = rng.choice([" ", ",", ", ", "\t"]).join(toks).encode()
        lines.append(line)
    path.write_bytes(b"\n".join(lines))  # no newline after the last line
    return lines


@pytest.mark.parametrize("block_bytes", [16, 257, BLOCK_BYTES])
def test_bulk_basket_reading_matches_line_by_line_decoding(tmp_path, block_bytes):
    path = tmp_path / "junk.txt"
    lines = _junk_basket_file(path, seed=block_bytes, n=3000)
    cfg = InputConfig(max_record_bytes=60)
    oracle = BasketDecoder(max_basket_items=6, max_record_bytes=60)
    want_items, want_errors, _ = feed_lines(oracle, lines)
    items, _, errors, end = collect(path, cfg=cfg, max_items=6, block_bytes=block_bytes)
    assert items == [list(t.items) for t in want_items]
    assert sorted((e.offset, e.reason, e.raw) for e in errors) == sorted(
        (e.offset, e.reason, e.raw) for e in want_errors
    )
    assert {e.reason for e in errors} == {"bad_encoding", "too_long", "too_many_items", "empty"}
    assert end == path.stat().st_size


def test_gzip_and_plain_files_read_the_same(tmp_path):
    plain = tmp_path / "b.txt"
    lines = _junk_basket_file(plain, seed=11, n=500)
    packed = tmp_path / "b.txt.gz"  # detected by content, not by name
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    odd_name = tmp_path / "b.data"
    odd_name.write_bytes(gzip.compress(plain.read_bytes()))

    def summary(path):
        items, _, errors, end = collect(path, block_bytes=64)
        return items, [(e.reason, e.offset, e.raw) for e in errors], end

    a = summary(plain)
    assert a == summary(packed) == summary(odd_name)
    assert len(a[0]) > 0.7 * len(lines)
    assert a[2] == len(plain.read_bytes())


def test_line_longer_than_a_read_block_is_skipped_with_bounded_memory(tmp_path):
    path = tmp_path / "long.txt"
    long_line = b"y " * (1_300_000)  # 2.6 MB: spans several 1 MiB read blocks
    path.write_bytes(b"a b\n" + long_line + b"\nc d\n" + b"z" * 3_000_000)
    items, _, errors, end = collect(path, cfg=InputConfig(max_record_bytes=100))
    assert items == [["a", "b"], ["c", "d"]]
    assert [(e.reason, e.offset) for e in errors] == [
        ("too_long", 4),
        ("too_long", 4 + len(long_line) + 1 + 4),
    ]
    assert errors[0].raw == long_line[:100]
    assert str(len(long_line)) in errors[0].detail
    assert end == path.stat().st_size


def test_bulk_jsonl_and_csv(tmp_path):
    jpath = tmp_path / "t.jsonl"
    jpath.write_text(
        '{"id": 1, "ts": 10, "items": ["a", "b"]}\n'
        "\n"
        '{"id": 2, "ts": "1970-01-01T00:00:20Z", "items": ["c"]}\n'
        '{"id": 3, "items": []}\n'
        "{broken\n"
        '{"id": 4, "ts": 40, "items": ["d", "d"]}'
    )
    items, ts, errors, end = collect(jpath, "jsonl", block_bytes=16)
    assert items == [["a", "b"], ["c"], ["d"]]
    assert ts == [10.0, 20.0, 40.0]
    assert [e.reason for e in errors] == ["empty", "malformed"]
    assert end == jpath.stat().st_size

    cpath = tmp_path / "t.csv"
    cpath.write_text("order_id,item,ts\nA,tea,1\nA,jam,2\nB,tea,3\nB,,4\nC,x,50")
    cfg = InputConfig(csv=CsvConfig(order_close_seconds=10))
    items, ts, errors, _ = collect(cpath, "csv", cfg, block_bytes=16)
    assert list(zip(items, ts, strict=True)) == [
        (["tea", "jam"], 2.0),
        (["tea"], 3.0),
        (["x"], 50.0),
    ]
    assert [e.reason for e in errors] == ["empty"]


def test_bulk_reading_missing_file_names_the_path(tmp_path):
    missing = tmp_path / "nope.dat"
    with pytest.raises(InputError) as info:
        next(iter_batches(str(missing)))
    assert str(missing) in str(info.value)


def test_decoded_transactions_view():
    d = BasketDecoder().decode(RecordBatch.from_lines(["a b", "c"]))
    assert d.transactions() == [Transaction(("a", "b"), offset=0), Transaction(("c",), offset=4)]
    assert len(d) == 2


def test_format_registry_names_suffixes_and_factories():
    assert set(FORMATS) == {"basket", "jsonl", "csv"}
    assert format_for_path("orders.JSONL.gz") == "jsonl"
    assert format_for_path("lines.csv") == "csv"
    assert format_for_path("baskets.dat") == "basket"
    assert format_for_path("notes") is None
    for name, spec in FORMATS.items():
        decoder = make_decoder(InputConfig(), 5, fmt=name)
        assert decoder.held == 0
        assert decoder.state_dict() == {} or not spec.stateless
