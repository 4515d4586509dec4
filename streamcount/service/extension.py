"""What a role adds to the service loop (a cluster worker, a merger): the hooks it gets.

:class:`~streamcount.service.loop.Service` builds the extension ``cluster.role`` asks for
(:func:`streamcount.cluster.build_extension`) and calls it at fixed points of its life; an
extension never runs a loop or a thread of the service's own. The service stays the owner of
the state: an extension's part of the checkpoint is written and restored with the rest, in the
same file, so positions, counts and the extension's state always agree.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from streamcount.config.settings import Config
from streamcount.intake.records import RecordBatch

if TYPE_CHECKING:
    from streamcount.intake.sources import Source
    from streamcount.service.loop import Service

__all__ = ["BatchHandler", "Extensions", "ServiceExtension"]

#: counts one batch of an extension's own source instead of the decoders: ``(transactions
#: accepted, records set aside by reason)``
BatchHandler = Callable[[RecordBatch], tuple[int, Counter[str]]]


class ServiceExtension(Protocol):
    """The hooks a role plugs into :class:`~streamcount.service.loop.Service`, in call order."""

    #: its key in the checkpoint's ``extensions`` and in ``/v1/status``
    name: str

    def load_state(self, meta: Mapping[str, Any] | None, arrays: Mapping[str, np.ndarray]) -> None:
        """Restore what :meth:`state` saved (``None``: the checkpoint has nothing of it); called
        while the service restores its checkpoint, after the pipeline."""
        ...

    def inputs(self, positions: Mapping[str, Any]) -> list[tuple[Source, BatchHandler | None]]:
        """Sources of its own, each resumed from its saved position (by source name), with the
        handler that counts their batches (``None``: the usual decoder and pipeline)."""
        ...

    def bind(self, service: Service) -> None:
        """The service is built (pipeline, metrics, dead-letter file): register listeners."""
        ...

    def turn(self, *, caught_up: bool) -> int:
        """After each turn's reading and counting (``caught_up``: every source has read all
        there is); transactions it accepted."""
        ...

    def idle_watermark(self) -> float | None:
        """The event time a time-based window's watermark moves to when the feed is quiet
        (``input.idle_seconds``); ``None``: the wall clock."""
        ...

    def before_checkpoint(self) -> bool:
        """Right before the checkpoint's state is taken; False puts the checkpoint off (it is
        tried again at the next interval, and fails at shutdown)."""
        ...

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """Its part of the checkpoint: JSON-able meta and named arrays."""
        ...

    def status(self) -> dict[str, Any]:
        """Its part of ``GET /v1/status`` (JSON-able)."""
        ...

    def ready(self) -> bool:
        """Whether it can do its work now (readiness follows it with the sources)."""
        ...

    def close(self) -> None:
        """Release its connections and threads (after the final checkpoint); safe twice."""
        ...


class Extensions:
    """The extensions of one service, called together (each hook of :class:`ServiceExtension`
    over all of them), so the loop reads as one call per hook.

    Their checkpoint state goes under ``extensions`` (by name) in the meta and their arrays
    under ``ext.<name>.`` prefixes.
    """

    def __init__(self, extensions: Sequence[ServiceExtension]) -> None:
        self.items = list(extensions)

    @classmethod
    def for_role(cls, config: Config) -> Extensions:
        """What ``cluster.role`` adds to the service (nothing for one process alone)."""
        if config.cluster.role is None:
            return cls(())
        from streamcount.cluster import build_extension

        return cls((build_extension(config),))

    def __iter__(self) -> Iterator[ServiceExtension]:
        return iter(self.items)

    def __bool__(self) -> bool:
        return bool(self.items)

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        saved = meta.get("extensions") or {}
        for ext in self.items:
            prefix = f"ext.{ext.name}."
            own = {k[len(prefix) :]: v for k, v in arrays.items() if k.startswith(prefix)}
            ext.load_state(saved.get(ext.name), own)

    def inputs(self, positions: Mapping[str, Any]) -> list[tuple[Source, BatchHandler | None]]:
        return [pair for ext in self.items for pair in ext.inputs(positions)]

    def bind(self, service: Service) -> None:
        for ext in self.items:
            ext.bind(service)

    def turn(self, *, caught_up: bool) -> int:
        return sum(ext.turn(caught_up=caught_up) for ext in self.items)

    def status_changed(self, shown: Mapping[str, Any]) -> bool:
        """Whether any extension's status differs from the one in ``shown`` (a view's)."""
        return any(ext.status() != shown.get(ext.name) for ext in self.items)

    def add_status(self, status: dict[str, Any]) -> None:
        for ext in self.items:
            status[ext.name] = ext.status()

    def idle_watermark(self, clock: Callable[[], float]) -> float:
        """The lowest watermark an extension asks for, else the clock."""
        marks = [m for ext in self.items if (m := ext.idle_watermark()) is not None]
        return min(marks) if marks else clock()

    def not_ready_for_checkpoint(self) -> str | None:
        """The name of the first extension that puts the checkpoint off, or ``None``."""
        return next((ext.name for ext in self.items if not ext.before_checkpoint()), None)

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        meta: dict[str, Any] = {}
        arrays: dict[str, np.ndarray] = {}
        for ext in self.items:
            meta[ext.name], own = ext.state()
            arrays.update({f"ext.{ext.name}.{k}": v for k, v in own.items()})
        return meta, arrays

    def ready(self) -> bool:
        return all(ext.ready() for ext in self.items)

    def close(self) -> None:
        for ext in self.items:
            ext.close()
