"""Rule monitor: emergence, fading, hysteresis, cooldown, warm-up, surges, families, state."""

from __future__ import annotations

import json
import logging
import random
from collections import Counter
from importlib import resources
from itertools import combinations

import numpy as np
import pytest

from streamcount.alerts.monitor import ALERT_KINDS, Alert, RuleMonitor, alert_id
from streamcount.config.settings import AlertsConfig, RulesConfig
from streamcount.engine.snapshot import LevelCounts, WindowSnapshot
from streamcount.errors import CheckpointError, ConfigError
from streamcount.rules.derive import derive_rules

# An invented tea room's menu (no real products)
BACKGROUND = [
    "oat loaf",
    "rye crackers",
    "plum jam",
    "earl blend",
    "mint sprig tea",
    "barley scone",
    "quince paste",
    "honey jar",
    "pear cordial",
    "seed bar",
    "lemon curd",
    "nut brittle",
]
PAIR = ("fig tart", "lavender tea")
NAMES = sorted([*BACKGROUND, *PAIR])


def snapshot_of(
    panes: list[list[set[str]]], *, first_seq: int = 1, max_size: int = 2
) -> WindowSnapshot:
    """Exact brute-force counts of the baskets of ``panes`` (count == upper, max_error 0)."""
    ids = {n: i for i, n in enumerate(NAMES)}
    baskets = [b for pane in panes for b in pane]
    levels = []
    for k in range(1, max_size + 1):
        c: Counter[tuple[int, ...]] = Counter()
        for b in baskets:
            c.update(combinations(sorted(ids[i] for i in b), k))
        rows = sorted(c)
        count = np.array([c[r] for r in rows], dtype=np.int64)
        items = np.array(rows, dtype=np.int32).reshape(len(rows), k)
        levels.append(LevelCounts(k, items, count, count.copy()))
    n = len(baskets)
    return WindowSnapshot(
        first_seq, first_seq + n - 1, n, 0, 0.0, 100, len(panes), tuple(levels), NAMES
    )


def make_stream(
    panes: int, *, pair_from: int, pair_until: int, rate: float, seed: int = 1, base: float = 0.0
) -> list[list[set[str]]]:
    rng = random.Random(seed)
    out = []
    for j in range(panes):
        pane = []
        for _ in range(100):
            basket = set(rng.sample(BACKGROUND, rng.randint(1, 3)))
            p = rate if pair_from <= j < pair_until else base
            if rng.random() < p:
                basket |= set(PAIR)
            pane.append(basket)
        out.append(pane)
    return out


RULES = RulesConfig(
    min_support=0.05,
    min_confidence=0.3,
    min_lift=1.5,
    min_count=10,
    max_p_value=1e-3,
    confirm_evaluations=2,
    cooldown_evaluations=3,
)
NO_SURGE = AlertsConfig(surge=False)
WINDOW = 4


def run(monitor: RuleMonitor, stream: list[list[set[str]]], start: int = 0, *, panes=WINDOW):
    """Evaluate pane by pane (window of ``panes``); returns ``[(pane index, alerts)]``."""
    out = []
    for j in range(start, len(stream)):
        lo = max(0, j - panes + 1)
        window = snapshot_of(stream[lo : j + 1], first_seq=lo * 100 + 1)
        recent = snapshot_of([stream[j]], first_seq=j * 100 + 1)
        baseline = snapshot_of(stream[lo:j], first_seq=lo * 100 + 1) if j > lo else None
        alerts = monitor.evaluate(
            window,
            recent=recent,
            baseline=baseline,
            seq=(j + 1) * 100,
            event_time=1_700_000_000.0 + 60 * j,
            warm=j >= panes - 1,
        )
        out.append((j, alerts))
    return out


