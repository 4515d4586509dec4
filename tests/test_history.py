"""The history behind /v1/history and the page's chart: its bound, its eviction rule, its values
against a brute-force recount, and its checkpoint round trip.

Oracle: ``tests/oracle.py`` recounts each window at each pane close by set containment (no
streamcount code). The bound and the eviction rule are checked against a plain-list model of
the documented rule (oldest pane close first, with all its points) under Hypothesis.
"""

from __future__ import annotations

import random
from itertools import combinations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oracle import count_itemset

from streamcount.config.settings import EngineConfig, RulesConfig
from streamcount.engine.engine import Engine
from streamcount.errors import CheckpointError
from streamcount.rules.derive import derive_rules
from streamcount.service.history import HistoryStore

ITEMS = ("tea", "jam", "scone", "cream", "oat", "fig")


def _baskets(n: int, seed: int) -> list[list[str]]:
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        basket = rng.sample(ITEMS, rng.randint(1, 4))
        if rng.random() < 0.3:
            basket = sorted(set(basket) | {"tea", "scone"})
        out.append(basket)
    return out


def _run(
    baskets: list[list[str]],
    store: HistoryStore,
    follow: list[tuple[str, ...]],
    *,
    epsilon: float = 0.0,
    pane: int = 10,
    window: int = 40,
) -> list[tuple[int, int, int]]:
    """Count ``baskets`` with pane closes recorded in ``store``; returns (close, first_seq,
    last_seq) of each close."""
    closes: list[tuple[int, int, int]] = []

    def on_close(engine: Engine) -> None:
        snap = engine.snapshot()
        closes.append((len(closes) + 1, snap.first_seq, snap.last_seq))
        store.record(len(closes), snap, active=follow, pane=engine.last_closed.index)
        store.check_invariants()

    cfg = EngineConfig(
        epsilon=epsilon, window_size=window, pane_size=pane, batch_size=pane, max_itemset_size=3
    )
    engine = Engine(cfg, on_pane_closed=on_close)
    engine.add(baskets)
    return closes


@pytest.mark.parametrize("epsilon", [0.0, 0.1])
def test_points_bound_the_exact_window_count(epsilon: float) -> None:
    baskets = _baskets(300, seed=3)
    follow = [("scone", "tea"), ("jam", "tea"), ("cream", "oat", "tea"), ("fig",)]
    store = HistoryStore(max_points=10_000, alerted_closes=5)
    closes = _run(baskets, store, follow, epsilon=epsilon)
    assert len(closes) == 30
    view = store.view
    for items in follow:
        points = view.points_of(items)
        assert [p["pane_close"] for p in points] == [c for c, _, _ in closes]
        for p, (_, first, last) in zip(points, closes, strict=True):
            assert (p["first_seq"], p["last_seq"]) == (first, last)
            exact = count_itemset(baskets[first - 1 : last], items)
            low, high = p["count"]["low"], p["count"]["high"]
            assert low <= exact <= high, (items, p)
            if epsilon == 0.0:
                assert low == high == exact
            n = p["transactions"]
            assert n == last - first + 1
            assert p["support"] == {"value": low / n, "low": low / n, "high": high / n}
            assert high - low <= p["max_error"]


def test_support_band_is_never_wider_than_a_rules() -> None:
    """The band's high end is tightened by every subset: never above the support interval's
    high end of any rule over the same itemset, and the point value is the rule's."""
    baskets = _baskets(400, seed=11)
    rules_config = RulesConfig(
        min_support=0.05, min_confidence=0.1, min_lift=0.0, min_count=5, max_p_value=None
    )
    store = HistoryStore(max_points=10_000, alerted_closes=0)
    checked = 0

    def on_close(engine: Engine) -> None:
        nonlocal checked
        snap = engine.snapshot()
        rules = derive_rules(snap, rules_config)
        store.record(engine.last_closed.index + 1, snap, active=[r.items for r in rules])
        view = store.view
        for r in rules:
            point = view.points_of(r.items)[-1]
            assert point["support"]["value"] == pytest.approx(r.support.value, rel=1e-12)
            assert point["support"]["high"] <= r.support.high * (1 + 1e-12)
            checked += 1

    cfg = EngineConfig(epsilon=0.05, window_size=100, pane_size=20, batch_size=20)
    Engine(cfg, on_pane_closed=on_close).add(baskets)
    assert checked > 50


@settings(max_examples=60, deadline=None)
@given(
    cap=st.integers(min_value=1, max_value=40),
    follows=st.lists(
        st.lists(st.sampled_from(list(combinations(ITEMS, 2))), max_size=5, unique=True),
        min_size=1,
        max_size=25,
    ),
)
def test_cap_and_eviction_follow_the_documented_rule(cap: int, follows: list) -> None:
    """At most ``cap`` points and ``cap`` pane closes; the oldest pane close goes first with
    all its points; a single close over the cap keeps its first ``cap`` itemsets."""
    baskets = _baskets(10 * len(follows), seed=len(follows))
    store = HistoryStore(max_points=cap, alerted_closes=0)
    model: list[tuple[int, list[tuple[str, ...]]]] = []  # (close, itemsets recorded)
    per_close = iter(enumerate(follows, start=1))

    def on_close(engine: Engine) -> None:
        close, chosen = next(per_close)
        follow = [tuple(sorted(f)) for f in chosen]
        store.record(close, engine.snapshot(), active=follow)
        store.check_invariants()
        model.append((close, follow[:cap]))
        while len(model) > 1 and (sum(len(f) for _, f in model) > cap or len(model) > cap):
            model.pop(0)
        view = store.view
        assert view.points <= cap
        assert [int(c) for c in view.meta["close"]] == [c for c, _ in model]
        expected: dict[tuple[str, ...], list[int]] = {}
        for c, f in model:
            for items in f:
                expected.setdefault(items, []).append(c)
        held = {k: [int(c) for c in v[0]] for k, v in view.series.items()}
        assert held == expected

    cfg = EngineConfig(epsilon=0.0, window_size=20, pane_size=10, batch_size=10)
    Engine(cfg, on_pane_closed=on_close).add(baskets)
    assert len(model) >= 1


