"""Input hygiene: control characters in item names and order ids are set aside in every format
(reason ``control_chars``), and names are NFC-normalised (``input.normalize``).

The oracle for "which characters are refused" is the Unicode Character Database as Python's
``unicodedata`` module ships it, not the decoders' regular expression: general category Cc
(C0, DEL and C1 controls) except tab, categories Zl and Zp (U+2028, U+2029), the explicit
directional formatting characters of UAX #9 (bidi classes LRE, RLE, PDF, LRO, RLO, LRI, RLI,
FSI, PDI) and the three implicit directional marks (LRM, RLM, ALM).
"""

from __future__ import annotations

import json
import sys
import unicodedata

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamcount.config.settings import CsvConfig, InputConfig
from streamcount.errors import REASONS, ParseError
from streamcount.intake.formats import (
    BasketDecoder,
    CsvOrderDecoder,
    JsonlDecoder,
    make_decoder,
)
from streamcount.intake.formats.text import CONTROL_CHARS, LineDecoder
from streamcount.intake.records import Decoded, RecordBatch

_EXPLICIT_BIDI = {"LRE", "RLE", "PDF", "LRO", "RLO", "LRI", "RLI", "FSI", "PDI"}
_IMPLICIT_MARKS = {"LEFT-TO-RIGHT MARK", "RIGHT-TO-LEFT MARK", "ARABIC LETTER MARK"}


def refused(ch: str) -> bool:
    """The rule, from the Unicode Character Database (see the module docstring)."""
    category = unicodedata.category(ch)
    if category == "Cc":
        return ch != "\t"
    return (
        category in ("Zl", "Zp")
        or unicodedata.bidirectional(ch) in _EXPLICIT_BIDI
        or unicodedata.name(ch, "") in _IMPLICIT_MARKS
    )


#: one of each kind: C0, escape, DEL, C1 (NEL too), separators, marks, override, isolate
SAMPLES = ["\x00", "\x1b", "\x7f", "\x85", "\x9b", "\u2028", "\u2029", "\u200e", "\u061c"]
SAMPLES += ["\u202e", "\u202a", "\u2066", "\u2069"]


def test_reason_is_documented() -> None:
    assert "control_chars" in REASONS
    assert "bidirectional" in REASONS["control_chars"]


def test_refused_set_is_exactly_the_unicode_rule() -> None:
    every = "".join(chr(c) for c in range(sys.maxunicode + 1) if not 0xD800 <= c <= 0xDFFF)
    found = {m.group() for m in CONTROL_CHARS.finditer(every)}
    expected = {ch for ch in every if refused(ch)}
    assert found == expected
    assert len(expected) == 65 - 1 + 2 + 12  # Cc without tab, Zl + Zp, 9 explicit + 3 marks


# ------------------------------------------------------------------------- each format


def _one_error(decoder: object, record: bytes) -> ParseError:
    with pytest.raises(ParseError) as info:
        decoder.feed(record, 7, 7 + len(record) + 1)  # type: ignore[attr-defined]
    assert info.value.offset == 7
    return info.value


@pytest.mark.parametrize("ch", SAMPLES, ids=[f"U+{ord(c):04X}" for c in SAMPLES])
def test_basket_line_with_a_control_character_is_set_aside(ch: str) -> None:
    record = f"tea sc{ch}one jam".encode()
    error = _one_error(BasketDecoder(), record)
    assert error.reason == "control_chars"
    assert f"U+{ord(ch):04X}" in error.detail
    assert error.raw == record


@pytest.mark.parametrize("ch", SAMPLES, ids=[f"U+{ord(c):04X}" for c in SAMPLES])
def test_jsonl_item_and_id_with_a_control_character_are_set_aside(ch: str) -> None:
    escaped = json.dumps({"id": "A1", "items": ["tea", f"jam{ch}"]}).encode()  # \uXXXX escape
    assert _one_error(JsonlDecoder(), escaped).reason == "control_chars"
    raw = json.dumps({"items": [f"{ch}jam"]}, ensure_ascii=False).encode()  # UTF-8 bytes
    assert _one_error(JsonlDecoder(), raw).reason == "control_chars"
    with_id = json.dumps({"id": f"A{ch}1", "items": ["tea"]}).encode()
    error = _one_error(JsonlDecoder(), with_id)
    assert (error.reason, "'id'" in error.detail) == ("control_chars", True)