def test_planted_pair_emerges_then_fades():
    stream = make_stream(30, pair_from=8, pair_until=18, rate=0.3)
    monitor = RuleMonitor(RULES, NO_SURGE)
    history = run(monitor, stream)
    rule = (("fig tart",), ("lavender tea",))
    # the first pane whose exact-count window passes every entry threshold
    crossing = next(
        j
        for j in range(len(stream))
        if rule
        in {r.key for r in derive_rules(snapshot_of(stream[max(0, j - WINDOW + 1) : j + 1]), RULES)}
    )
    emerged = [(j, a) for j, alerts in history for a in alerts if a.kind == "emerged"]
    faded = [(j, a) for j, alerts in history for a in alerts if a.kind == "faded"]
    keys = {(a.antecedent, a.consequent) for _, a in emerged}
    # both splits of the pair are active, but they are one family (same itemset, same lift):
    # only the representative (the split that sorts first) alerts
    assert keys == {rule}
    when = {(a.antecedent, a.consequent): j for j, a in emerged}
    assert crossing <= when[rule] <= crossing + 2
    # faded after the pair stopped, once per rule, and nothing else
    assert {(a.antecedent, a.consequent) for _, a in faded} == keys
    assert all(18 <= j <= 18 + WINDOW + 2 for j, _ in faded)
    assert len(emerged) == 1 and len(faded) == 1
    assert monitor.active_rules == []
    first = emerged[0][1]
    assert first.seq == (when[rule] + 1) * 100
    assert first.window["transactions"] == 400
    assert first.p_value is not None and first.p_value <= 1e-3
    assert first.thresholds["min_lift"] == 1.5


def pair_snapshot(a, r=300, q=300, n=1000, *, slack=0) -> WindowSnapshot:
    """Two items, honey (0) and scone (1), with joint count ``a``; bounds moved by ``slack``."""
    lv1 = LevelCounts(
        1,
        np.array([[0], [1]], dtype=np.int32),
        np.array([r, q], dtype=np.int64),
        np.array([r, q], dtype=np.int64),
    )
    lv2 = LevelCounts(
        2,
        np.array([[0, 1]], dtype=np.int32),
        np.array([a - slack], dtype=np.int64),
        np.array([a + slack], dtype=np.int64),
    )
    return WindowSnapshot(1, n, n, 2 * slack, 0.0, None, 1, (lv1, lv2), ["honey", "scone"])


BAND = RulesConfig(
    min_support=0.1,
    min_confidence=0.1,
    min_lift=1.0,
    min_count=1,
    max_p_value=None,
    exit_ratio=0.8,
    confirm_evaluations=2,
    cooldown_evaluations=3,
)


def feed(monitor: RuleMonitor, joint_counts, *, warm=True, start=0, slack=0):
    """Alert kinds per evaluation for the honey => scone rule (and its reverse)."""
    out = []
    for i, a in enumerate(joint_counts):
        alerts = monitor.evaluate(pair_snapshot(a, slack=slack), seq=start + i, warm=warm)
        out.append(sorted({x.kind for x in alerts}))
    return out


def test_hysteresis_confirmation_and_cooldown():
    m = RuleMonitor(BAND, NO_SURGE)
    # support 0.12 / 0.09 alternating: never two entries in a row -> no emergence
    assert feed(m, [120, 90, 120, 90, 120, 90]) == [[]] * 6
    # two in a row -> emerged on the second
    assert feed(m, [120, 120]) == [[], ["emerged"]]
    assert {r.key for r in m.active_rules} == {(("honey",), ("scone",)), (("scone",), ("honey",))}
    # oscillating inside the band [0.08, 0.10): stays active, no flapping
    assert feed(m, [90, 110, 85, 95, 100, 82, 99, 80]) == [[]] * 8
    # one evaluation below exit is not enough; two in a row fade it
    assert feed(m, [60, 95, 60, 60]) == [[], [], [], ["faded"]]
    # cooldown of 3 evaluations: entry ignored, then confirmation starts again
    assert feed(m, [120, 120, 120, 120, 120]) == [[], [], [], [], ["emerged"]]


def test_exit_judged_on_high_bounds_when_conservative():
    m = RuleMonitor(BAND, NO_SURGE)
    assert feed(m, [120, 120]) == [[], ["emerged"]]
    # low bound 65 < 80 but the high bound 85 may still be above exit: no fade
    assert feed(m, [75, 75, 75], slack=10) == [[], [], []]
    # high bound 70 < 80: the rule has certainly weakened
    assert feed(m, [60, 60], slack=10) == [[], ["faded"]]


def test_warm_up_emits_nothing_and_sets_starting_state(caplog):
    m = RuleMonitor(BAND, NO_SURGE)
    assert feed(m, [120, 120, 120], warm=False) == [[]] * 3
    assert len(m.active_rules) == 2
    with caplog.at_level(logging.INFO, logger="streamcount.alerts"):
        assert feed(m, [120, 120]) == [[], []]
    assert any("warm-up over" in rec.getMessage() for rec in caplog.records)
    # the starting state is announced: it fades with an alert
    assert feed(m, [50, 50]) == [[], ["faded"]]