def test_alerted_itemsets_are_followed_for_alerted_closes_then_forgotten() -> None:
    store = HistoryStore(max_points=100, alerted_closes=2)
    cfg = EngineConfig(epsilon=0.0, window_size=20, pane_size=10, batch_size=10)
    engine = Engine(cfg)
    engine.add(_baskets(20, seed=1))
    snap = engine.snapshot()
    store.record(1, snap, active=[], alerted=[("scone", "tea")])
    for close in (2, 3):
        store.record(close, snap, active=[])
        assert ("scone", "tea") in store.view.followed
    store.record(4, snap, active=[])
    assert ("scone", "tea") not in store.view.followed
    assert [p["pane_close"] for p in store.view.points_of(["tea", "scone"])] == [1, 2, 3]
    assert store.view.points_of(["tea", "scone"], since=2)[0]["pane_close"] == 3
    # an itemset never followed, or named with an unknown item, has no history
    assert store.view.points_of(["jam", "oat"]) == []
    store.record(5, snap, active=[("never-sold", "tea")])
    assert [p["count"] for p in store.view.points_of(["tea", "never-sold"])] == [
        {"low": 0, "high": 0}
    ]


def test_a_gap_in_pane_closes_starts_the_history_again() -> None:
    store = HistoryStore(max_points=100, alerted_closes=0)
    engine = Engine(EngineConfig(epsilon=0.0, window_size=20, pane_size=10, batch_size=10))
    engine.add(_baskets(20, seed=2))
    snap = engine.snapshot()
    store.record(1, snap, active=[("scone", "tea")])
    store.record(2, snap, active=[("scone", "tea")])
    store.record(7, snap, active=[("scone", "tea")])
    assert [int(c) for c in store.view.meta["close"]] == [7]
    store.check_invariants()


def test_checkpoint_round_trip_and_a_smaller_cap_on_restore() -> None:
    store = HistoryStore(max_points=1000, alerted_closes=3)
    follow = [("scone", "tea"), ("cream", "jam"), ("fig", "oat", "tea")]
    _run(_baskets(200, seed=5), store, follow, epsilon=0.1)
    meta, arrays = store.state()
    again = HistoryStore(max_points=1000, alerted_closes=3)
    again.load_state(meta, arrays)
    again.check_invariants()
    for items in follow:
        assert again.view.points_of(items) == store.view.points_of(items)
    assert again.view.followed == store.view.followed
    # restored under a smaller cap: the oldest pane closes go
    small = HistoryStore(max_points=9, alerted_closes=3)
    small.load_state(meta, arrays)
    small.check_invariants()
    assert small.view.points == 9
    assert [int(c) for c in small.view.meta["close"]] == [18, 19, 20]
    # the next close continues the series
    engine = Engine(EngineConfig(epsilon=0.0, window_size=40, pane_size=10, batch_size=10))
    engine.add(_baskets(40, seed=6))
    small.record(21, engine.snapshot(), active=follow)
    assert [p["pane_close"] for p in small.view.points_of(("scone", "tea"))] == [19, 20, 21]


def test_a_malformed_history_state_is_refused() -> None:
    store = HistoryStore(max_points=100, alerted_closes=0)
    _run(_baskets(50, seed=4), store, [("scone", "tea")])
    meta, arrays = store.state()
    with pytest.raises(CheckpointError, match="version"):
        HistoryStore(100, 0).load_state({**meta, "version": 0}, arrays)
    broken = dict(arrays)
    broken["history.low"] = np.zeros(1, dtype=np.int64)
    with pytest.raises(CheckpointError, match="malformed"):
        HistoryStore(100, 0).load_state(meta, broken)


def test_views_handed_out_never_change() -> None:
    """A reader's view stays as it was while the loop records more pane closes."""
    store = HistoryStore(max_points=12, alerted_closes=0)
    engine = Engine(EngineConfig(epsilon=0.0, window_size=20, pane_size=10, batch_size=10))
    engine.add(_baskets(20, seed=8))
    snap = engine.snapshot()
    store.record(1, snap, active=[("scone", "tea"), ("jam", "tea")])
    old = store.view
    before = old.points_of(("scone", "tea"))
    for close in range(2, 40):
        store.record(close, snap, active=[("scone", "tea"), ("jam", "tea")])
    assert old.points_of(("scone", "tea")) == before
    with pytest.raises(ValueError):
        old.series[("scone", "tea")][1][0] = 99
