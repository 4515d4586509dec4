"""Record formats: one registry that config validation, the CLI, replay and the service read.

Each format is one module with its decoder and one :class:`FormatSpec` entry in
:data:`FORMATS`: its name (the value of ``input.format``), a factory, the file suffixes that
imply it, and whether its decoder holds state between batches (open CSV orders). Adding a
format is one module and one entry here.

Every decoder follows the :class:`Decoder` protocol: :meth:`~Decoder.decode` turns a whole
:class:`~streamcount.intake.records.RecordBatch` into
:class:`~streamcount.intake.records.Decoded` transactions plus the records it set aside
(:class:`~streamcount.errors.ParseError`, reason from :data:`streamcount.errors.REASONS`). A
decoder that holds transactions back (CSV orders still open) releases them through
:meth:`~Decoder.close_due` and :meth:`~Decoder.close_all`, and checkpoints them with
:meth:`~Decoder.state_dict`.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

from streamcount.config.settings import InputConfig
from streamcount.intake.formats.basket import BasketDecoder
from streamcount.intake.formats.csv_orders import CsvOrderDecoder
from streamcount.intake.formats.jsonl import JsonlDecoder
from streamcount.intake.records import Decoded, RecordBatch, Transaction

__all__ = [
    "FORMATS",
    "BasketDecoder",
    "CsvOrderDecoder",
    "Decoder",
    "FormatSpec",
    "JsonlDecoder",
    "format_for_path",
    "make_decoder",
]


class Decoder(Protocol):
    """Turns record batches into transactions; every format's decoder implements all of it."""

    def decode(self, batch: RecordBatch) -> Decoded:
        """Decode a whole batch: transactions in order plus the records set aside."""
        ...

    def close_due(self, event_time: float) -> list[Transaction]:
        """Transactions held back that are due to close at ``event_time``."""
        ...

    def close_all(self) -> list[Transaction]:
        """Every transaction still held back (end of input, shutdown)."""
        ...

    @property
    def held(self) -> int:
        """Transactions held back now."""
        ...

    def safe_offset(self, consumed_end: int) -> int:
        """Source offset from which re-reading reproduces the decoder's pending state."""
        ...

    def state_dict(self) -> dict[str, Any]:
        """The pending state as a JSON-able mapping (empty for stateless decoders)."""
        ...

    def load_state(self, state: dict[str, Any]) -> None:
        """Restore what :meth:`state_dict` returned."""
        ...


@dataclass(frozen=True, slots=True)
class FormatSpec:
    """One record format.

    Attributes
    ----------
    name:
        The value of ``input.format``.
    factory:
        ``(input config, max_basket_items, require_ts) -> Decoder``.
    suffixes:
        File name endings that imply this format (``replay`` infers it from them).
    stateless:
        True when the decoder holds nothing between batches.
    description:
        One line for ``--help`` and the docs.
    """

    name: str
    factory: Callable[[InputConfig, int, bool], Decoder]
    suffixes: tuple[str, ...]
    stateless: bool
    description: str


FORMATS: dict[str, FormatSpec] = {
    spec.name: spec
    for spec in (
        FormatSpec(
            "basket",
            lambda cfg, cap, _ts: BasketDecoder(
                cap, cfg.max_record_bytes, cfg.encoding, cfg.normalize
            ),
            (".txt", ".dat", ".basket"),
            True,
            "one transaction per line, items separated by whitespace and/or commas",
        ),
        FormatSpec(
            "jsonl",
            lambda cfg, cap, ts: JsonlDecoder(
                cfg.jsonl,
                cap,
                cfg.max_record_bytes,
                cfg.encoding,
                require_ts=ts,
                normalize=cfg.normalize,
            ),
            (".jsonl", ".ndjson", ".json"),
            True,
            "one JSON object per line (fields named by input.jsonl)",
        ),
        FormatSpec(
            "csv",
            lambda cfg, cap, ts: CsvOrderDecoder(
                cfg.csv,
                cap,
                cfg.max_record_bytes,
                cfg.encoding,
                require_ts=ts,
                normalize=cfg.normalize,
            ),
            (".csv",),
            False,
            "one row per line item, rows of an order grouped (columns named by input.csv)",
        ),
    )
}


def make_decoder(
    input_config: InputConfig,
    max_basket_items: int,
    *,
    require_ts: bool = False,
    fmt: str | None = None,
) -> Decoder:
    """A new decoder for ``fmt`` (default ``input_config.format``), a name in :data:`FORMATS`
    (``input.format`` is checked with the other settings).

    ``require_ts`` makes JSON/CSV records without a time ``missing_field`` (set it for a
    time-based window).
    """
    name = input_config.format if fmt is None else fmt
    return FORMATS[name].factory(input_config, max_basket_items, require_ts)


def format_for_path(path: str) -> str | None:
    """The format a file name implies (``.gz`` looked through), or ``None``.

    >>> format_for_path("orders.jsonl.gz"), format_for_path("lines.csv"), format_for_path("x")
    ('jsonl', 'csv', None)
    """
    name = path.lower()
    if name.endswith(".gz"):
        name = name[:-3]
    for spec in FORMATS.values():
        if name.endswith(spec.suffixes):
            return spec.name
    return None
