"""Basket lines decoded to codes on the bytes (``Tokens``) against the record-at-a-time path.

* generated batches (``007`` beside ``7``, long numbers, unicode, commas and whitespace mixed,
  blank lines, repeats, over-long baskets, control characters): the batch decoder gives
  exactly the transactions (as name sets, in order) and the rejections (reason and record
  index) of :meth:`LineDecoder.decode`, which feeds one record at a time, and of the rules
  written out independently in :func:`_oracle`;
* counting through the bulk interning (``Pipeline`` -> ``Engine.add_ids``) gives the window,
  item ids included, of counting the same transactions as lists of names;
* whole T10I4D100K and retail read through the bulk path reproduce the published top pairs of
  tests/data/reference_counts.json (exact counts by full enumeration, tests/data/README.md).
"""

from __future__ import annotations

import json
import unicodedata

import numpy as np
import pytest
from data_files import data_path
from hypothesis import event, given, settings
from hypothesis import strategies as st

from streamcount.config.load import config_from_mapping
from streamcount.engine.vocab import ItemVocabulary
from streamcount.intake.bulk import iter_batches
from streamcount.intake.formats import BasketDecoder
from streamcount.intake.formats.text import CONTROL_CHARS, LineDecoder
from streamcount.intake.records import Decoded, RecordBatch, Tokens
from streamcount.pipeline import Pipeline

#: tokens the byte path treats apart: numbers in canonical form or not, past int64, names
_ASCII_TOKENS = [
    *["7", "007", "07", "0", "00", "70", "1", "10", "100"],
    *["999999999999999999", "1000000000000000000", "12345678901234567890123"],
    *["tea", "Tea", "jam-2", "7a", "a7", "x" * 40, "+7", "-7", "7.0"],
]
_TOKENS = [*_ASCII_TOKENS, "caf\u00e9", "cafe\u0301", "\u00e9clair"]  # non-ASCII: text path
_SEPARATORS = [" ", ",", "\t", ", ", "  ", " ,", ",,"]
_ODD = ["\u00a0", "\u3000", "\x0b", "\u202e", "\r", "\x00"]  # unicode spaces, controls, a CR


@st.composite
def _line(draw: st.DrawFn, ascii_only: bool) -> str:
    kind = draw(st.integers(0, 29 if ascii_only else 4))
    if kind in (0, 2, 3):
        return draw(st.sampled_from(["", " ", "\t", " , ", ",", "\r"]))
    alphabet = _ASCII_TOKENS if ascii_only else _TOKENS
    tokens = draw(st.lists(st.sampled_from(alphabet), min_size=1, max_size=9))
    seps = draw(st.lists(st.sampled_from(_SEPARATORS), min_size=len(tokens), max_size=len(tokens)))
    lead = draw(st.sampled_from(["", " ", ",", "\t"]))
    text = lead + "".join(t + s for t, s in zip(tokens, seps, strict=True))
    if kind == 1:  # something odd somewhere
        pos = draw(st.integers(0, len(text)))
        text = text[:pos] + draw(st.sampled_from(_ODD)) + text[pos:]
    if draw(st.booleans()):
        text += "\r"  # a CRLF line end
    return text


#: mostly ASCII batches (the byte path), some with non-ASCII names (the text path) or an odd
#: character (the record path)
_BATCHES = st.booleans().flatmap(lambda a: st.lists(_line(a), min_size=1, max_size=25))


def _by_record(batch: RecordBatch, out: Decoded) -> tuple[list[frozenset[str]], list]:
    """Transactions as name sets, and rejections as (reason, record index)."""
    index = {off: i for i, off in enumerate(batch.offsets.tolist())}
    return (
        [frozenset(b) for b in out.baskets],
        sorted((e.reason, index[e.offset]) for e in out.errors),
    )


def _oracle(lines: list[str], cap: int) -> tuple[list[frozenset[str]], list]:
    """The documented rules, written independently of the decoder (one line at a time)."""
    baskets, rejected = [], []
    for i, line in enumerate(lines):
        body = line[:-1] if line.endswith("\r") else line
        if CONTROL_CHARS.search(body):
            rejected.append(("control_chars", i))
            continue
        if not line.strip():
            continue
        items = set(unicodedata.normalize("NFC", line).replace(",", " ").split())
        if not items:
            rejected.append(("empty", i))
        elif len(items) > cap:
            rejected.append(("too_many_items", i))
        else:
            baskets.append(frozenset(items))
    return baskets, sorted(rejected)