def test_jsonl_item_objects_are_checked_too() -> None:
    from streamcount.config.settings import JsonlConfig

    decoder = JsonlDecoder(JsonlConfig(item_name_field="sku"))
    error = _one_error(decoder, b'{"items": [{"sku": "tea"}, {"sku": "j\\u0000am"}]}')
    assert error.reason == "control_chars"
    assert "items[1].sku" in error.detail


@pytest.mark.parametrize("ch", SAMPLES, ids=[f"U+{ord(c):04X}" for c in SAMPLES])
def test_csv_item_and_order_id_with_a_control_character_are_set_aside(ch: str) -> None:
    decoder = CsvOrderDecoder(CsvConfig(order_close_seconds=0))
    assert decoder.feed(b"order_id,item,ts", 0, 17) == []
    assert _one_error(decoder, f"A,te{ch}a,10".encode()).reason == "control_chars"
    # at the end of a cell too, where stripping would have hidden a separator
    assert _one_error(decoder, f"A,tea{ch},10".encode()).reason == "control_chars"
    assert _one_error(decoder, f"A{ch},tea,10".encode()).reason == "control_chars"
    assert decoder.held == 0  # the rows joined no order


def test_tab_and_a_final_carriage_return_are_not_refused() -> None:
    # tab is the one C0 control allowed; a carriage return ends lines of CRLF files
    basket = BasketDecoder()
    assert basket.feed(b"tea\tjam\r", 0, 9)[0].items == ("tea", "jam")
    assert _one_error(basket, b"tea\rjam").reason == "control_chars"  # not at the end
    jsonl = JsonlDecoder()
    assert jsonl.feed(b'{"items": ["green\\ttea"]}\r', 0, 27)[0].items == ("green\ttea",)
    csv_decoder = CsvOrderDecoder(CsvConfig(order_close_seconds=0))
    csv_decoder.feed(b"order_id,item,ts\r", 0, 18)
    csv_decoder.feed(b"A,green\ttea,10\r", 18, 34)
    assert csv_decoder.close_all()[0].items == ("green\ttea",)


def test_every_format_counts_a_clean_record_after_a_refused_one() -> None:
    for fmt, lines in {
        "basket": [b"tea\x00", b"tea jam"],
        "jsonl": [b'{"items": ["tea\\u202e"]}', b'{"items": ["tea", "jam"]}'],
        "csv": [b"order_id,item,ts", b"A,tea\x7f,1", b"B,tea,2", b"B,jam,2"],
    }.items():
        decoder = make_decoder(InputConfig(format=fmt), 10)
        out = decoder.decode(RecordBatch.from_lines(lines))
        out.extend(Decoded.from_transactions(decoder.close_all()))
        assert [e.reason for e in out.errors] == ["control_chars"], fmt
        assert [sorted(b) for b in out.baskets] == [["jam", "tea"]], fmt


# ---------------------------------------------------------------------- normalisation

COMPOSED = "caf\u00e9"  # é as one code point
DECOMPOSED = "cafe\u0301"  # e followed by COMBINING ACUTE ACCENT


def test_nfc_makes_one_item_in_every_format() -> None:
    assert COMPOSED != DECOMPOSED and unicodedata.normalize("NFC", DECOMPOSED) == COMPOSED
    feeds = {
        "basket": [f"{COMPOSED} tea", f"{DECOMPOSED} {COMPOSED}"],
        "jsonl": [json.dumps({"items": [n, "tea"]}) for n in (COMPOSED, DECOMPOSED)],
        "csv": ["order_id,item,ts", f"A,{COMPOSED},1", "A,tea,1", f"B,{DECOMPOSED},2"],
    }
    for fmt, lines in feeds.items():
        for normalize, distinct in (("nfc", {COMPOSED}), ("none", {COMPOSED, DECOMPOSED})):
            decoder = make_decoder(InputConfig(format=fmt, normalize=normalize), 10)
            out = decoder.decode(RecordBatch.from_lines([s.encode() for s in lines]))
            out.extend(Decoded.from_transactions(decoder.close_all()))
            names = {i for b in out.baskets for i in b} - {"tea"}
            assert names == distinct, (fmt, normalize)
            assert out.errors == []
    # within one basket the two spellings are one item once normalised
    out = BasketDecoder().decode(RecordBatch.from_lines([f"{DECOMPOSED} {COMPOSED}"]))
    assert out.baskets == [[COMPOSED]]


