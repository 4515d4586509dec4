"""The metrics built at scrape time, from immutable state handed over by the counting loop.

:class:`StateCollector` is the custom collector :class:`streamcount.service.metrics.Metrics`
registers. On every scrape it calls functions that return the latest immutable
:class:`~streamcount.engine.snapshot.EngineStatistics`, a :class:`ServiceState` (active rules,
the last checkpoint, event lag, the top rules as :class:`RuleSample`) and the HTTP front end's
:class:`~streamcount.service.httpd.HttpStats`, and builds gauge and counter families from
them, so a scrape never touches the counting loop's mutable state. The help text of each
family (:data:`STATE_GAUGES`, :data:`STAT_COUNTERS`, :data:`RULE_GAUGES`) and the label sets
fixed here (:data:`HTTP_REFUSALS`, :data:`ITEM_TEXT_METRICS`) live beside it.

Examples
--------
>>> from prometheus_client import CollectorRegistry
>>> registry = CollectorRegistry()
>>> registry.register(
...     StateCollector(
...         statistics=lambda: None,
...         state=lambda: ServiceState(active_rules=3),
...         last_checkpoint=lambda: 0.0,
...         server_stats=lambda: None,
...         top_rules=0,
...     )
... )
>>> registry.get_sample_value("streamcount_active_rules")
3.0
>>> registry.get_sample_value("streamcount_http_refused_total", {"reason": "busy"})
0.0
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector

from streamcount.engine.snapshot import EngineStatistics

if TYPE_CHECKING:
    from streamcount.service.httpd import HttpStats

__all__ = [
    "HTTP_REFUSALS",
    "ITEM_TEXT_METRICS",
    "RULE_GAUGES",
    "STATE_GAUGES",
    "STAT_COUNTERS",
    "RuleSample",
    "ServiceState",
    "StateCollector",
]

#: Gauges of engine and service state, by family name: their help text.
STATE_GAUGES: dict[str, str] = {
    "streamcount_window_transactions": "Transactions counted in the current window.",
    "streamcount_window_max_error": (
        "Largest possible undercount of any itemset in the window (sum over panes of "
        "ceil(pane transactions / bucket width)); 0 when counting exactly."
    ),
    "streamcount_tracked_itemsets": "Tracked itemset entries summed over live panes, by size.",
    "streamcount_active_rules": "Association rules currently active (after hysteresis).",
    "streamcount_last_checkpoint_timestamp_seconds": (
        "Unix time of the last checkpoint written or restored; 0 when there is none."
    ),
    "streamcount_event_lag_seconds": (
        "Wall-clock time minus the largest event timestamp seen (absent without timestamps)."
    ),
    "streamcount_held_bytes": "Bytes held by the panes' count arrays and batch buffers.",
    "streamcount_live_panes": "Panes held (open ones, and closed ones still in the window).",
    "streamcount_buffered_transactions": "Transactions received but not yet counted.",
    "streamcount_vocabulary_items": "Distinct item names interned.",
}
#: Counters read from the engine's statistics at scrape time (the catalogue's), by family name
#: without ``_total``.
STAT_COUNTERS: dict[str, str] = {
    "streamcount_items_ignored": (
        "Feed items removed before counting by items.ignore / items.allow, by filter (the "
        "ignore entry as configured, or 'not allowed'); since start."
    ),
    "streamcount_catalogue_unknown_items": (
        "Feed items the catalogue does not know (counted as themselves at every level); "
        "since start. 0 without a catalogue."
    ),
}
#: The per-rule gauges (labels ``antecedent`` and ``consequent``), by family name: their help
#: text.
RULE_GAUGES: dict[str, str] = {
    "streamcount_rule_lift": "Lift of one of the top rules by lift (point value).",
    "streamcount_rule_confidence": "Confidence of one of the top rules by lift (point value).",
    "streamcount_rule_support": "Support of one of the top rules by lift (point value).",
}

#: Families whose labels hold item text (names from the feed): left out of a /metrics served
#: without the token (``server.public_metrics``).
ITEM_TEXT_METRICS: tuple[str, ...] = tuple(RULE_GAUGES)
#: ``reason`` label values of ``streamcount_http_refused_total``
HTTP_REFUSALS: tuple[str, ...] = (
    "busy",
    "max_connections",
    "max_connections_per_client",
    "rate_limited",
    "timeout",
)
_HTTP_FAMILIES: dict[str, str] = {
    "streamcount_auth_failures": (
        "Requests refused for a missing or wrong API token (401); each also counts against "
        "its address's server.auth_failures_per_minute."
    ),
    "streamcount_http_refused": (
        "Requests or connections the HTTP server refused, by reason: over a connection cap "
        "(503), not read in time (408), no worker or body budget free (503), too many failed "
        "authentications from the address (429)."
    ),
    "streamcount_http_connections": "HTTP connections open now.",
}


@dataclass(frozen=True, slots=True)
class RuleSample:
    """Point values of one rule for the per-rule gauges (labels: items joined with ``,``)."""

    antecedent: tuple[str, ...]
    consequent: tuple[str, ...]
    support: float
    confidence: float
    lift: float

    @classmethod
    def from_rule(cls, rule: Any) -> RuleSample:
        """From a :class:`streamcount.rules.Rule` (its measures' point values)."""
        return cls(
            tuple(rule.antecedent),
            tuple(rule.consequent),
            float(rule.support.value),
            float(rule.confidence.value),
            float(rule.lift.value),
        )


@dataclass(frozen=True, slots=True)
class ServiceState:
    """Service-level facts read at scrape time next to the engine's statistics."""

    #: rules currently active
    active_rules: int = 0
    #: unix time of the last checkpoint written or restored (``None``: none yet)
    last_checkpoint_unix: float | None = None
    #: wall-clock time minus the largest event timestamp (``None``: no timestamps)
    event_lag_seconds: float | None = None
    #: rules for the per-rule gauges, strongest first; only the first ``top_rules`` are shown
    top_rules: tuple[RuleSample, ...] = ()


class StateCollector(Collector):
    """Builds the state gauges from the latest statistics when Prometheus scrapes.

    Parameters
    ----------
    statistics:
        Returns the latest :class:`EngineStatistics` (``None`` before the engine exists: the
        engine's families are left out).
    state:
        Returns the latest :class:`ServiceState`.
    last_checkpoint:
        Returns the unix time of the last checkpoint written (0: none); the gauge shows the
        later of it and :attr:`ServiceState.last_checkpoint_unix`.
    server_stats:
        Returns the HTTP front end's totals (``None``: no server yet; they read 0).
    top_rules:
        Per-rule gauges for at most this many rules; 0 leaves the per-rule families out.

    Every function is called on the scraping thread, so each must only hand over a reference
    to an immutable object (or read plain numbers).
    """

    def __init__(
        self,
        *,
        statistics: Callable[[], EngineStatistics | None],
        state: Callable[[], ServiceState],
        last_checkpoint: Callable[[], float],
        server_stats: Callable[[], HttpStats | None],
        top_rules: int,
    ) -> None:
        self._statistics = statistics
        self._state = state
        self._last_checkpoint = last_checkpoint
        self._server_stats = server_stats
        self._top_rules = top_rules

    def describe(self) -> Iterable[Metric]:
        # names only, so the registry can refuse a clash at registration time
        yield from self._families(None, ServiceState(), describe=True)

    def collect(self) -> Iterable[Metric]:
        stats = self._statistics()
        state = self._state()
        yield from self._families(stats, state, describe=False)

    def _families(
        self, stats: EngineStatistics | None, state: ServiceState, *, describe: bool
    ) -> Iterator[Metric]:
        def gauge(name: str, labels: Sequence[str] = ()) -> GaugeMetricFamily:
            return GaugeMetricFamily(
                name, STATE_GAUGES.get(name) or RULE_GAUGES[name], labels=labels
            )

        if stats is not None or describe:
            simple = {
                "streamcount_window_transactions": "window_transactions",
                "streamcount_window_max_error": "window_max_error",
                "streamcount_held_bytes": "held_bytes",
                "streamcount_live_panes": "live_panes",
                "streamcount_buffered_transactions": "buffered_transactions",
                "streamcount_vocabulary_items": "vocabulary_items",
            }
            for name, attr in simple.items():
                family = gauge(name)
                if stats is not None:
                    family.add_metric([], float(getattr(stats, attr)))
                yield family
            tracked = gauge("streamcount_tracked_itemsets", ["size"])
            if stats is not None:
                for size, entries in enumerate(stats.tracked_itemsets, start=1):
                    tracked.add_metric([str(size)], float(entries))
            yield tracked
            # the catalogue's counters: label values are the configured filters (bounded)
            ignored = CounterMetricFamily(
                "streamcount_items_ignored",
                STAT_COUNTERS["streamcount_items_ignored"],
                labels=["filter"],
            )
            unknown = CounterMetricFamily(
                "streamcount_catalogue_unknown_items",
                STAT_COUNTERS["streamcount_catalogue_unknown_items"],
            )
            if stats is not None:
                for label, n in sorted(stats.items_ignored.items()):
                    ignored.add_metric([label], float(n))
                unknown.add_metric([], float(stats.items_unknown))
            yield ignored
            yield unknown

        active = gauge("streamcount_active_rules")
        active.add_metric([], float(state.active_rules))
        yield active

        last = gauge("streamcount_last_checkpoint_timestamp_seconds")
        last.add_metric([], max(state.last_checkpoint_unix or 0.0, self._last_checkpoint()))
        yield last

        lag = gauge("streamcount_event_lag_seconds")
        if state.event_lag_seconds is not None:
            lag.add_metric([], float(state.event_lag_seconds))
        yield lag

        yield from self._http_families()

        top = self._top_rules
        if top > 0:
            families = {name: gauge(name, ["antecedent", "consequent"]) for name in RULE_GAUGES}
            for rule in state.top_rules[:top]:
                labels = [",".join(rule.antecedent), ",".join(rule.consequent)]
                families["streamcount_rule_lift"].add_metric(labels, rule.lift)
                families["streamcount_rule_confidence"].add_metric(labels, rule.confidence)
                families["streamcount_rule_support"].add_metric(labels, rule.support)
            yield from families.values()

    def _http_families(self) -> Iterator[Metric]:
        stats = self._server_stats()
        failures = CounterMetricFamily(
            "streamcount_auth_failures", _HTTP_FAMILIES["streamcount_auth_failures"]
        )
        failures.add_metric([], float(stats.auth_failures if stats is not None else 0))
        yield failures
        refused = CounterMetricFamily(
            "streamcount_http_refused",
            _HTTP_FAMILIES["streamcount_http_refused"],
            labels=["reason"],
        )
        for reason in HTTP_REFUSALS:
            refused.add_metric([reason], float(stats.refused[reason] if stats is not None else 0))
        yield refused
        connections = GaugeMetricFamily(
            "streamcount_http_connections", _HTTP_FAMILIES["streamcount_http_connections"]
        )
        connections.add_metric([], float(stats.open_connections if stats is not None else 0))
        yield connections
