"""Metrics on a fresh registry per test, read back with get_sample_value and the text parser."""

from __future__ import annotations

import json
from importlib import resources

import pytest
from prometheus_client import REGISTRY, CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from streamcount.alerts import kinds
from streamcount.engine.snapshot import EngineStatistics
from streamcount.errors import REASONS
from streamcount.service.metrics import (
    ALERT_KINDS,
    METRIC_NAMES,
    REJECT_REASONS,
    Metrics,
    RuleSample,
    ServiceState,
)


def _stats(**changes: object) -> EngineStatistics:
    values: dict[str, object] = {
        "transactions_seen": 1200,
        "rejected": {"too_many_items": 2},
        "window_transactions": 1000,
        "window_max_error": 4,
        "tracked_itemsets": (40, 25, 7),
        "held_bytes": 65536,
        "live_panes": 5,
        "window_panes": 10,
        "buffered_transactions": 200,
        "max_event_ts": 1_700_000_000.0,
        "vocabulary_items": 33,
    }
    values.update(changes)
    return EngineStatistics(**values)  # type: ignore[arg-type]


def _rule(i: int) -> RuleSample:
    return RuleSample((f"tea-{i}", "honey"), (f"scone-{i}",), 0.01 * i, 0.1 * i, 1.0 + i)


@pytest.fixture
def registry() -> CollectorRegistry:
    return CollectorRegistry()


def _families(registry: CollectorRegistry) -> dict[str, object]:
    text = generate_latest(registry).decode("utf-8")
    return {f.name: f for f in text_string_to_metric_families(text)}


def test_counters_per_batch(registry: CollectorRegistry) -> None:
    m = Metrics(registry, statistics=lambda: None)
    m.observe_batch(500, {"malformed": 3, "too_late": 0}, 0.02)
    m.observe_batch(250, {"malformed": 1, "odd_new_reason": 2}, 0.3)
    get = registry.get_sample_value
    assert get("streamcount_transactions_total") == 750
    assert get("streamcount_records_rejected_total", {"reason": "malformed"}) == 4
    assert get("streamcount_records_rejected_total", {"reason": "too_late"}) == 0
    assert get("streamcount_records_rejected_total", {"reason": "odd_new_reason"}) == 2
    assert get("streamcount_batch_seconds_count") == 2
    assert get("streamcount_batch_seconds_sum") == pytest.approx(0.32)
    assert get("streamcount_batch_seconds_bucket", {"le": "0.025"}) == 1
    assert get("streamcount_batch_seconds_bucket", {"le": "+Inf"}) == 2


def test_known_labels_render_as_zero(registry: CollectorRegistry) -> None:
    Metrics(registry, statistics=lambda: None, sink_names=("log", "webhook"))
    get = registry.get_sample_value
    for reason in REJECT_REASONS:
        assert get("streamcount_records_rejected_total", {"reason": reason}) == 0
    for kind in ALERT_KINDS:
        assert get("streamcount_alerts_total", {"kind": kind}) == 0
    assert get("streamcount_sink_failures_total", {"sink": "webhook"}) == 0
    assert get("streamcount_sink_dropped_total", {"sink": "log"}) == 0
    assert get("streamcount_sink_dropped_total", {"sink": "stdout"}) is None
    assert get("streamcount_checkpoints_total", {"result": "failed"}) == 0


def test_label_sets_are_the_single_lists() -> None:
    # every reason a record is set aside and every alert kind, from the one list of each
    assert set(REJECT_REASONS) == set(REASONS) and list(REJECT_REASONS) == sorted(REASONS)
    assert ALERT_KINDS is kinds.ALERT_KINDS
    schema = json.loads(
        resources.files("streamcount").joinpath("schemas/alert.schema.json").read_text()
    )
    assert schema["properties"]["kind"]["enum"] == list(ALERT_KINDS)


