"""Alerts as detected changes: planted changes against an exact recount of every window,
a rule oscillating around its threshold at a constant rate, families, warm-up, one notification
per itemset, state round trips and the alert schema.

The feeds are made here: a small invented tea room whose baskets draw each background item
independently, plus planted pairs whose co-purchase rate changes at known panes. The oracle is
an exact recount (collections.Counter over itertools.combinations) of each window at each pane
close, so "the exact window support first crosses min_support" is known pane by pane.
"""

from __future__ import annotations

import dataclasses
import json
import math
import random
from collections import Counter
from importlib import resources
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from generalised_oracle import catalogue_details

from streamcount.alerts.kinds import ALERT_KINDS
from streamcount.alerts.record import alert_id
from streamcount.config.settings import (
    AlertsConfig,
    Config,
    EngineConfig,
    ItemsConfig,
    RulesConfig,
)
from streamcount.intake.records import Decoded
from streamcount.pipeline import Pipeline

# An invented tea room's menu (no real products) with each item's chance to be in a basket
BACKGROUND = {
    "oat loaf": 0.12,
    "rye crackers": 0.10,
    "plum jam": 0.09,
    "earl blend": 0.11,
    "mint sprig tea": 0.08,
    "barley scone": 0.10,
    "quince paste": 0.06,
    "honey jar": 0.07,
    "pear cordial": 0.05,
    "seed bar": 0.09,
}
PAIR = ("fig tart", "lavender tea")
OTHER = ("clove bun", "saffron milk")
PANE = 1000
WINDOW = 10 * PANE

RULES = RulesConfig(min_support=0.01, min_confidence=0.3, min_lift=2.0, max_p_value=None)


def make_feed(panes: int, plants, *, seed: int) -> list[list[str]]:
    """Baskets of ``panes`` panes; ``plants`` maps an itemset to ``rate(pane) -> float``."""
    rng = random.Random(seed)
    out = []
    for j in range(panes):
        for _ in range(PANE):
            basket = [name for name, p in BACKGROUND.items() if rng.random() < p]
            for items, rate in plants.items():
                if rng.random() < rate(j):
                    basket.extend(items)
            if not basket:
                basket = ["oat loaf"]
            out.append(basket)
    return out


def config(budget: float = 1.0, *, epsilon: float = 0.0, surge: bool = True) -> Config:
    return Config(
        engine=EngineConfig(
            epsilon=epsilon,
            max_itemset_size=2,
            window_size=WINDOW,
            pane_size=PANE,
            batch_size=PANE,
        ),
        rules=RULES,
        alerts=AlertsConfig(false_alerts_per_million=budget, surge=surge),
    )


def run(baskets: list[list[str]], cfg: Config) -> tuple[Pipeline, list[dict]]:
    pipeline = Pipeline(cfg)
    alerts: list[dict] = []
    pipeline.on_alerts(alerts.extend)
    for i in range(0, len(baskets), PANE):
        pipeline.add(Decoded([list(b) for b in baskets[i : i + PANE]]))
        pipeline.check_invariants()
    return pipeline, alerts


def window_support(baskets: list[list[str]], items: tuple[str, ...], end: int) -> float:
    """Exact support of ``items`` in the window ending with transaction ``end`` (a recount)."""
    window = baskets[max(0, end - WINDOW) : end]
    hits = sum(1 for b in window if set(items) <= set(b))
    return hits / len(window)


