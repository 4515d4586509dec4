"""``cluster.role: worker``: count one partition of the feed and publish every closed pane.

A worker is a normal ``streamcount run`` (any source; in a cluster, the ``nats`` source on its
partition's subject) with a time-based window, rules and alerts off (they belong to the
merged window). :class:`WorkerExtension` hooks into the service:

* every pane the engine closes is encoded at once (:func:`streamcount.engine.wire.encode_pane`:
  item names, the settings fingerprint, the catalogue version, the worker's name; ``start``
  and ``end`` carry the earliest and latest event time the pane counted, its span follows from
  its index) and handed to the :class:`~streamcount.cluster.publisher.SummaryPublisher`;
* when the watermark moved past panes that held nothing (a quiet partition: the service's
  idle watermark, ``input.idle_seconds``), an empty summary (n = 0) of the newest closed pane
  is published, which tells the merger this worker holds nothing up to it;
* before every checkpoint it waits (``cluster.publish_timeout_seconds`` at most) until the
  stream has acknowledged every summary, else the checkpoint is put off: input is acknowledged
  only after the panes holding it are durable, so after a crash the panes since the last
  checkpoint are counted again from the same input and published again (the server, or the
  merger, drops the copies).

The checkpoint keeps the newest pane published, so a restart publishes from there on.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from streamcount.catalogue.state import VERSION_SHORT, CatalogueState
from streamcount.cluster.publisher import SummaryPublisher
from streamcount.config.describe import fingerprint
from streamcount.config.settings import Config
from streamcount.engine.counters import LossySummary
from streamcount.engine.pane import Pane
from streamcount.engine.wire import PaneMeta, encode_pane
from streamcount.errors import InputError

if TYPE_CHECKING:
    from streamcount.intake.sources import Source
    from streamcount.service.extension import BatchHandler
    from streamcount.service.loop import Service

__all__ = ["CATALOGUE_NONE", "WorkerExtension", "catalogue_version", "nats_token"]

logger = logging.getLogger(__name__)

#: the catalogue version sent while no item catalogue is configured
CATALOGUE_NONE = "none"


def catalogue_version(catalogue: CatalogueState | None, first_seq: int, last_seq: int) -> str:
    """The catalogue version(s) transactions ``first_seq..last_seq`` were mapped under,
    shortened and comma-separated, oldest first (a reload inside a pane gives two); the one in
    force when the pane holds none; ``none`` without a catalogue.

    >>> catalogue_version(None, 1, 10)
    'none'
    """
    if catalogue is None:
        return CATALOGUE_NONE
    versions = catalogue.versions_of(first_seq, last_seq) if first_seq > 0 else []
    return ",".join(versions) or catalogue.version[:VERSION_SHORT]


def nats_token(config: Config) -> str | None:
    """The token ``input.nats.token_env`` names, or ``None``.

    Raises
    ------
    InputError
        The variable is named but unset or empty.
    """
    name = config.input.nats.token_env
    if not name:
        return None
    token = os.environ.get(name) or None
    if token is None:
        raise InputError(
            f"input.nats.token_env = {name!r}: that environment variable is not set or empty"
        )
    return token


class WorkerExtension:
    """The worker's hooks into :class:`~streamcount.service.loop.Service` (module notes)."""

    name = "cluster"

    def __init__(self, config: Config, *, publisher: SummaryPublisher | None = None) -> None:
        cluster = config.cluster
        assert cluster.worker is not None  # checked with the config rules
        self.config = config
        self.worker = cluster.worker
        self.subject = cluster.subject.replace("{worker}", self.worker)
        self.fingerprint = fingerprint(config)
        self.publisher = publisher or SummaryPublisher(
            config.input.nats,
            stream=cluster.stream,
            subject=self.subject,
            wildcard=cluster.subject.replace("{worker}", "*"),
            worker=self.worker,
            token=nats_token(config),
            max_message_bytes=cluster.max_message_bytes,
        )
        #: the newest pane published (``None``: none yet)
        self.last_published: int | None = None
        self._service: Service | None = None

    # -- the ServiceExtension hooks ----------------------------------------------------------

    def load_state(self, meta: Mapping[str, Any] | None, arrays: Mapping[str, np.ndarray]) -> None:
        if meta:
            last = meta.get("last_published")
            self.last_published = None if last is None else int(last)

    def inputs(self, positions: Mapping[str, Any]) -> list[tuple[Source, BatchHandler | None]]:
        return []

    def bind(self, service: Service) -> None:
        self._service = service
        service.pipeline.on_pane(self._pane_closed)
        self.publisher.start()
        logger.info(
            "cluster worker %s: publishing closed panes to %s (stream %s)",
            self.worker,
            self.subject,
            self.config.cluster.stream,
        )

    def turn(self, *, caught_up: bool) -> int:
        self._publish_watermark()
        if self._service is not None:
            self._service.metrics.observe_cluster(
                published=self.publisher.published,
                pending=self.publisher.pending,
                last_pane={} if self.last_published is None else {self.worker: self.last_published},
            )
        return 0

    def idle_watermark(self) -> float | None:
        return None  # the clock, as for one process

    def before_checkpoint(self) -> bool:
        self._publish_watermark()
        if not self.publisher.connected:  # the bus is away: no use holding the loop up
            return self.publisher.pending == 0
        timeout = self.config.cluster.publish_timeout_seconds
        started = time.monotonic()
        if self.publisher.flush(timeout):
            return True
        logger.warning(
            "cluster worker %s: %d pane summaries not acknowledged by stream %s after %.1f s "
            "(%s); the checkpoint waits for them",
            self.worker,
            self.publisher.pending,
            self.config.cluster.stream,
            time.monotonic() - started,
            self.publisher.last_error or "no answer",
        )
        return False

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return {"last_published": self.last_published}, {}

    def status(self) -> dict[str, Any]:
        return {
            "role": "worker",
            "worker": self.worker,
            "stream": self.config.cluster.stream,
            "subject": self.subject,
            "connected": self.publisher.connected,
            "last_published_pane": self.last_published,
            "published": self.publisher.published,
            "pending": self.publisher.pending,
            "last_error": self.publisher.last_error,
        }

    def ready(self) -> bool:
        return self.publisher.connected

    def close(self) -> None:
        self.publisher.close()

    # -- publishing ----------------------------------------------------------------------------

    def _pane_closed(self, pane: Pane, names: Sequence[str]) -> None:
        self._submit(
            pane.index, pane.summary, names, pane.min_ts, pane.max_ts, pane.first_seq, pane.last_seq
        )

    def _publish_watermark(self) -> None:
        """An empty summary of the newest closed pane when the watermark passed it with
        nothing published there (a quiet partition)."""
        if self._service is None:
            return
        closed = self._service.pipeline.engine.window.closed_through
        if closed < 0:
            return  # nothing seen and no idle watermark yet: nothing to say
        if self.last_published is None or closed > self.last_published:
            engine = self._service.pipeline.engine
            empty = LossySummary(engine.epsilon, engine.max_itemset_size)
            self._submit(closed, empty, (), None, None, 0, 0)

    def _submit(
        self,
        index: int,
        summary: Any,
        names: Sequence[str],
        min_ts: float | None,
        max_ts: float | None,
        first_seq: int,
        last_seq: int,
    ) -> None:
        assert self._service is not None
        pipeline = self._service.pipeline
        engine = pipeline.engine
        meta = PaneMeta(
            index,
            int(summary.n),
            engine.epsilon,
            engine.max_itemset_size,
            self.fingerprint,
            catalogue_version(pipeline.catalogue, first_seq, last_seq),
            min_ts,
            max_ts,
            self.worker,
        )
        self.publisher.submit(index, encode_pane(summary, names, meta))
        self.last_published = index