def test_alerts_and_checkpoints(registry: CollectorRegistry) -> None:
    m = Metrics(registry, statistics=lambda: None)
    m.observe_alerts({"emerged": 2, "surged": 1, "faded": 0})
    m.observe_alerts({"emerged": 1})
    m.observe_checkpoint(True, 1_700_000_100.0)
    m.observe_checkpoint(False, 1_700_000_200.0)
    get = registry.get_sample_value
    assert get("streamcount_alerts_total", {"kind": "emerged"}) == 3
    assert get("streamcount_alerts_total", {"kind": "surged"}) == 1
    assert get("streamcount_checkpoints_total", {"result": "ok"}) == 1
    assert get("streamcount_checkpoints_total", {"result": "failed"}) == 1
    # the failed attempt does not move the timestamp
    assert get("streamcount_last_checkpoint_timestamp_seconds") == 1_700_000_100.0


def test_last_checkpoint_from_state_when_restored(registry: CollectorRegistry) -> None:
    Metrics(
        registry,
        statistics=lambda: None,
        state=lambda: ServiceState(last_checkpoint_unix=1_600_000_000.0),
    )
    assert registry.get_sample_value("streamcount_last_checkpoint_timestamp_seconds") == 1.6e9


def test_sink_counters_follow_running_totals(registry: CollectorRegistry) -> None:
    m = Metrics(registry, statistics=lambda: None)
    m.observe_sinks({"webhook": 3}, {"webhook": 1})
    m.observe_sinks({"webhook": 5, "file": 0}, {"webhook": 1})
    get = registry.get_sample_value
    assert get("streamcount_sink_failures_total", {"sink": "webhook"}) == 5
    assert get("streamcount_sink_dropped_total", {"sink": "webhook"}) == 1
    # the sink was rebuilt and counts from 0 again: its new total is added in full
    m.observe_sinks({"webhook": 2}, {})
    assert get("streamcount_sink_failures_total", {"sink": "webhook"}) == 7


def test_state_gauges_read_at_scrape_time(registry: CollectorRegistry) -> None:
    latest = {"stats": _stats()}
    Metrics(
        registry,
        statistics=lambda: latest["stats"],
        state=lambda: ServiceState(active_rules=4, event_lag_seconds=2.5),
    )
    get = registry.get_sample_value
    assert get("streamcount_window_transactions") == 1000
    assert get("streamcount_window_max_error") == 4
    assert get("streamcount_tracked_itemsets", {"size": "1"}) == 40
    assert get("streamcount_tracked_itemsets", {"size": "3"}) == 7
    assert get("streamcount_held_bytes") == 65536
    assert get("streamcount_live_panes") == 5
    assert get("streamcount_buffered_transactions") == 200
    assert get("streamcount_vocabulary_items") == 33
    assert get("streamcount_active_rules") == 4
    assert get("streamcount_event_lag_seconds") == 2.5
    # a new snapshot is picked up by the next scrape without telling the metrics object
    latest["stats"] = _stats(window_transactions=2000, tracked_itemsets=(50, 30, 9))
    assert get("streamcount_window_transactions") == 2000
    assert get("streamcount_tracked_itemsets", {"size": "2"}) == 30


def test_no_engine_yet_no_state_gauges(registry: CollectorRegistry) -> None:
    Metrics(registry, statistics=lambda: None)
    assert registry.get_sample_value("streamcount_window_transactions") is None
    assert registry.get_sample_value("streamcount_event_lag_seconds") is None
    assert registry.get_sample_value("streamcount_active_rules") == 0


def test_rule_gauges_bounded_by_top_rules(registry: CollectorRegistry) -> None:
    rules = tuple(_rule(i) for i in range(1, 8))
    Metrics(
        registry,
        statistics=_stats,
        state=lambda: ServiceState(top_rules=rules),
        top_rules=3,
    )
    families = _families(registry)
    lift = families["streamcount_rule_lift"]
    assert len(lift.samples) == 3  # type: ignore[attr-defined]
    labels = {"antecedent": "tea-1,honey", "consequent": "scone-1"}
    assert registry.get_sample_value("streamcount_rule_lift", labels) == 2.0
    assert registry.get_sample_value("streamcount_rule_confidence", labels) == pytest.approx(0.1)
    assert registry.get_sample_value("streamcount_rule_support", labels) == pytest.approx(0.01)
    assert registry.get_sample_value("streamcount_rule_lift", {**labels, "consequent": "x"}) is None
    fourth = {"antecedent": "tea-4,honey", "consequent": "scone-4"}
    assert registry.get_sample_value("streamcount_rule_lift", fourth) is None