@settings(max_examples=400, deadline=None)
@given(lines=_BATCHES, cap=st.integers(3, 9))
def test_batch_decoding_equals_record_at_a_time(lines: list[str], cap: int) -> None:
    decoder = BasketDecoder(max_basket_items=cap)
    batch = RecordBatch.from_lines([s.encode() for s in lines], start=3)
    fast = decoder.decode(batch)
    slow = LineDecoder.decode(decoder, batch)
    assert _by_record(batch, fast) == _by_record(batch, slow) == _oracle(lines, cap)
    # order within a basket, offsets and raw records as the record path has them too
    assert (fast.baskets, fast.offsets, fast.raws) == (slow.baskets, slow.offsets, slow.raws)
    event("byte path" if fast.tokens is not None else "text or record path")
    if fast.tokens is not None:
        tokens = fast.tokens
        assert len(set(tokens.names)) == len(tokens.names)
        assert int(tokens.lengths.sum()) == tokens.codes.shape[0]
        assert all(len(set(b)) == len(b) for b in tokens.baskets())


def test_clean_ascii_batch_is_coded_on_its_bytes_and_007_is_not_7() -> None:
    lines = ["7 007 7, tea", "", " , ", "0 00 07 tea", "12345678901234567890 1234567890123456789\r"]
    out = BasketDecoder().decode(RecordBatch.from_lines(lines))
    assert out.tokens is not None  # the byte path, with the blank line and ", " on it
    assert out.baskets == [
        ["7", "007", "tea"],
        ["0", "00", "07", "tea"],
        ["12345678901234567890", "1234567890123456789"],
    ]
    assert [(e.reason, e.offset) for e in out.errors] == [("empty", 14)]
    codes = dict(zip(out.tokens.names, range(len(out.tokens.names)), strict=True))
    assert len({codes["7"], codes["007"], codes["0"], codes["00"], codes["07"]}) == 5


def test_too_many_items_stays_on_the_fast_path_and_controls_take_the_record_path() -> None:
    """A line of too many distinct items is set aside as the record path sets it aside (same
    reason, detail, offset and raw bytes) while the batch's other lines stay tokens, so one
    long basket does not send a whole batch record by record."""
    decoder = BasketDecoder(max_basket_items=2)
    batch = RecordBatch.from_lines(["1 2", "1 2 3", ", ,", "4"])
    out = decoder.decode(batch)
    assert out.tokens is not None and out.tokens.baskets() == [["1", "2"], ["4"]]
    assert [e.reason for e in out.errors] == ["too_many_items", "empty"]
    assert "3 distinct items" in out.errors[0].detail
    slow = LineDecoder.decode(decoder, batch)
    assert [(e.reason, e.detail, e.offset, e.raw) for e in out.errors] == [
        (e.reason, e.detail, e.offset, e.raw) for e in slow.errors
    ]
    assert out.offsets == slow.offsets
    out = decoder.decode(RecordBatch.from_lines(["1 2", "1\x0b2"]))
    assert out.tokens is None and [e.reason for e in out.errors] == ["control_chars"]


def test_vocabulary_interns_a_table_in_order_of_first_appearance() -> None:
    names = ["c", "a", "b", "unused"]
    codes = np.array([2, 0, 2, 1, 0], dtype=np.int32)
    bulk = ItemVocabulary(["a"])
    one_by_one = ItemVocabulary(["a"])
    table = bulk.encode_table(names, codes)
    want = one_by_one.encode_flat([names[c] for c in codes.tolist()])
    assert table[codes].tolist() == want.tolist()
    assert list(bulk.names) == list(one_by_one.names) == ["a", "b", "c"]
    assert table[3] == -1 and bulk.get("unused") is None


