"""Basket lines: one transaction per line, items separated by whitespace and/or commas.

``tea, scone  jam`` is the transaction ``{tea, scone, jam}``. A line of only whitespace is not
a record (skipped, not counted); a line of separators without any item (``, ,``) is set aside
as ``empty``. Repeated items count once (a basket is a set). A line holding a character of
:data:`~streamcount.intake.formats.text.CONTROL_CHARS` anywhere (a carriage return only at
its end, as in CRLF files) is set aside as ``control_chars``; names are NFC-normalised unless
``input.normalize: none``.

:meth:`BasketDecoder.decode` takes a whole batch at once and falls back to one record at a
time only for a batch with something to set aside (other than a line of separators only), so
both paths give the same transactions and the same rejections. An ASCII batch is split with
numpy on its bytes and handed over as :class:`~streamcount.intake.records.Tokens` (codes into
a table of the batch's distinct names: no Python object per item); a name of digits without a
leading zero (``7``, not ``007``, whose text is not the number's canonical form) is told apart
by its value, any other by its bytes. Other text is decoded in a few C-level passes (one
decode, one search for control characters, one normal-form test, one split per line).
"""

from __future__ import annotations

import codecs
import contextlib
import gc
import re
import unicodedata
from collections.abc import Iterator

import numpy as np

from streamcount.errors import ParseError
from streamcount.intake.formats.text import (
    LineDecoder,
    check_control,
    decode_text,
    dedupe,
    too_many_items_error,
)
from streamcount.intake.records import Decoded, RecordBatch, Tokens, Transaction

__all__ = ["BasketDecoder"]

#: what an ASCII block may hold: printable ASCII, tab, and the newlines and carriage returns
#: of line ends (C0 controls and DEL are the ASCII part of ``CONTROL_CHARS``)
_ASCII_ALLOWED = bytes(range(0x20, 0x7F)) + b"\t\n\r"
#: ``CONTROL_CHARS`` but newline and carriage return, which :func:`_block_has_control` treats
#: apart (a character class alone keeps the search at C speed)
_BLOCK_CONTROL = re.compile(
    r"[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069]"
)


def _block_has_control(joined: bytes, text: str) -> bool:
    """Whether some line of a block (lines joined by newlines) holds a character of
    ``CONTROL_CHARS``, a carriage return only counting where it does not end a line.

    ASCII text is checked on its bytes with one ``bytes.translate`` (deleting what is allowed
    leaves nothing), other text with one search of a character class.
    """
    if text.isascii() and len(joined) == len(text):
        if joined.translate(None, _ASCII_ALLOWED):
            return True
    elif _BLOCK_CONTROL.search(text) is not None:
        return True
    if "\r" in text:  # CRLF files: a carriage return is fine right before a newline or at the end
        return text.count("\r") != text.count("\r\n") + text.endswith("\r")
    return False


#: On a line of ASCII text that passed the control check, the bytes up to 0x20 are space, tab,
#: carriage return (of a CRLF end) and the newlines joining the lines: with the comma, what
#: ends an item (the other ASCII whitespace ``str.split`` knows are refused control characters)
_SPACE, _COMMA, _NEWLINE, _ZERO = 0x20, 0x2C, 0x0A, 0x30
#: codecs under which ASCII bytes read as themselves (the numpy path works on bytes)
_ASCII_CODECS = frozenset({"utf-8", "ascii", "latin-1", "iso8859-1", "cp1252"})
#: a number of more digits than this is told apart by its bytes (int64 holds 18 digits)
_MAX_DIGITS = 18
#: names longer than this are told apart by Python bytes objects, not a byte matrix
_MATRIX_BYTES = 1 << 24


def _numbers(buf: np.ndarray, ends: np.ndarray, lens: np.ndarray) -> np.ndarray:
    """The value of each all-digit token (at most :data:`_MAX_DIGITS` digits), read digit
    column by digit column from the right (one pass per digit of the longest)."""
    width = int(lens.max(initial=0))
    dtype = np.int32 if width <= 9 else np.int64
    pos = ends - 1
    values = buf[pos].astype(dtype) - _ZERO
    scale = 1
    for k in range(2, width + 1):
        pos -= 1  # -1 wraps to the last byte; such a token is shorter, its digit masked
        digit = buf[pos].astype(dtype) - _ZERO
        digit *= lens >= k
        scale *= 10
        values += digit * dtype(scale)
    return values.astype(np.int64, copy=False)


