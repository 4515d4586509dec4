"""Every Prometheus metric streamcount exposes, registered on an injected registry.

Two kinds of metric live here:

* counters and a histogram that the counting loop updates once per *batch* (never per record)
  through :meth:`Metrics.observe_batch`, :meth:`Metrics.observe_alerts`,
  :meth:`Metrics.observe_checkpoint`, :meth:`Metrics.observe_sinks`,
  :meth:`Metrics.observe_dead_letters` and, for a message-bus source,
  :meth:`Metrics.observe_source`;
* gauges of engine state produced at scrape time by a custom collector
  (:class:`~streamcount.service.scrape.StateCollector`) that calls a function returning the
  latest immutable :class:`~streamcount.engine.snapshot.EngineStatistics` (and a
  :class:`ServiceState`), so a scrape never touches the counting loop's mutable state.

:data:`METRIC_NAMES` lists both kinds. The scrape-time families, :class:`ServiceState`,
:class:`RuleSample` and the label sets of the HTTP front end live in
:mod:`streamcount.service.scrape` and are re-exported here.

The registry is always passed in; nothing here touches the process-wide default registry.

Examples
--------
>>> from prometheus_client import CollectorRegistry
>>> registry = CollectorRegistry()
>>> metrics = Metrics(registry, statistics=lambda: None)
>>> metrics.observe_batch(accepted=120, rejected={"malformed": 3}, seconds=0.02)
>>> registry.get_sample_value("streamcount_transactions_total")
120.0
>>> registry.get_sample_value("streamcount_records_rejected_total", {"reason": "too_late"})
0.0
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterable, Mapping
from typing import TYPE_CHECKING, Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram

from streamcount.alerts.kinds import ALERT_KINDS
from streamcount.engine.snapshot import EngineStatistics
from streamcount.errors import REASONS
from streamcount.service.scrape import (
    HTTP_REFUSALS,
    ITEM_TEXT_METRICS,
    RULE_GAUGES,
    STAT_COUNTERS,
    STATE_GAUGES,
    RuleSample,
    ServiceState,
    StateCollector,
)

if TYPE_CHECKING:
    from streamcount.service.httpd import HttpStats

__all__ = [
    "ALERT_KINDS",
    "CATALOGUE_RELOAD_RESULTS",
    "CHECKPOINT_RESULTS",
    "CLUSTER_CLOSES",
    "CLUSTER_RESULTS",
    "HTTP_REFUSALS",
    "ITEM_TEXT_METRICS",
    "METRIC_NAMES",
    "REJECT_REASONS",
    "SINK_NAMES",
    "Metrics",
    "RuleSample",
    "ServiceState",
]

#: ``reason`` label values pre-created so they render as 0 before the first rejection: every
#: reason of :data:`streamcount.errors.REASONS`, sorted
REJECT_REASONS: tuple[str, ...] = tuple(sorted(REASONS))
# ALERT_KINDS (the ``kind`` label values of ``streamcount_alerts_total``) comes from
# streamcount.alerts.kinds and is re-exported here with the other label sets
#: ``sink`` label values of the sink counters
SINK_NAMES: tuple[str, ...] = ("file", "log", "stdout", "webhook")
#: ``result`` label values of ``streamcount_checkpoints_total``
CHECKPOINT_RESULTS: tuple[str, ...] = ("failed", "ok")
#: ``result`` label values of ``streamcount_catalogue_reloads_total``
CATALOGUE_RELOAD_RESULTS: tuple[str, ...] = ("failed", "ok")
#: ``result`` label values of ``streamcount_cluster_summaries_received_total`` (merger)
CLUSTER_RESULTS: tuple[str, ...] = ("duplicate", "late", "merged", "refused")
#: ``how`` label values of ``streamcount_cluster_panes_closed_total`` (merger)
CLUSTER_CLOSES: tuple[str, ...] = ("complete", "timeout")
#: Seconds to merge one pane's summaries: from a tenth of a millisecond to seconds.
_MERGE_BUCKETS = (0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 1, 5)

#: Seconds to count one batch: from a millisecond (tiny batches) to tens of seconds.
_BATCH_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30)

#: Every metric family name streamcount exposes (counters with their ``_total`` suffix).
METRIC_NAMES: tuple[str, ...] = (
    "streamcount_transactions_total",
    "streamcount_records_rejected_total",
    "streamcount_alerts_total",
    "streamcount_sink_failures_total",
    "streamcount_sink_dropped_total",
    "streamcount_checkpoints_total",
    "streamcount_catalogue_reloads_total",
    "streamcount_dead_letters_lost_total",
    "streamcount_batch_seconds",
    *(f"{name}_total" for name in STAT_COUNTERS),
    "streamcount_auth_failures_total",
    "streamcount_http_refused_total",
    "streamcount_http_connections",
    "streamcount_source_connected",
    "streamcount_source_lag_messages",
    "streamcount_source_redeliveries_total",
    "streamcount_source_reconnects_total",
    "streamcount_source_gap_messages_total",
    "streamcount_source_terminated_total",
    "streamcount_cluster_summaries_published_total",
    "streamcount_cluster_publish_pending",
    "streamcount_cluster_summaries_received_total",
    "streamcount_cluster_panes_closed_total",
    "streamcount_cluster_missing_summaries_total",
    "streamcount_cluster_mixed_catalogue_panes_total",
    "streamcount_cluster_last_pane",
    "streamcount_cluster_merge_seconds",
    *STATE_GAUGES,
    *RULE_GAUGES,
)


class Metrics:
    """All of streamcount's metrics on one registry.

    Parameters
    ----------
    registry:
        Where to register; each test builds a fresh one. Never the global default registry.
    statistics:
        Returns the latest :class:`EngineStatistics` (or ``None`` before the engine exists);
        called at scrape time, from the HTTP thread, so it must only hand over a reference to
        an immutable object.
    state:
        Returns the latest :class:`ServiceState`; ``None``: no rules, checkpoints or lag yet.
    top_rules:
        Per-rule gauges for at most this many rules (``metrics.top_rules``); 0 turns them off,
        so the number of series stays bounded whatever the data does.
    sink_names, alert_kinds:
        Label values created up front so they render as 0.
    """

    def __init__(
        self,
        registry: CollectorRegistry,
        *,
        statistics: Callable[[], EngineStatistics | None],
        state: Callable[[], ServiceState] | None = None,
        top_rules: int = 0,
        sink_names: Iterable[str] = SINK_NAMES,
        alert_kinds: Iterable[str] = ALERT_KINDS,
    ) -> None:
        # metrics.top_rules is checked with the other settings (streamcount.config.checks)
        assert top_rules >= 0, f"top_rules={top_rules!r}"
        self.registry = registry
        self.top_rules = top_rules
        self._lock = threading.Lock()
        self._last_checkpoint = 0.0
        self._sink_seen: dict[tuple[str, str], int] = {}
        self._dead_letters_seen = 0
        self._server_stats: Callable[[], HttpStats] | None = None
        self._source_seen: dict[tuple[str, str], int] = {}

        self.transactions = Counter(
            "streamcount_transactions",
            "Transactions accepted for counting.",
            registry=registry,
        )
        self.records_rejected = Counter(
            "streamcount_records_rejected",
            "Records or transactions set aside, by reason (see the dead-letter file).",
            ["reason"],
            registry=registry,
        )
        self.alerts = Counter(
            "streamcount_alerts",
            "Alerts raised, by kind; signals for a person to review, not decisions.",
            ["kind"],
            registry=registry,
        )
        self.sink_failures = Counter(
            "streamcount_sink_failures",
            "Failed delivery attempts of alert records, by sink.",
            ["sink"],
            registry=registry,
        )
        self.sink_dropped = Counter(
            "streamcount_sink_dropped",
            "Alert records given up on (queue full or retries exhausted), by sink.",
            ["sink"],
            registry=registry,
        )
        self.checkpoints = Counter(
            "streamcount_checkpoints",
            "Checkpoint writes, by result (ok or failed).",
            ["result"],
            registry=registry,
        )
        self.catalogue_reloads = Counter(
            "streamcount_catalogue_reloads",
            "Catalogue reloads (SIGHUP or a changed file), by result: ok (read; a new version "
            "when the file changed) or failed (refused, the previous version stays).",
            ["result"],
            registry=registry,
        )
        self.dead_letters_lost = Counter(
            "streamcount_dead_letters_lost",
            "Records set aside that could not be written to the dead-letter file (disk full, "
            "permissions); they are still counted in streamcount_records_rejected_total.",
            registry=registry,
        )
        self.batch_seconds = Histogram(
            "streamcount_batch_seconds",
            "Seconds spent counting one batch of transactions.",
            buckets=_BATCH_BUCKETS,
            registry=registry,
        )
        self.source_connected = Gauge(
            "streamcount_source_connected",
            "1 while a message-bus source is connected with its consumer set up, else 0.",
            ["source"],
            registry=registry,
        )
        self.source_lag = Gauge(
            "streamcount_source_lag_messages",
            "Messages on the bus for this source not yet counted (consumer lag).",
            ["source"],
            registry=registry,
        )
        self.source_totals = {
            "redeliveries": Counter(
                "streamcount_source_redeliveries",
                "Messages the bus delivered more than once (each dropped after the first).",
                ["source"],
                registry=registry,
            ),
            "reconnects": Counter(
                "streamcount_source_reconnects",
                "Connections to the bus made again after losing one.",
                ["source"],
                registry=registry,
            ),
            "gap_messages": Counter(
                "streamcount_source_gap_messages",
                "Messages removed by the stream's retention before they were read, accepted "
                "with --accept-gap (never counted).",
                ["source"],
                registry=registry,
            ),
            "terminated": Counter(
                "streamcount_source_terminated",
                "Messages terminated on the bus because none of their records could be "
                "counted (each record is in the dead-letter file).",
                ["source"],
                registry=registry,
            ),
        }
        self.cluster_published = Counter(
            "streamcount_cluster_summaries_published",
            "Worker: pane summaries (empty ones included) the summaries stream acknowledged.",
            registry=registry,
        )
        self.cluster_pending = Gauge(
            "streamcount_cluster_publish_pending",
            "Worker: pane summaries published and not yet acknowledged by the stream.",
            registry=registry,
        )
        self.cluster_received = Counter(
            "streamcount_cluster_summaries_received",
            "Merger: pane summaries received, by result (merged; duplicate: that worker's "
            "summary of that pane was already merged; late: its pane was closed without it; "
            "refused: damaged or foreign, in the dead-letter file).",
            ["result"],
            registry=registry,
        )
        self.cluster_closed = Counter(
            "streamcount_cluster_panes_closed",
            "Merger: panes closed, by how: complete (every worker reported) or timeout "
            "(cluster.pane_timeout_seconds passed with some worker missing).",
            ["how"],
            registry=registry,
        )
        self.cluster_mixed_catalogue = Counter(
            "streamcount_cluster_mixed_catalogue_panes",
            "Merger: panes merged from workers' summaries counted under different catalogue "
            "versions.",
            registry=registry,
        )
        self.cluster_missing = Counter(
            "streamcount_cluster_missing_summaries",
            "Merger: panes closed without this worker's summary (its orders there are not in "
            "the window).",
            ["worker"],
            registry=registry,
        )
        self.cluster_last_pane = Gauge(
            "streamcount_cluster_last_pane",
            "The newest pane index each worker reported (merger) or published (worker); "
            "pane index times engine.pane_seconds is its start in epoch seconds.",
            ["worker"],
            registry=registry,
        )
        self.cluster_merge_seconds = Histogram(
            "streamcount_cluster_merge_seconds",
            "Merger: seconds to merge one pane's summaries into the window (the rules and "
            "alerts evaluated at its close not included).",
            buckets=_MERGE_BUCKETS,
            registry=registry,
        )
        self._cluster_seen: dict[tuple[str, str], int] = {}
        for result in CLUSTER_RESULTS:
            self.cluster_received.labels(result=result)
        for how in CLUSTER_CLOSES:
            self.cluster_closed.labels(how=how)
        for reason in REJECT_REASONS:
            self.records_rejected.labels(reason=reason)
        for kind in alert_kinds:
            self.alerts.labels(kind=kind)
        for sink in sink_names:
            self.sink_failures.labels(sink=sink)
            self.sink_dropped.labels(sink=sink)
        for result in CHECKPOINT_RESULTS:
            self.checkpoints.labels(result=result)
        for result in CATALOGUE_RELOAD_RESULTS:
            self.catalogue_reloads.labels(result=result)
        registry.register(
            StateCollector(
                statistics=statistics,
                state=state if state is not None else ServiceState,
                last_checkpoint=self._read_last_checkpoint,
                server_stats=self._read_server_stats,
                top_rules=top_rules,
            )
        )

    def _read_last_checkpoint(self) -> float:
        return self._last_checkpoint

    def _read_server_stats(self) -> HttpStats | None:
        return self._server_stats() if self._server_stats is not None else None

    def observe_batch(self, accepted: int, rejected: Mapping[str, int], seconds: float) -> None:
        """Count one batch: accepted transactions, rejections by reason, time spent."""
        if accepted:
            self.transactions.inc(accepted)
        for reason, n in rejected.items():
            if n:
                self.records_rejected.labels(reason=reason).inc(n)
        self.batch_seconds.observe(seconds)

    def observe_alerts(self, counts: Mapping[str, int]) -> None:
        """Count alerts raised in one evaluation, by kind."""
        for kind, n in counts.items():
            if n:
                self.alerts.labels(kind=kind).inc(n)

    def observe_checkpoint(self, ok: bool, unix_time: float) -> None:
        """Count a checkpoint attempt; a successful one also sets the last-checkpoint gauge."""
        self.checkpoints.labels(result="ok" if ok else "failed").inc()
        if ok:
            with self._lock:
                self._last_checkpoint = max(self._last_checkpoint, float(unix_time))

    def observe_catalogue_reload(self, ok: bool) -> None:
        """Count one catalogue reload attempt."""
        self.catalogue_reloads.labels(result="ok" if ok else "failed").inc()

    def watch_server(self, stats: Callable[[], HttpStats] | None) -> None:
        """Read the HTTP server's totals at scrape time (``server.stats`` of
        :func:`~streamcount.service.server.start_server`'s server): failed authentications,
        refusals by reason, open connections. Until then they read 0."""
        self._server_stats = stats

    def observe_dead_letters(self, lost_total: int) -> None:
        """Bring ``streamcount_dead_letters_lost_total`` up to the dead-letter file's own
        running total (:attr:`~streamcount.intake.deadletter.DeadLetterFile.failed_writes`);
        call it once per turn. A total that went down (a new file object) counts in full."""
        with self._lock:
            before = self._dead_letters_seen
            self._dead_letters_seen = lost_total
        delta = lost_total - before if lost_total >= before else lost_total
        if delta:
            self.dead_letters_lost.inc(delta)

    def observe_sinks(self, failures: Mapping[str, int], dropped: Mapping[str, int]) -> None:
        """Bring the sink counters up to the sinks' own running totals.

        Parameters
        ----------
        failures, dropped:
            Cumulative totals per sink name as the sinks report them. The counters grow by the
            difference since the previous call; a total that went down (a sink was rebuilt and
            started from 0) counts in full, as Prometheus treats a counter reset.
        """
        for counter, kind, totals in (
            (self.sink_failures, "failures", failures),
            (self.sink_dropped, "dropped", dropped),
        ):
            for sink, total in totals.items():
                with self._lock:
                    before = self._sink_seen.get((kind, sink), 0)
                    self._sink_seen[(kind, sink)] = total
                delta = total - before if total >= before else total
                if delta:
                    counter.labels(sink=sink).inc(delta)

    def observe_source(
        self,
        source: str,
        *,
        connected: bool,
        lag_messages: int,
        redeliveries: int,
        reconnects: int,
        gap_messages: int,
        terminated: int,
    ) -> None:
        """Bring a message-bus source's metrics up to its own report (e.g.
        ``observe_source(name, **dataclasses.asdict(source.bus_stats()))``).

        ``connected`` and ``lag_messages`` are current values; the others are the source's
        running totals, added as the difference since the previous call (a total that went
        down, from a rebuilt source, counts in full, as Prometheus treats a counter reset).
        """
        self.source_connected.labels(source=source).set(1.0 if connected else 0.0)
        self.source_lag.labels(source=source).set(float(lag_messages))
        totals = {
            "redeliveries": redeliveries,
            "reconnects": reconnects,
            "gap_messages": gap_messages,
            "terminated": terminated,
        }
        for kind, total in totals.items():
            with self._lock:
                before = self._source_seen.get((kind, source), 0)
                self._source_seen[(kind, source)] = total
            delta = total - before if total >= before else total
            counter = self.source_totals[kind].labels(source=source)
            if delta:
                counter.inc(delta)

    def observe_cluster(
        self,
        *,
        published: int | None = None,
        pending: int | None = None,
        received: Mapping[str, int] | None = None,
        closed: Mapping[str, int] | None = None,
        missing: Mapping[str, int] | None = None,
        last_pane: Mapping[str, int] | None = None,
        mixed_catalogue: int | None = None,
    ) -> None:
        """Bring the cluster metrics up to a worker's or merger's own running totals
        (``published``, ``received`` by result, ``closed`` by how, ``missing`` by worker:
        added as the difference since the previous call, a total that went down counting in
        full) and current values (``pending``, ``last_pane`` by worker)."""
        if pending is not None:
            self.cluster_pending.set(float(pending))
        for worker, pane in (last_pane or {}).items():
            self.cluster_last_pane.labels(worker=worker).set(float(pane))
        totals: list[tuple[str, str, int, Any]] = []
        if published is not None:
            totals.append(("published", "", published, self.cluster_published))
        for result, n in (received or {}).items():
            totals.append(("received", result, n, self.cluster_received.labels(result=result)))
        for how, n in (closed or {}).items():
            totals.append(("closed", how, n, self.cluster_closed.labels(how=how)))
        for worker, n in (missing or {}).items():
            totals.append(("missing", worker, n, self.cluster_missing.labels(worker=worker)))
        if mixed_catalogue is not None:
            totals.append(("mixed_catalogue", "", mixed_catalogue, self.cluster_mixed_catalogue))
        for kind, label, total, counter in totals:
            with self._lock:
                before = self._cluster_seen.get((kind, label), 0)
                self._cluster_seen[(kind, label)] = total
            delta = total - before if total >= before else total
            if delta:
                counter.inc(delta)
