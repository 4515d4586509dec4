"""Sources: where records come from. One protocol, one registry.

Every source implements :class:`Source` in full; the service loop never asks what kind of
source it holds. Sources are built from the config through :data:`SOURCES` (the values of
``input.source``): adding a source is one module and one :class:`SourceSpec` entry.

Several sources may run at once (``input.source: [file, http]``); the loop reads them in
turn, and each keeps its own position in the checkpoint, under its name.

The ``nats`` source (:mod:`streamcount.intake.sources.nats`) is imported only when it is
built, so the other commands do not pay for loading the NATS client.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from concurrent.futures import Future
from dataclasses import dataclass
from typing import Any, Protocol

from streamcount.config.settings import Config
from streamcount.errors import ConfigError
from streamcount.intake.records import RecordBatch, SourceHealth
from streamcount.intake.sources.file import FollowedFile
from streamcount.intake.sources.memory import IngestReceipt, IterableSource, QueueSource
from streamcount.intake.sources.stdin import StdinSource

__all__ = [
    "SOURCES",
    "FollowedFile",
    "IngestReceipt",
    "IterableSource",
    "QueueSource",
    "Source",
    "SourceSpec",
    "StdinSource",
    "build_sources",
]


class Source(Protocol):
    """What the service loop reads records from."""

    #: the registry name (``file``, ``stdin``, ``http``...), written into dead letters
    name: str

    @property
    def ingest(self) -> Callable[[bytes], Future[IngestReceipt]] | None:
        """Queues a body pushed from outside (HTTP ingest) and returns a future of what
        became of it; ``None`` for sources that read on their own."""
        ...

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        """Record batches available now (about ``max_records`` records at most), waiting at
        most ``timeout`` seconds when nothing is there."""
        ...

    @property
    def exhausted(self) -> bool:
        """True once a finite input has been read to its end and everything returned."""
        ...

    @property
    def caught_up(self) -> bool:
        """True when the last read found nothing more waiting (the source is idle)."""
        ...

    def position(self) -> Any:
        """JSON-able resume point just after the last record returned, or ``None`` for a
        source that cannot be resumed; saved in the checkpoint."""
        ...

    def acknowledge(self, position: Any) -> None:
        """Everything up to ``position`` is in a written checkpoint (a bus source acks its
        messages here; a file has nothing to do)."""
        ...

    def health(self) -> SourceHealth:
        """Whether it can deliver now (a bus may be away), its bus totals and gaps."""
        ...

    def drain(self) -> list[RecordBatch]:
        """At shutdown: the batches already accepted from a sender who is owed an answer
        (queued HTTP bodies); empty for sources that can simply be read again later."""
        ...

    def close(self) -> None:
        """Release files, threads and connections; safe to call twice."""
        ...


@dataclass(frozen=True, slots=True)
class SourceSpec:
    """One kind of source.

    Attributes
    ----------
    name:
        The value in ``input.source``.
    factory:
        ``(config, saved position or None) -> Source``.
    resumable:
        A restart resumes where the checkpoint says (else it starts with what comes next).
    format:
        The record format this source always carries (``None``: ``input.format``).
    description:
        One line for ``--help`` and the docs.
    """

    name: str
    factory: Callable[[Config, Any], Source]
    resumable: bool
    description: str
    format: str | None = None


def _file(config: Config, position: Any) -> Source:
    cfg = config.input
    if cfg.path is None:
        # checked here, not with the other settings: replay and check-config need no path
        raise ConfigError(
            "input.path",
            None,
            "input.source 'file' needs the file to follow: set input.path (or --input PATH)",
        )
    kwargs: dict[str, Any] = {
        "poll_interval_seconds": cfg.poll_interval_seconds,
        "max_record_bytes": cfg.max_record_bytes,
        "start_at": cfg.start_at,
        "follow": cfg.follow,
    }
    if position:
        return FollowedFile.from_position(cfg.path, position, **kwargs)
    return FollowedFile(cfg.path, **kwargs)


def _nats(config: Config, position: Any) -> Source:
    from streamcount.intake.sources.nats import JetStreamSource

    return JetStreamSource.from_config(config, position)


SOURCES: dict[str, SourceSpec] = {
    spec.name: spec
    for spec in (
        SourceSpec(
            "file",
            _file,
            True,
            "follow input.path as it grows (rotation and truncation handled)",
        ),
        SourceSpec(
            "stdin",
            lambda config, _pos: StdinSource(max_record_bytes=config.input.max_record_bytes),
            False,
            "read standard input until it ends",
        ),
        SourceSpec(
            "http",
            lambda config, _pos: QueueSource(max_record_bytes=config.input.max_record_bytes),
            False,
            "POST /v1/transactions: one JSON object or NDJSON lines per request",
            format="jsonl",
        ),
        SourceSpec(
            "nats",
            _nats,
            True,
            "a NATS JetStream stream through a durable pull consumer (input.nats), exactly once",
        ),
    )
}


def build_sources(config: Config, positions: Mapping[str, Any] | None = None) -> list[Source]:
    """The sources ``input.source`` names, each resumed from its saved position."""
    saved = positions or {}
    out: list[Source] = []
    for name in config.input.source:
        spec = SOURCES.get(name)
        if spec is None:
            raise ConfigError("input.source", name, f"must be one of {', '.join(SOURCES)}")
        out.append(spec.factory(config, saved.get(name)))
    return out