def _number_codes(values: np.ndarray) -> tuple[list[str], np.ndarray]:
    """Distinct numbers as names (``str`` of each, their canonical text) and each value's
    code; a presence table when the values are small, a sort otherwise."""
    top = int(values.max(initial=0))
    if top < max(1 << 16, 8 * values.shape[0]):
        present = np.zeros(top + 1, dtype=bool)
        present[values] = True
        distinct = np.flatnonzero(present)
        rank = np.cumsum(present, dtype=np.int32) - 1
        codes = rank[values]
    else:
        distinct, codes = np.unique(values, return_inverse=True)
    return list(map(str, distinct.tolist())), codes.astype(np.int32, copy=False)


def _byte_codes(
    joined: bytes, buf: np.ndarray, starts: np.ndarray, lens: np.ndarray
) -> tuple[list[str], np.ndarray]:
    """Distinct tokens by their bytes, decoded once each, and each token's code."""
    width = int(lens.max(initial=0))
    if starts.shape[0] * width <= _MATRIX_BYTES:
        cols = np.arange(width)
        idx = np.minimum(starts[:, None] + cols, buf.shape[0] - 1)
        matrix = np.where(cols < lens[:, None], buf[idx], 0).astype(np.uint8)
        keys = np.ascontiguousarray(matrix).view(f"S{width}").ravel()
        distinct, codes = np.unique(keys, return_inverse=True)
        names = [b.decode("ascii") for b in distinct.tolist()]
        return names, codes.astype(np.int32, copy=False)
    seen: dict[bytes, int] = {}
    ends = (starts + lens).tolist()
    tokens = [joined[a:b] for a, b in zip(starts.tolist(), ends, strict=True)]
    codes = np.fromiter(
        (seen.setdefault(t, len(seen)) for t in tokens), dtype=np.int32, count=len(tokens)
    )
    return [t.decode("ascii") for t in seen], codes