def test_warm_up_fades_silently():
    m = RuleMonitor(BAND, NO_SURGE)
    assert feed(m, [120, 120, 50, 50], warm=False) == [[]] * 4
    assert m.active_rules == []


def family_snapshot(abc: int) -> WindowSnapshot:
    """honey (0), scone (1), clotted cream (2); cream is independent of the pair."""
    names = ["clotted cream", "honey", "scone"]
    # ids: cream 0, honey 1, scone 2
    singles = {(0,): 500, (1,): 200, (2,): 200}
    pairs = {(0, 1): 100, (0, 2): 100, (1, 2): 80}
    levels = []
    for k, d in ((1, singles), (2, pairs), (3, {(0, 1, 2): abc})):
        rows = sorted(d)
        c = np.array([d[r] for r in rows], dtype=np.int64)
        levels.append(LevelCounts(k, np.array(rows, dtype=np.int32), c, c.copy()))
    return WindowSnapshot(1, 1000, 1000, 0, 0.0, None, 1, tuple(levels), names)


FAMILY = RulesConfig(
    min_support=0.03,
    min_confidence=0.3,
    min_lift=1.5,
    min_count=1,
    max_p_value=None,
    confirm_evaluations=1,
    cooldown_evaluations=0,
)


def test_family_members_do_not_alert():
    m = RuleMonitor(FAMILY, NO_SURGE)
    alerts = m.evaluate(family_snapshot(40), seq=1)
    # honey => scone (lift 2), its reverse scone => honey (same lift) and
    # {cream, honey} => scone (lift 2, no gain): one family, one alert
    assert {(a.antecedent, a.consequent) for a in alerts} == {(("honey",), ("scone",))}
    assert (("scone",), ("honey",)) in {r.key for r in m.active_rules}
    assert (("clotted cream", "honey"), ("scone",)) in {r.key for r in m.active_rules}
    # a superset with a real lift gain (3 > 2 x 1.1) is its own alert
    m2 = RuleMonitor(FAMILY, NO_SURGE)
    keys = {(a.antecedent, a.consequent) for a in m2.evaluate(family_snapshot(60), seq=1)}
    assert (("clotted cream", "honey"), ("scone",)) in keys


def test_surge_detected_and_resolved():
    # the pair is rare (0.5 %) before pane 15, then in 30 % of baskets in panes 15 to 18.
    # Window of 10 panes: recent = the last pane, baseline = the 9 before it, so the
    # baseline stays long enough for the growth rate to hold on the confirming evaluation.
    stream = make_stream(30, pair_from=15, pair_until=19, rate=0.3, base=0.005, seed=4)
    rules = RulesConfig(
        min_support=0.9, max_p_value=None, confirm_evaluations=2, cooldown_evaluations=2
    )  # no rule can pass: only surges
    cfg = AlertsConfig(growth_rate=3.0, surge_min_count=20, surge_max_p_value=1e-3)
    m = RuleMonitor(rules, cfg)
    history = run(m, stream, panes=10)
    surged = [(j, a) for j, alerts in history for a in alerts]
    assert [a.kind for _, a in surged] == ["surged"]
    j, alert = surged[0]
    assert j == 16  # first qualifying pane 15, confirmed at 16
    assert alert.items == PAIR and alert.antecedent is None
    assert alert.growth_rate is not None and alert.growth_rate.low >= 3.0
    assert alert.p_value is not None and alert.p_value <= 1e-3
    assert alert.baseline is not None and alert.baseline["transactions"] == 900
    assert alert.window["transactions"] == 100
    # resolved after the pair stopped
    assert m.active_surges == []


def test_surge_needs_significance_and_count():
    stream = make_stream(30, pair_from=15, pair_until=19, rate=0.3, base=0.005, seed=4)
    rules = RulesConfig(min_support=0.9, max_p_value=None)
    strict = AlertsConfig(growth_rate=3.0, surge_min_count=40, surge_max_p_value=1e-3)
    assert not any(a for _, a in run(RuleMonitor(rules, strict), stream, panes=10))
    off = AlertsConfig(surge=False)
    assert not any(a for _, a in run(RuleMonitor(rules, off), stream, panes=10))