def test_unknown_normalize_value_is_a_config_error() -> None:
    # checked once, with the other settings (decoders do not check their settings again)
    from streamcount.config.load import config_from_mapping
    from streamcount.errors import ConfigError

    with pytest.raises(ConfigError, match=r"input\.normalize"):
        config_from_mapping({"input": {"normalize": "nfkc"}})


# ------------------------------------------------- basket: block check against per line

#: an alphabet with every kind of character the two paths treat specially
_ALPHABET = st.sampled_from(
    [
        *["a", "b", "\u00e9", "e\u0301", "\u0301", " ", ",", "\t", "\r", "\x0b", "\x1c"],
        *SAMPLES,
        *["\u00a0", "\u3000", "\ufeff"],
    ]
)
_LINES = st.lists(st.lists(_ALPHABET, max_size=8).map("".join), min_size=1, max_size=12)


def _per_line(decoder: BasketDecoder, batch: RecordBatch) -> Decoded:
    return LineDecoder.decode(decoder, batch)


def _summary(out: Decoded) -> tuple[object, ...]:
    return (
        out.baskets,
        out.offsets,
        [(e.reason, e.offset, e.raw) for e in out.errors],
        out.raws,
    )


def _oracle(lines: list[str], nfc: bool) -> tuple[list[list[str]], list[str]]:
    """What the documented rules give, written independently of the decoder."""
    baskets, reasons = [], []
    for line in lines:
        body = line[:-1] if line.endswith("\r") else line
        if any(refused(ch) for ch in body):
            reasons.append("control_chars")
            continue
        if not line.strip():
            continue
        text = unicodedata.normalize("NFC", line) if nfc else line
        items = list(dict.fromkeys(text.replace(",", " ").split()))
        if not items:
            reasons.append("empty")
            continue
        baskets.append(items)
    return baskets, reasons


@settings(max_examples=300, deadline=None)
@given(lines=_LINES, nfc=st.booleans())
def test_block_check_and_per_line_check_agree(lines: list[str], nfc: bool) -> None:
    decoder = BasketDecoder(normalize="nfc" if nfc else "none")
    batch = RecordBatch.from_lines([s.encode() for s in lines], start=100)
    fast = decoder.decode(batch)
    slow = _per_line(decoder, batch)
    assert _summary(fast) == _summary(slow)
    assert (fast.baskets, [e.reason for e in fast.errors]) == _oracle(lines, nfc)


def test_clean_block_takes_the_fast_path(monkeypatch: pytest.MonkeyPatch) -> None:
    calls: list[int] = []
    original = LineDecoder.decode

    def counting(self: LineDecoder, batch: RecordBatch) -> Decoded:
        calls.append(len(batch))
        return original(self, batch)

    monkeypatch.setattr(LineDecoder, "decode", counting)
    decoder = BasketDecoder()
    clean = [f"{DECOMPOSED} tea\r", "jam, scone", "", "\u00e9clair tea"]
    out = decoder.decode(RecordBatch.from_lines([s.encode() for s in clean]))
    assert calls == []  # NFD text is normalised on the block, not line by line
    assert out.baskets == [[COMPOSED, "tea"], ["jam", "scone"], ["\u00e9clair", "tea"]]
    dirty = [*clean, "tea\u202ejam"]
    out = decoder.decode(RecordBatch.from_lines([s.encode() for s in dirty]))
    assert calls == [5]  # one hit sends the batch record by record
    assert [e.reason for e in out.errors] == ["control_chars"]
    assert out.baskets[0] == [COMPOSED, "tea"]
