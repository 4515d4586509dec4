"""``cluster.role: merger`` (``streamcount merge``): one window from the workers' panes.

The merger is a :class:`~streamcount.service.loop.Service` that reads no orders: its one source
is the summaries stream (:class:`SummarySource`, the ``nats`` source's consumer with one record
per message), its checkpoint holds that stream's sequence with everything else, and
:class:`MergerExtension` turns the messages into closed panes:

* every message goes to the :class:`~streamcount.cluster.collect.PaneCollector` (chunks
  rebuilt, summaries checked, kept by pane and worker; refused and late ones dead-lettered with
  their pane and worker, and the message terminated on the bus);
* each pane it says is due is merged (:func:`streamcount.engine.merged.merge_parts`: the
  pane-sum rule, the absent bound the sum of the parts') and closed in the engine
  (:meth:`~streamcount.engine.engine.Engine.add_merged_pane`), so rules, alerts, sinks, metrics
  and the API run on the merged window exactly as in one process;
* alerts raised while the window holds panes closed without some workers name them in
  ``evidence.incomplete_panes``; ``/v1/status`` (``cluster``) and the metrics name them too.

Exactly once: the open panes' summaries (as received) and the chunks of incomplete payloads are
in the checkpoint with the stream sequence, so a restart resumes after that sequence with the
same parts; the summaries stream is acknowledged after each checkpoint, as the ``nats`` source
does.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import time
from collections import Counter
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from streamcount.alerts.record import Alert
from streamcount.cluster.collect import Close, PaneCollector
from streamcount.config.describe import fingerprint
from streamcount.config.settings import Config
from streamcount.engine.counters import Level
from streamcount.engine.merged import MergedPane, PanePart, merge_parts
from streamcount.errors import ParseError
from streamcount.intake.records import RecordBatch
from streamcount.intake.sources.nats import JetStreamSource

if TYPE_CHECKING:
    from streamcount.intake.sources import Source
    from streamcount.service.extension import BatchHandler
    from streamcount.service.loop import Service

__all__ = ["MergerExtension", "SummarySource"]

logger = logging.getLogger(__name__)


class SummarySource(JetStreamSource):
    """The summaries stream through a durable pull consumer: one record per message (the
    payloads are binary), exactly once like the ``nats`` source."""

    name = "summaries"
    split_lines = False


class MergerExtension:
    """The merger's hooks into :class:`~streamcount.service.loop.Service` (module notes)."""

    name = "cluster"

    def __init__(self, config: Config, *, clock: Any = time.time) -> None:
        cluster = config.cluster
        assert cluster.workers  # checked with the config rules
        self.config = config
        self.clock = clock
        self.collector = PaneCollector(
            cluster.workers,
            fingerprint=fingerprint(config),
            epsilon=config.engine.epsilon,
            max_itemset_size=config.engine.max_itemset_size,
            timeout=cluster.pane_timeout_seconds,
        )
        self.pane_seconds = float(config.engine.pane_seconds or 0.0)
        self.merge_seconds: list[float] = []
        self.close_seconds: list[float] = []
        self._service: Service | None = None
        self._source: SummarySource | None = None

    # -- the ServiceExtension hooks ----------------------------------------------------------

    def load_state(self, meta: Mapping[str, Any] | None, arrays: Mapping[str, np.ndarray]) -> None:
        if meta:
            self.collector.load_state(meta, arrays)

    def inputs(self, positions: Mapping[str, Any]) -> list[tuple[Source, BatchHandler | None]]:
        cluster = self.config.cluster
        nats = dataclasses.replace(
            self.config.input.nats,
            stream=cluster.stream,
            subject=cluster.subject.replace("{worker}", "*"),
            durable=cluster.durable,
        )
        source = SummarySource.from_config(
            self.config, positions.get(SummarySource.name), nats=nats
        )
        assert isinstance(source, SummarySource)
        self._source = source
        return [(source, self._count)]

    def bind(self, service: Service) -> None:
        self._service = service
        service.pipeline.amend_alerts(self._name_missing)
        logger.info(
            "cluster merger: merging the panes of %s from stream %s",
            ", ".join(self.config.cluster.workers or ()),
            self.config.cluster.stream,
        )

    def turn(self, *, caught_up: bool) -> int:
        accepted = self._close_due(caught_up=caught_up)
        self._observe()
        return accepted

    def idle_watermark(self) -> float | None:
        """Where the workers' watermarks are: the end of the last pane closed (a merged window
        slides there on a quiet feed, never to the merger's own clock)."""
        closed = self.collector.closed_through
        if closed is None:
            return -math.inf
        # mid-pane past the end of pane ``closed``: no rounding can land it a pane short
        return (closed + 1.5) * self.pane_seconds + self.config.engine.allowed_lateness_seconds

    def before_checkpoint(self) -> bool:
        return True

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        return self.collector.state()

    def status(self) -> dict[str, Any]:
        collector = self.collector
        now = self.clock()
        closed = collector.closed_through
        return {
            "role": "merger",
            "workers": list(collector.workers),
            "closed_through_pane": closed,
            "closed_through_time": None if closed is None else (closed + 1) * self.pane_seconds,
            "last_pane": dict(collector.reported),
            "open_panes": collector.open_panes(now),
            "incomplete_panes": [
                {"first": a, "last": b, "missing_workers": list(ws)}
                for a, b, ws in collector.incomplete[-20:]
            ],
            "summaries": dict(collector.totals.received),
            "late": dict(collector.totals.late),
            "held_chunks": collector.held_chunks,
            "mixed_catalogue_panes": [
                {"pane": p, "versions": dict(v)} for p, v in collector.mixed_catalogue[-20:]
            ],
        }

    def ready(self) -> bool:
        return True  # the summaries source's own connection is part of readiness

    def close(self) -> None:
        pass  # the summaries source is closed with the service's sources

    # -- summaries in, panes out ---------------------------------------------------------------

    def _count(self, batch: RecordBatch) -> tuple[int, Counter[str]]:
        """One batch of summary messages (one record each, offsets their stream sequences)."""
        assert self._service is not None
        now = self.clock()
        errors: list[ParseError] = []
        offsets = batch.offsets
        for i, raw in enumerate(batch.lines):
            got = self.collector.receive(raw, now)
            if got.reason is None:
                continue
            errors.append(
                ParseError(
                    got.reason,
                    got.detail,
                    offset=None if offsets is None else int(offsets[i]),
                    raw=got.raw,
                )
            )
        for error in errors:
            self._service.dead_letter.write(error, source=batch.source)
            logger.warning("cluster merger: %s", error.detail)
        accepted = self._close_due(caught_up=False)
        if batch.on_done is not None:
            batch.on_done(accepted, errors)  # messages wholly refused are terminated
        self._service.pipeline.count_rejected(errors)
        return accepted, Counter(e.reason for e in errors)

    def _close_due(self, *, caught_up: bool) -> int:
        assert self._service is not None
        accepted = 0
        for close in self.collector.due(self.clock(), caught_up=caught_up):
            accepted += self._close(close)
        return accepted

    def _close(self, close: Close) -> int:
        assert self._service is not None
        engine = self._service.pipeline.engine
        started = time.perf_counter()
        parts = [
            PanePart(p.levels, p.names, p.meta.transactions, p.meta.absent_bound)
            for p in close.parts
        ]
        k = engine.max_itemset_size
        if any(p.transactions for p in parts):
            merged = merge_parts(parts, k)
        else:
            empty = tuple(Level.empty(size) for size in range(1, k + 1))
            merged = MergedPane(empty, (), 0, 0, max(len(parts), 1))
        seconds = time.perf_counter() - started
        lows = [
            p.meta.start for p in close.parts if p.meta.start is not None and p.meta.transactions
        ]
        highs = [p.meta.end for p in close.parts if p.meta.end is not None and p.meta.transactions]
        result = engine.add_merged_pane(
            close.index,
            merged.levels,
            merged.names,
            merged.transactions,
            absent_bound=merged.absent_bound,
            parts=merged.parts,
            min_ts=min(lows, default=None),
            max_ts=max(highs, default=None),
        )
        if merged.transactions:
            self._service.metrics.cluster_merge_seconds.observe(seconds)
            # the last closes' merge time, and merge plus rules and alerts (bench_cluster.py)
            self.merge_seconds.append(seconds)
            self.close_seconds.append(time.perf_counter() - started)
            del self.merge_seconds[:-1000], self.close_seconds[:-1000]
        return result.accepted

    def _name_missing(self, alerts: list[Alert]) -> list[Alert]:
        """Alerts resting on panes closed without some workers name them in their evidence."""
        if not self.collector.incomplete or not alerts or self._service is None:
            return alerts
        window_panes = self._service.pipeline.engine.window_panes
        out = []
        for alert in alerts:
            lo = min(alert.evidence.change_pane, alert.pane - window_panes + 1)
            runs = self.collector.incomplete_between(lo, alert.pane)
            if runs:
                evidence = dataclasses.replace(alert.evidence, incomplete_panes=runs)
                alert = dataclasses.replace(alert, evidence=evidence)
            out.append(alert)
        return out

    def _observe(self) -> None:
        assert self._service is not None
        totals = self.collector.totals
        self._service.metrics.observe_cluster(
            received=totals.received,
            closed=totals.closed,
            missing={w: totals.missing[w] for w in self.collector.workers},
            last_pane=self.collector.reported,
            mixed_catalogue=totals.mixed_catalogue,
        )