def test_tokens_concat_and_select_keep_the_transactions() -> None:
    a = Tokens(["x", "y"], np.array([1, 0, 0], dtype=np.int32), np.array([2, 1]))
    b = Tokens(["z", "x"], np.array([0, 1, 1], dtype=np.int32), np.array([2, 1]))
    both = a.concat(b)
    assert both.baskets() == [["y", "x"], ["x"], ["z", "x"], ["x"]]
    assert both.select(np.array([False, True, True, False])).baskets() == [["x"], ["z", "x"]]
    left = Decoded(tokens=a, raws=[b"y x", b"x"])
    left.extend(Decoded(tokens=b, raws=[b"z x", b"x"]))
    assert left.tokens is not None and len(left) == 4
    assert left.baskets == both.baskets()


def _pipeline(catalogue: bool, tmp_path) -> Pipeline:
    mapping = {
        "engine": {
            "epsilon": 0.01,
            "max_itemset_size": 3,
            "window_size": 4000,
            "pane_size": 1000,
            "batch_size": 500,
        },
        "rules": {"min_support": 0.01},
    }
    if catalogue:
        path = tmp_path / "catalogue.csv"
        path.write_text("sku,product,category\n25,p25,c1\n52,p52,c1\n39,p39,c2\n")
        mapping["items"] = {
            "catalogue": str(path),
            "levels": ["sku", "category"],
            "ignore": ["368", "1?"],
            "rename": ["(8.) => \\1x"],
        }
    return Pipeline(config_from_mapping(mapping, source="test"), alerts=False)


@pytest.mark.parametrize("catalogue", [False, True])
def test_bulk_interning_counts_what_lists_of_names_count(catalogue: bool, tmp_path) -> None:
    # the first 12,000 transactions of T10I4D100K (tests/data/README.md), windows of 4 panes
    bulk, names = _pipeline(catalogue, tmp_path), _pipeline(catalogue, tmp_path)
    decoder = BasketDecoder()
    seen = 0
    for batch in iter_batches(str(data_path("T10I4D100K.dat.gz")), block_bytes=1 << 16):
        out = decoder.decode(batch)
        assert out.tokens is not None
        bulk.add(out)
        names.add(Decoded([list(b) for b in out.tokens.baskets()], raws=out.raws))
        seen += len(out)
        if seen >= 12000:
            break
    a, b = bulk.engine, names.engine
    assert a.transactions_seen == b.transactions_seen
    assert a.transactions_seen + sum(bulk.rejected_counts.values()) == seen
    assert list(a.vocabulary.names) == list(b.vocabulary.names)  # the same ids
    snap_a, snap_b = a.snapshot(), b.snapshot()
    assert [(s.items, s.count) for s in snap_a.frequent(0.01)] == [
        (s.items, s.count) for s in snap_b.frequent(0.01)
    ]
    assert bulk.rejected_counts == names.rejected_counts


@pytest.mark.slow
@pytest.mark.parametrize("dataset", ["T10I4D100K", "retail"])
def test_whole_file_through_the_bulk_path_gives_the_published_top_pairs(dataset: str) -> None:
    ref = json.loads(data_path("reference_counts.json").read_text())["datasets"][dataset]
    n = ref["transactions"]
    pipeline = Pipeline(
        config_from_mapping(
            {
                "engine": {
                    "epsilon": 0.0,
                    "max_itemset_size": 2,
                    "window_size": n,
                    "pane_size": n,
                    "batch_size": n,
                    "max_basket_items": 1000,
                }
            },
            source="test",
        ),
        alerts=False,
    )
    decoder = BasketDecoder(max_basket_items=1000)
    coded = 0
    for batch in iter_batches(str(data_path(ref["file"]))):
        out = decoder.decode(batch)
        coded += out.tokens is not None
        pipeline.add(out)
    assert coded  # the bulk path did the work
    pipeline.flush()
    snap = pipeline.engine.snapshot()
    assert snap.transactions == n  # reference_counts.json
    level = snap.levels[1]
    order = np.lexsort((level.items[:, 1], level.items[:, 0], -level.count))
    top = []
    for i in order.tolist():
        pair = sorted(int(snap.item_names[j]) for j in level.items[i].tolist())
        top.append((-int(level.count[i]), pair))
    top.sort()
    assert [[p, -c] for c, p in top[:20]] == ref["top20_pairs"]
