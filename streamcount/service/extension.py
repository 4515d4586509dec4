"""What a role adds to the service loop (a cluster worker, a merger): the hooks it gets.

:class:`~streamcount.service.loop.Service` builds the extension ``cluster.role`` asks for
(:func:`streamcount.cluster.build_extension`) and calls it at fixed points of its life; an
extension never runs a loop or a thread of the service's own. The service stays the owner of
the state: an extension's part of the checkpoint is written and restored with the rest, in the
same file, so positions, counts and the extension's state always agree.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable, Mapping
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from streamcount.intake.records import RecordBatch

if TYPE_CHECKING:
    from streamcount.intake.sources import Source
    from streamcount.service.loop import Service

__all__ = ["BatchHandler", "ServiceExtension"]

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