def first_crossing(baskets, items, start_pane: int) -> int:
    """The first pane close (its last seq) at which the exact window support of ``items``
    reaches min_support, from ``start_pane`` on."""
    for j in range(start_pane, len(baskets) // PANE):
        end = (j + 1) * PANE
        if window_support(baskets, items, end) >= RULES.min_support:
            return end
    raise AssertionError("never crossed")


def mine(alerts, items, kinds=None):
    return [
        a
        for a in alerts
        if tuple(sorted(a["items"])) == tuple(sorted(items))
        and (kinds is None or a["kind"] in kinds)
    ]


# -------------------------------------------------------------------------- planted changes


@pytest.mark.parametrize("rate", [0.015, 0.02, 0.04])
def test_new_pair_emerges_within_one_pane_of_the_exact_crossing(rate):
    start = 15
    baskets = make_feed(30, {PAIR: lambda j: rate if j >= start else 0.0}, seed=int(rate * 1e4))
    _, alerts = run(baskets, config())
    crossing = first_crossing(baskets, PAIR, start)
    emerged = mine(alerts, PAIR, {"emerged"})
    assert emerged, alerts
    # one pane after the exact window support first crosses min_support, at most
    assert crossing <= emerged[0]["seq"] <= crossing + PANE, (crossing, emerged[0]["seq"])
    ev = emerged[0]["evidence"]
    assert ev["direction"] == "up"
    # the change is placed where it started (the pair did not exist before)
    assert ev["change_seq"] is not None and abs(ev["change_seq"] - (start * PANE + 1)) <= PANE
    assert ev["reference_rate"]["value"] < rate / 4 < ev["recent_rate"]["value"]
    # nothing else in this stationary background raises an alert
    assert [a for a in alerts if set(a["items"]) != set(PAIR)] == []


def test_a_stop_fades_within_two_panes():
    stop = 20
    baskets = make_feed(32, {PAIR: lambda j: 0.04 if j < stop else 0.0}, seed=5)
    pipeline, alerts = run(baskets, config())
    faded = mine(alerts, PAIR, {"faded"})
    assert len(faded) == 1, alerts
    assert stop * PANE < faded[0]["seq"] <= (stop + 2) * PANE
    # the window still holds the pair well above min_support: the recent panes decided
    assert window_support(baskets, PAIR, faded[0]["seq"]) >= RULES.min_support
    assert faded[0]["evidence"]["direction"] == "down"
    assert faded[0]["evidence"]["recent_rate"]["value"] == 0.0
    # a faded rule leaves the active list although the window still supports it
    assert all(set(r.items) != set(PAIR) for r in pipeline.monitor.active_rules)


def test_an_existing_pair_rising_alerts_within_three_panes():
    change = 20
    baskets = make_feed(32, {PAIR: lambda j: 0.03 if j >= change else 0.01}, seed=9)
    _, alerts = run(baskets, config())
    up = mine(alerts, PAIR, {"emerged", "surged"})
    assert up, alerts
    assert change * PANE < up[0]["seq"] <= (change + 3) * PANE


def test_a_rule_oscillating_around_its_threshold_at_a_constant_rate_raises_nothing():
    # the pair's true support equals min_support: its window estimate crosses the threshold
    # back and forth by sampling noise alone (sd ~ 0.001 at n = 10,000), which is no change
    baskets = make_feed(60, {PAIR: lambda j: RULES.min_support}, seed=3)
    pipeline, alerts = run(baskets, config())
    supports = [window_support(baskets, PAIR, (j + 1) * PANE) for j in range(10, 60)]
    assert min(supports) < RULES.min_support < max(supports)  # it does oscillate
    assert alerts == []
    assert pipeline.monitor.evaluations == 60


def test_warm_up_sends_nothing_and_what_is_there_is_the_starting_state():
    # the pair is there from the start: it becomes an active rule silently
    baskets = make_feed(25, {PAIR: lambda j: 0.05}, seed=11)
    pipeline, alerts = run(baskets, config())
    assert alerts == []
    assert any(set(r.items) == set(PAIR) for r in pipeline.monitor.active_rules)


def test_one_alert_per_itemset_and_family():
    # both directions of the rule (a => b, b => a) are one family: one alert
    start = 15
    baskets = make_feed(25, {PAIR: lambda j: 0.05 if j >= start else 0.0}, seed=13)
    _, alerts = run(baskets, config())
    first = [a for a in mine(alerts, PAIR) if a["kind"] == "emerged"]
    assert len(first) == 1
    pane_of = Counter((a["pane"], tuple(sorted(a["items"]))) for a in alerts)
    assert max(pane_of.values()) == 1  # never two notifications for one itemset at one close


def test_surge_of_a_new_itemset_then_emerged_keeps_the_evidence():
    # rate 0.05: 50 per pane >= surge_min_count at the first pane, a rule only some panes later
    start = 15
    baskets = make_feed(25, {PAIR: lambda j: 0.05 if j >= start else 0.0}, seed=17)
    _, alerts = run(baskets, config())
    kinds = [(a["kind"], a["seq"], tuple(a["also"])) for a in mine(alerts, PAIR)]
    seqs = {k: s for k, s, _ in kinds}
    assert "surged" in seqs or any("surged" in also for _, _, also in kinds), kinds
    assert "emerged" in seqs
    emerged = mine(alerts, PAIR, {"emerged"})[0]
    # the emerged alert still places the change at the pair's start
    assert abs(emerged["evidence"]["change_seq"] - (start * PANE + 1)) <= PANE


def test_surges_off():
    start = 15
    baskets = make_feed(25, {PAIR: lambda j: 0.05 if j >= start else 0.0}, seed=17)
    _, alerts = run(baskets, config(surge=False))
    assert {a["kind"] for a in alerts} == {"emerged"}
    assert all(a["also"] == [] for a in alerts)


def popular_feed(panes: int, start: int, *, seed: int) -> list[list[str]]:
    """The tea room where two items sell three times as well from pane ``start`` on, each
    still drawn independently of the other: their joint rate rises ninefold, their lift
    (bought together against chance) stays 1."""
    rng = random.Random(seed)
    hot = ("oat loaf", "earl blend")
    out = []
    for j in range(panes):
        for _ in range(PANE):
            basket = []
            for name, p in BACKGROUND.items():
                rate = 3 * p if j >= start and name in hot else p
                if rng.random() < rate:
                    basket.append(name)
            out.append(basket or ["seed bar"])
    return out


def exact_lift(baskets: list[list[str]], a: str, b: str) -> float:
    """Lift of the pair over ``baskets``, recounted exactly (n * c(ab) / (c(a) * c(b)))."""
    ca = sum(1 for x in baskets if a in x)
    cb = sum(1 for x in baskets if b in x)
    cab = sum(1 for x in baskets if a in x and b in x)
    return len(baskets) * cab / (ca * cb)


def test_items_that_merely_sell_more_raise_no_surge():
    # the pair's joint rate goes from about 0.013 to 0.12, but the two are bought together
    # only as often as chance would have it: a popularity change, not a co-purchase one
    start = 15
    baskets = (
        make_feed(15, {}, seed=29)[: start * PANE]
        + popular_feed(25, start, seed=29)[start * PANE :]
    )
    pair = ("earl blend", "oat loaf")
    after = baskets[start * PANE :]
    assert exact_lift(after, *pair) < 1.2  # the oracle: an exact recount of the panes since
    cfg = config()
    assert cfg.alerts.surge_min_lift == 1.5
    _, alerts = run(baskets, cfg)
    assert not mine(alerts, pair), "a popularity change alerted as a co-purchase surge"
    # with the lift floor off the same rise is a surge: the test above can fail
    loose = Config(engine=cfg.engine, rules=cfg.rules, alerts=AlertsConfig(surge_min_lift=0.0))
    _, alerts = run(baskets, loose)
    surged = mine(alerts, pair, {"surged"})
    assert surged and surged[0]["pane"] == start
    assert surged[0]["thresholds"]["surge_min_lift"] == 0.0


def test_lossy_counting_finds_the_same_changes():
    start = 15
    plants = {PAIR: lambda j: 0.04 if j >= start else 0.0, OTHER: lambda j: 0.04 if j < 22 else 0}
    baskets = make_feed(30, plants, seed=21)
    _, exact = run(baskets, config())
    _, lossy = run(baskets, config(epsilon=0.002))
    assert {(a["kind"], tuple(a["items"])) for a in lossy} == {
        (a["kind"], tuple(a["items"])) for a in exact
    }
    assert {tuple(a["items"]) for a in lossy} == {tuple(sorted(PAIR)), tuple(sorted(OTHER))}


# ---------------------------------------------------------------------------- the budget


def test_each_alert_names_the_budget_it_was_raised_under():
    start = 15
    baskets = make_feed(20, {PAIR: lambda j: 0.04 if j >= start else 0.0}, seed=23)
    _, alerts = run(baskets, config(budget=5.0))
    assert alerts
    for a in alerts:
        ev = a["evidence"]
        assert ev["budget_per_million"] == 5.0
        assert ev["tests"] >= 3  # at least one eligible itemset x three alternatives
        # ALGORITHMS-style union bound: h = ln(10^6 M / (B n)) with n = PANE
        assert ev["threshold"] == pytest.approx(math.log(1e6 * ev["tests"] / (5.0 * PANE)))
        assert ev["level"] == pytest.approx(math.exp(-ev["threshold"]))
        assert ev["statistic"] >= ev["threshold"]


def test_a_lower_budget_raises_the_threshold():
    baskets = make_feed(12, {PAIR: lambda j: 0.04}, seed=2)
    strict, _ = run(baskets, config(budget=0.01))
    loose, _ = run(baskets, config(budget=100.0))
    assert strict.monitor.budget.threshold > loose.monitor.budget.threshold


# ------------------------------------------------------------------------------- state


def test_state_round_trip_gives_the_same_alerts():
    start = 14
    plants = {PAIR: lambda j: 0.04 if j >= start else 0.0, OTHER: lambda j: 0.05 if j < 20 else 0}
    baskets = make_feed(28, plants, seed=29)
    cfg = config()
    _, whole = run(baskets, cfg)
    first = Pipeline(cfg)
    for i in range(0, 16 * PANE, PANE):
        first.add(Decoded(baskets[i : i + PANE]))
    meta, arrays = first.state()
    meta = json.loads(json.dumps(meta))  # a checkpoint stores JSON
    second = Pipeline(cfg)
    second.load_state(meta, arrays)
    second.monitor.check_invariants()
    rest: list[dict] = []
    second.on_alerts(rest.extend)
    for i in range(16 * PANE, len(baskets), PANE):
        second.add(Decoded(baskets[i : i + PANE]))
    before = [a for a in whole if a["seq"] <= 16 * PANE]
    assert [a["id"] for a in before + rest] == [a["id"] for a in whole]
    assert before + rest == whole


# ------------------------------------------------------------------------------ records


def _schema() -> dict:
    text = resources.files("streamcount").joinpath("schemas/alert.schema.json").read_text()
    return json.loads(text)


def test_records_validate_against_the_schema_and_kinds_agree():
    schema = _schema()
    assert schema["properties"]["kind"]["enum"] == list(ALERT_KINDS)
    plants = {PAIR: lambda j: 0.05 if j >= 14 else 0.0, OTHER: lambda j: 0.05 if j < 20 else 0.0}
    baskets = make_feed(28, plants, seed=31)
    _, alerts = run(baskets, config())
    assert {a["kind"] for a in alerts} == set(ALERT_KINDS)
    for a in alerts:
        jsonschema.validate(a, schema)
        json.dumps(a, allow_nan=False)
        assert "item_details" not in a  # no catalogue: records as before
        assert a["id"] == alert_id(
            a["kind"],
            a["antecedent"] if a["kind"] != "surged" else a["items"],
            a["consequent"] if a["kind"] != "surged" else [],
            a["seq"],
        )


# The tea room's catalogue: the planted pair's items as SKUs of two products (one with a
# display name holding markup and right-to-left letters: untrusted text, allowed by the file's
# rules, escaped where shown), a few background items, the rest unknown to it
TEA_ROOM_CATALOGUE = """sku,sku_name,product,product_name
fig tart,"Fig tart, slice",tarts,<b>Tarts</b> \u05e2\u05d5\u05d2\u05d4
lavender tea,,herbal tea,Herbal tea
mint sprig tea,Mint sprig tea,herbal tea,Herbal tea
oat loaf,Oat loaf,loaves,
"""


def test_records_with_a_catalogue_carry_item_details_and_validate(tmp_path: Path):
    """With a catalogue, every record names the level and display name of its items the
    catalogue knows (the file, read with the csv module by tests/generalised_oracle.py, is the
    reference); without one
    the key is absent (the records above). Both validate against the schema."""
    path = tmp_path / "catalogue.csv"
    path.write_text(TEA_ROOM_CATALOGUE, encoding="utf-8")
    facts = catalogue_details(path, ("sku", "product"))
    assert facts["tarts"]["display_name"] == "<b>Tarts</b> \u05e2\u05d5\u05d2\u05d4"
    assert facts["lavender tea"] == {"level": "sku", "display_name": None}
    cfg = dataclasses.replace(
        config(), items=ItemsConfig(catalogue=str(path), levels=("sku", "product"))
    )
    plants = {PAIR: lambda j: 0.05 if j >= 14 else 0.0, OTHER: lambda j: 0.05 if j < 20 else 0.0}
    _, alerts = run(make_feed(28, plants, seed=31), cfg)
    schema = _schema()
    assert mine(alerts, PAIR)
    # the planted pair at the product level too: tarts with herbal tea
    assert [a for a in alerts if set(a["items"]) == {"tarts", "herbal tea"}]
    # the other pair is unknown to the catalogue: an empty map, not a missing one
    assert [a["item_details"] for a in mine(alerts, OTHER)] == [{}]
    described = set()
    for a in alerts:
        jsonschema.validate(a, schema)
        expected = {name: facts[name] for name in a["items"] if name in facts}
        assert a["item_details"] == expected
        described.update(expected)
    assert {"fig tart", "lavender tea", "tarts", "herbal tea"} <= described
    # the schema refuses an entry without its level
    record = next(a for a in alerts if a["item_details"])
    name = next(iter(record["item_details"]))
    broken = {**record, "item_details": {name: {"display_name": "x"}}}
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(broken, schema)


def test_schema_refuses_a_record_without_evidence():
    schema = _schema()
    plants = {PAIR: lambda j: 0.05 if j >= 14 else 0.0}
    _, alerts = run(make_feed(20, plants, seed=37), config())
    record = dict(alerts[0])
    del record["evidence"]
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(record, schema)


def test_packed_keys_follow_a_growing_vocabulary():
    # items first seen late get ids beyond the radix of earlier panes: keys are re-packed
    start = 15
    baskets = make_feed(25, {PAIR: lambda j: 0.05 if j >= start else 0.0}, seed=41)
    assert all(PAIR[0] not in b for b in baskets[: start * PANE])
    pipeline, alerts = run(baskets, config())
    assert mine(alerts, PAIR, {"emerged"})
    assert pipeline.monitor.tracker.radix == len(pipeline.engine.vocabulary)
    bank = pipeline.monitor.tracker.banks[2]
    rows = pipeline.monitor.tracker.rows_of(bank.keys, 2)
    assert (rows < len(pipeline.engine.vocabulary)).all()
    assert np.all(np.diff(bank.keys) > 0)