def test_rule_gauges_off_by_default(registry: CollectorRegistry) -> None:
    Metrics(registry, statistics=_stats, state=lambda: ServiceState(top_rules=(_rule(1),)))
    assert "streamcount_rule_lift" not in _families(registry)


def test_exposition_parses_and_covers_metric_names(registry: CollectorRegistry) -> None:
    m = Metrics(
        registry,
        statistics=_stats,
        state=lambda: ServiceState(event_lag_seconds=1.0, top_rules=(_rule(2),)),
        top_rules=5,
    )
    m.observe_batch(10, {}, 0.01)
    families = _families(registry)
    # the parser drops a counter's _total suffix from the family name and reads the client's
    # <name>_created samples (creation time of counters and histograms) as families of their own
    exposed = {
        name + "_total" if fam.type == "counter" else name  # type: ignore[attr-defined]
        for name, fam in families.items()
        if not name.endswith("_created")
    }
    assert exposed == set(METRIC_NAMES)
    for fam in families.values():
        assert fam.documentation  # type: ignore[attr-defined]
        assert fam.name.startswith("streamcount_")  # type: ignore[attr-defined]
    assert families["streamcount_batch_seconds"].type == "histogram"  # type: ignore[attr-defined]
    assert families["streamcount_live_panes"].type == "gauge"  # type: ignore[attr-defined]


def test_rule_from_rules_module_point_values() -> None:
    class _M:
        def __init__(self, value: float) -> None:
            self.value = value

    class _R:
        antecedent = ("jam",)
        consequent = ("bread",)
        support = _M(0.05)
        confidence = _M(0.6)
        lift = _M(3.0)

    assert RuleSample.from_rule(_R()) == RuleSample(("jam",), ("bread",), 0.05, 0.6, 3.0)


def test_global_registry_untouched() -> None:
    before = {m.name for m in REGISTRY.collect()}
    Metrics(CollectorRegistry(), statistics=lambda: None)
    assert {m.name for m in REGISTRY.collect()} == before
    assert not any(name.startswith("streamcount") for name in before)


def test_registering_twice_on_one_registry_is_refused(registry: CollectorRegistry) -> None:
    Metrics(registry, statistics=lambda: None)
    with pytest.raises(ValueError, match="Duplicated timeseries"):
        Metrics(registry, statistics=lambda: None)


def test_source_metrics_follow_the_sources_totals(registry: CollectorRegistry) -> None:
    m = Metrics(registry, statistics=lambda: None)
    report = {"redeliveries": 3, "reconnects": 1, "gap_messages": 0, "terminated": 2}
    m.observe_source("nats", connected=True, lag_messages=120, **report)
    m.observe_source("nats", connected=False, lag_messages=80, **{**report, "reconnects": 2})
    get = registry.get_sample_value
    labels = {"source": "nats"}
    assert get("streamcount_source_connected", labels) == 0
    assert get("streamcount_source_lag_messages", labels) == 80
    assert get("streamcount_source_redeliveries_total", labels) == 3
    assert get("streamcount_source_reconnects_total", labels) == 2
    assert get("streamcount_source_gap_messages_total", labels) == 0
    assert get("streamcount_source_terminated_total", labels) == 2
    # a rebuilt source starts its totals from 0 again: counted in full, never backwards
    m.observe_source("nats", connected=True, lag_messages=0, **{**report, "reconnects": 1})
    assert get("streamcount_source_reconnects_total", labels) == 3