def test_state_round_trip():
    stream = make_stream(30, pair_from=8, pair_until=18, rate=0.3, base=0.005, seed=6)
    cfg = AlertsConfig(growth_rate=3.0, surge_min_count=20, surge_max_p_value=1e-3)
    a = RuleMonitor(RULES, cfg)
    run(a, stream[:12])
    state = json.loads(json.dumps(a.state_dict(), allow_nan=False))
    assert state["rules"], "expected followed rules at pane 12"
    b = RuleMonitor(RULES, cfg)
    b.load_state(state)
    assert b.state_dict() == a.state_dict()
    assert [r.key for r in b.active_rules] == [r.key for r in a.active_rules]
    rest_a = run(a, stream, start=12)
    rest_b = run(b, stream, start=12)
    assert rest_a == rest_b
    assert any(alerts for _, alerts in rest_a)
    with pytest.raises(CheckpointError, match="version"):
        b.load_state({"version": 99})
    with pytest.raises(CheckpointError, match="malformed"):
        b.load_state({"version": 1, "rules": [{"antecedent": []}]})


def test_config_checks():
    with pytest.raises(ConfigError, match="exit_ratio"):
        RuleMonitor(RulesConfig(exit_ratio=1.5), AlertsConfig())
    with pytest.raises(ConfigError, match="confirm_evaluations"):
        RuleMonitor(RulesConfig(confirm_evaluations=0), AlertsConfig())


def _schema():
    text = resources.files("streamcount").joinpath("schemas/alert.schema.json").read_text()
    return json.loads(text)


def _check_measure(m):
    assert set(m) == {"value", "low", "high"}
    assert all(v is None or isinstance(v, float) for v in m.values())


def check_alert_dict(d: dict, schema: dict) -> None:
    """A small validation of the record against the schema's required keys and types."""
    assert list(d) == schema["required"]
    assert isinstance(d["id"], str) and len(d["id"]) == 16
    int(d["id"], 16)
    assert d["kind"] in ALERT_KINDS
    assert isinstance(d["seq"], int)
    assert d["event_time"] is None or isinstance(d["event_time"], float)
    assert d["items"] and all(isinstance(i, str) for i in d["items"])
    assert "support" in d["measures"]
    for m in d["measures"].values():
        _check_measure(m)
    if d["kind"] == "surged":
        assert d["antecedent"] is None and d["consequent"] is None
        _check_measure(d["growth_rate"])
        assert set(d["baseline"]) >= {"first_seq", "last_seq", "transactions", "max_error"}
    else:
        assert sorted(d["antecedent"] + d["consequent"]) == d["items"]
        assert set(d["measures"]) == {"support", "confidence", "lift", "leverage", "conviction"}
        assert d["growth_rate"] is None and d["baseline"] is None
    assert d["p_value"] is None or 0.0 <= d["p_value"] <= 1.0
    assert set(d["window"]) == {"first_seq", "last_seq", "transactions", "max_error"}
    assert isinstance(d["thresholds"], dict) and d["thresholds"]
    json.dumps(d, allow_nan=False)


def _collect_alert_dicts() -> list[dict]:
    stream = make_stream(34, pair_from=15, pair_until=19, rate=0.3, base=0.005, seed=4)
    cfg = AlertsConfig(growth_rate=3.0, surge_min_count=20, surge_max_p_value=1e-3)
    history = run(RuleMonitor(RULES, cfg), stream, panes=10)
    alerts: list[Alert] = [x for _, xs in history for x in xs]
    # a rule with confidence 1: infinite conviction written as null
    m = RuleMonitor(FAMILY, NO_SURGE)
    alerts += m.evaluate(pair_snapshot(300, r=300, q=400), seq=5, event_time=None)
    return [a.as_dict() for a in alerts]


def test_alert_dicts_match_schema():
    schema = _schema()
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    dicts = _collect_alert_dicts()
    assert {d["kind"] for d in dicts} == set(ALERT_KINDS)
    assert any(d["measures"].get("conviction", {}).get("value", 0) is None for d in dicts)
    for d in dicts:
        check_alert_dict(d, schema)
    assert len({d["id"] for d in dicts}) == len(dicts)
    for d in dicts:
        surged = d["kind"] == "surged"
        ante = d["items"] if surged else d["antecedent"]
        cons = [] if surged else d["consequent"]
        assert d["id"] == alert_id(d["kind"], ante, cons, d["seq"])


def test_alert_dicts_validate_with_jsonschema():
    import jsonschema  # test extra: validates records against the published schema

    schema = _schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    for d in _collect_alert_dicts():
        validator.validate(d)
    bad = {**_collect_alert_dicts()[0], "kind": "exploded"}
    assert not validator.is_valid(bad)
