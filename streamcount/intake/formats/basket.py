"""Basket lines: one transaction per line, items separated by whitespace and/or commas.

``tea, scone  jam`` is the transaction ``{tea, scone, jam}``. A line of only whitespace is not
a record (skipped, not counted); a line of separators without any item (``, ,``) is set aside
as ``empty``. Repeated items count once (a basket is a set). A line holding a character of
:data:`~streamcount.intake.formats.text.CONTROL_CHARS` anywhere (a carriage return only at
its end, as in CRLF files) is set aside as ``control_chars``; names are NFC-normalised unless
``input.normalize: none``.

:meth:`BasketDecoder.decode` takes a whole batch in a few C-level passes (one decode, one
search for control characters, one normal-form test, one split per line) and falls back to one
record at a time only for a batch with something to set aside or a repeated item, so both paths
give the same transactions and the same rejections.
"""

from __future__ import annotations

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
from streamcount.intake.records import Decoded, RecordBatch, Transaction

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

    __slots__ = ("encoding", "max_basket_items", "max_record_bytes", "nfc")

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

    def feed(self, record: bytes, offset: int | None, end_offset: int | None) -> list[Transaction]:
        text = decode_text(record, offset, self.encoding, self.max_record_bytes)
        check_control(text[:-1] if text.endswith("\r") else text, "line", offset, record)
        if not text.strip():
            return []  # a blank line is not a record
        if self.nfc and not text.isascii():
            text = unicodedata.normalize("NFC", text)
        items = dedupe(text.replace(",", " ").split())
        if not items:
            raise ParseError(
                "empty", "the line holds separators but no item", offset=offset, raw=record
            )
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
                errors.append(
                    ParseError(
                        "empty",
                        "the line holds separators but no item",
                        offset=batch.offset(i),
                        raw=batch.lines[i],
                    )
                )
        baskets = [p for p in parsed if p]
        kept = None if offsets is None else offsets[keep].tolist()
        raws: list[bytes | None] = [line for line, k in zip(batch.lines, keep, strict=True) if k]
        return Decoded(baskets, None, kept, errors, batch.source, raws)