def code_tokens(
    joined: bytes,
    buf: np.ndarray,
    in_token: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    bounds: np.ndarray,
) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Tokens ``joined[starts[i]:ends[i]]`` (ASCII, ``buf`` its bytes, ``in_token`` marking
    the bytes inside some token) of rows ``bounds[r]..bounds[r+1]-1`` as ``(names, codes,
    counts)``: the distinct tokens, each built once; int32 codes of each row's distinct
    tokens in the order read (a repeat in a row dropped); how many per row.

    A token of digits without a leading zero (at most :data:`_MAX_DIGITS`) is told apart by
    its value, any other by its bytes (``007`` and ``7`` are two names).

    >>> text = b"7 007 7 tea"
    >>> buf = np.frombuffer(text, dtype=np.uint8)
    >>> names, codes, counts = code_tokens(
    ...     text, buf, buf != 32, np.array([0, 2, 6, 8]), np.array([1, 5, 7, 11]),
    ...     np.array([0, 4]))
    >>> [names[c] for c in codes.tolist()], counts.tolist()
    (['7', '007', 'tea'], [3])
    """
    n_rows = bounds.shape[0] - 1
    lens = ends - starts
    counts = np.diff(bounds)
    nondigit = (buf - _ZERO) > 9  # uint8 wraps: below '0' is large too
    if not (nondigit & in_token).any():  # every item is a string of digits
        numeric = lens <= _MAX_DIGITS
    else:
        before = np.zeros(buf.shape[0] + 1, dtype=np.int32)
        np.cumsum(nondigit & in_token, out=before[1:])
        numeric = (before[ends] == before[starts]) & (lens <= _MAX_DIGITS)
    numeric &= (buf[starts] != _ZERO) | (lens == 1)  # "007" is not the number 7's text
    codes = np.empty(starts.shape[0], dtype=np.int32)
    if numeric.all():
        names, codes = _number_codes(_numbers(buf, ends, lens))
    else:
        names, codes[numeric] = _number_codes(_numbers(buf, ends[numeric], lens[numeric]))
        other = ~numeric
        more, other_codes = _byte_codes(joined, buf, starts[other], lens[other])
        codes[other] = other_codes + len(names)
        names = names + more
    # a repeated item counts once: keep each (line, name)'s first occurrence; within a
    # line, codes that only ever rise hold no repeat (names are coded in sorted order)
    if codes.shape[0] > 1:
        falls = np.flatnonzero(codes[1:] <= codes[:-1]) + 1
        first_of_line = np.zeros(codes.shape[0] + 1, dtype=bool)
        first_of_line[bounds[:-1]] = True
        if not first_of_line[falls].all():
            line_of = np.repeat(np.arange(n_rows, dtype=np.int64), counts)
            key = line_of * len(names) + codes
            _, first = np.unique(key, return_index=True)
            if first.shape[0] != key.shape[0]:
                first.sort()
                codes = codes[first]
                counts = np.bincount(line_of[first], minlength=n_rows)
    return names, codes, counts


@contextlib.contextmanager
def _gc_paused() -> Iterator[None]:
    """Pause the cyclic collector while building many small acyclic lists.

    Parsing a batch creates one list per line; each allocation counts towards a collection,
    and a collection walks everything the caller holds, which more than doubles the cost of
    parsing. Lists of strings cannot form cycles, so nothing is lost by pausing.
    """
    enabled = gc.isenabled()
    if enabled:
        gc.disable()
    try:
        yield
    finally:
        if enabled:
            gc.enable()


def _empty_line(offset: int | None, raw: bytes) -> ParseError:
    """The rejection of a line of separators without an item (every path words it so)."""
    return ParseError("empty", "the line holds separators but no item", offset=offset, raw=raw)


class BasketDecoder(LineDecoder):
    """One transaction per line, items separated by whitespace and/or commas.

    Parameters
    ----------
    max_basket_items:
        More distinct items than this rejects the line (``too_many_items``).
    max_record_bytes:
        Longer lines are rejected (``too_long``).
    encoding:
        Text encoding of the feed (ASCII-compatible).
    normalize:
        ``nfc`` (Unicode normal form C, so the same name typed with a precomposed letter or a
        combining accent is one item) or ``none`` (names as read).

    Examples
    --------
    >>> d = BasketDecoder(max_basket_items=10)
    >>> d.feed(b"tea, scone jam tea", 0, 19)
    [Transaction(items=('tea', 'scone', 'jam'), ts=None, id=None, offset=0, end_offset=19)]
    >>> d.feed(b"   ", 19, 23)
    []
    >>> out = d.decode(RecordBatch.from_lines(["tea jam", "", "scone , tea"]))
    >>> out.baskets, out.offsets
    ([['tea', 'jam'], ['scone', 'tea']], [0, 9])
    """

    __slots__ = ("ascii_bytes", "encoding", "max_basket_items", "max_record_bytes", "nfc")

    def __init__(
        self,
        max_basket_items: int = 200,
        max_record_bytes: int = 65536,
        encoding: str = "utf-8",
        normalize: str = "nfc",
    ) -> None:
        self.max_basket_items = max_basket_items
        self.max_record_bytes = max_record_bytes
        self.encoding = encoding
        self.nfc = normalize == "nfc"  # input.normalize, checked with the settings
        #: split ASCII batches on their bytes (the encoding reads ASCII as itself)
        self.ascii_bytes = codecs.lookup(encoding).name in _ASCII_CODECS

    def feed(self, record: bytes, offset: int | None, end_offset: int | None) -> list[Transaction]:
        text = decode_text(record, offset, self.encoding, self.max_record_bytes)
        check_control(text[:-1] if text.endswith("\r") else text, "line", offset, record)
        if not text.strip():
            return []  # a blank line is not a record
        if self.nfc and not text.isascii():
            text = unicodedata.normalize("NFC", text)
        items = dedupe(text.replace(",", " ").split())
        if not items:
            raise _empty_line(offset, record)
        if len(items) > self.max_basket_items:
            raise too_many_items_error(len(items), self.max_basket_items, offset, record, "line")
        return [Transaction(tuple(items), offset=offset, end_offset=end_offset)]

    def decode(self, batch: RecordBatch) -> Decoded:
        """The whole batch at once when nothing in it is wrong, else record by record."""
        lines = batch.lines
        if not lines:
            return Decoded(source=batch.source, offsets=[])
        if batch.too_long is None and max(map(len, lines)) <= self.max_record_bytes:
            joined = b"\n".join(lines)
            if self.ascii_bytes and joined.isascii():
                if _block_has_control(joined, joined.decode("ascii")):
                    return LineDecoder.decode(self, batch)
                return self._ascii(batch, joined)
            try:
                text = joined.decode(self.encoding)
            except UnicodeDecodeError:
                text = None
            if text is not None:
                first = batch.offsets is not None and batch.offset(0) == 0
                if first and text.startswith("\ufeff"):
                    text = text[1:]  # a byte-order mark at the start of a file is not data
                if _block_has_control(joined, text):
                    # one check over the block; a hit sends the batch record by record
                    return LineDecoder.decode(self, batch)
                if self.nfc and not text.isascii() and not unicodedata.is_normalized("NFC", text):
                    text = unicodedata.normalize("NFC", text)
                with _gc_paused():
                    parsed = [line.split() for line in text.replace(",", " ").split("\n")]
                    n_items = sum(map(len, parsed))
                    clean = (
                        len(parsed) == len(lines)
                        and n_items == sum(map(len, map(frozenset, parsed)))
                        and max(map(len, parsed)) <= self.max_basket_items
                    )
                if clean:
                    return self._clean(batch, parsed, text)
        return LineDecoder.decode(self, batch)

    def _clean(self, batch: RecordBatch, parsed: list[list[str]], text: str) -> Decoded:
        """Transactions of a batch in which every line decoded with no repeats; an empty
        split is a blank line (skipped) or a line of commas only (``empty``)."""
        offsets = batch.offsets
        if [] not in parsed:
            kept_all = None if offsets is None else offsets.tolist()
            return Decoded(parsed, None, kept_all, [], batch.source, list(batch.lines))
        keep = np.fromiter(map(bool, parsed), dtype=bool, count=len(parsed))
        errors = []
        text_lines = text.split("\n")
        for i in np.flatnonzero(~keep).tolist():
            if text_lines[i].strip():  # not a blank line: separators only
                errors.append(_empty_line(batch.offset(i), batch.lines[i]))
        baskets = [p for p in parsed if p]
        kept = None if offsets is None else offsets[keep].tolist()
        raws: list[bytes | None] = [line for line, k in zip(batch.lines, keep, strict=True) if k]
        return Decoded(baskets, None, kept, errors, batch.source, raws)

    def _ascii(self, batch: RecordBatch, joined: bytes) -> Decoded:
        """A batch of ASCII lines free of control characters (``joined`` by newlines) as
        :class:`~streamcount.intake.records.Tokens`, with numpy on its bytes; lines of
        separators only and lines of too many distinct items are set aside as the record
        path sets them aside."""
        n_lines = len(batch.lines)
        buf = np.frombuffer(joined, dtype=np.uint8)
        size = buf.shape[0]
        sep = np.ones(size + 2, dtype=bool)
        np.less_equal(buf, _SPACE, out=sep[1:-1])
        sep[1:-1] |= buf == _COMMA
        starts = np.flatnonzero(sep[:-2] & ~sep[1:-1])  # a separator (or the start), then not
        ends = np.flatnonzero(~sep[1:-1] & sep[2:]) + 1
        newlines = np.flatnonzero(buf == _NEWLINE)
        # tokens before each line's end: a line's tokens are consecutive
        bounds = np.empty(n_lines + 1, dtype=np.int64)
        bounds[0] = 0
        bounds[1:-1] = np.searchsorted(starts, newlines)
        bounds[-1] = starts.shape[0]
        names, codes, counts = code_tokens(joined, buf, ~sep[1:-1], starts, ends, bounds)
        tokens = Tokens(names, codes, counts.astype(np.int64, copy=False))
        offsets = batch.offsets
        over = counts > self.max_basket_items
        keep = (counts > 0) & ~over
        if keep.all():
            kept = None if offsets is None else offsets.tolist()
            raws: list[bytes | None] = list(batch.lines)
            return Decoded(None, None, kept, [], batch.source, raws, tokens=tokens)
        # lines set aside (separators only, too many items), in line order, as the record
        # path words them; the rest stay tokens
        commas = np.bincount(
            np.searchsorted(newlines, np.flatnonzero(buf == _COMMA)), minlength=n_lines
        )
        errors: list[ParseError] = []
        for i in np.flatnonzero(~keep & ((commas > 0) | over)).tolist():
            if over[i]:
                errors.append(
                    too_many_items_error(
                        int(counts[i]),
                        self.max_basket_items,
                        batch.offset(i),
                        batch.lines[i],
                        "line",
                    )
                )
            else:
                errors.append(_empty_line(batch.offset(i), batch.lines[i]))
        kept = None if offsets is None else offsets[keep].tolist()
        raws = [batch.lines[i] for i in np.flatnonzero(keep).tolist()]
        return Decoded(None, None, kept, errors, batch.source, raws, tokens=tokens.select(keep))
