"""Rule derivation from window snapshots built from brute-force counts of small baskets."""

from __future__ import annotations

import dataclasses
import random
from collections import Counter
from itertools import combinations

import numpy as np
import pytest

from streamcount.config.settings import RulesConfig
from streamcount.engine.snapshot import LevelCounts, WindowSnapshot
from streamcount.rules.derive import Rule, derive_rules, joint_count_threshold, measure_rules


def make_snapshot(
    transactions: list[set[str]],
    *,
    max_size: int = 3,
    slack: int = 0,
    rng: random.Random | None = None,
    names: list[str] | None = None,
) -> WindowSnapshot:
    """Exact brute-force counts; with ``slack`` > 0 each bound is moved out by up to slack."""
    names = names or sorted({i for t in transactions for i in t})
    ids = {n: i for i, n in enumerate(names)}
    levels = []
    for k in range(1, max_size + 1):
        c = Counter()
        for t in transactions:
            c.update(combinations(sorted(ids[i] for i in t), k))
        rows = sorted(c)
        count = np.array([c[r] for r in rows], dtype=np.int64)
        upper = count.copy()
        if slack and rng is not None:
            for j in range(len(rows)):
                count[j] = max(0, count[j] - rng.randint(0, slack))
                upper[j] = upper[j] + rng.randint(0, slack)
        items = np.array(rows, dtype=np.int32).reshape(len(rows), k)
        levels.append(LevelCounts(k, items, count, upper))
    n = len(transactions)
    return WindowSnapshot(1, n, n, 2 * slack, 0.0, None, 1, tuple(levels), names)


# Han, Kamber & Pei, Data Mining: Concepts and Techniques, 3rd ed. (2012), ch. 6, Table 6.1
HKP = [
    {"I1", "I2", "I5"},
    {"I2", "I4"},
    {"I2", "I3"},
    {"I1", "I2", "I4"},
    {"I1", "I3"},
    {"I2", "I3"},
    {"I1", "I3"},
    {"I1", "I2", "I3", "I5"},
    {"I1", "I2", "I3"},
]

# Tan, Steinbach & Kumar, Introduction to Data Mining (2005), ch. 6, Table 6.1
TSK = [
    {"Bread", "Milk"},
    {"Bread", "Diapers", "Beer", "Eggs"},
    {"Milk", "Diapers", "Beer", "Cola"},
    {"Bread", "Milk", "Diapers", "Beer"},
    {"Bread", "Milk", "Diapers", "Cola"},
]

OPEN = dict(min_support=0.0, min_confidence=0.0, min_lift=0.0, max_p_value=None)


def by_key(rules: list[Rule]) -> dict[tuple[tuple[str, ...], tuple[str, ...]], Rule]:
    return {r.key: r for r in rules}


def test_han_kamber_pei_rules_from_i1_i2_i5():
    # Example 6.4 of the book: the six rules from {I1, I2, I5} and their confidences
    snap = make_snapshot(HKP)
    cfg = RulesConfig(**OPEN, max_consequent_size=2, min_count=2)
    rules = by_key(derive_rules(snap, cfg))
    expected = {
        (("I1", "I2"), ("I5",)): 0.50,
        (("I1", "I5"), ("I2",)): 1.00,
        (("I2", "I5"), ("I1",)): 1.00,
        (("I1",), ("I2", "I5")): 2 / 6,  # 33.3 %
        (("I2",), ("I1", "I5")): 2 / 7,  # 28.6 %
        (("I5",), ("I1", "I2")): 1.00,
    }
    for key, conf in expected.items():
        assert rules[key].confidence.value == pytest.approx(conf)
        assert rules[key].support.value == pytest.approx(2 / 9)
        assert rules[key].joint_count.low == rules[key].joint_count.high == 2
    # at min_conf 70 % three rules from {I1, I2, I5} survive (the 100 % ones)
    strict = RulesConfig(**{**OPEN, "min_confidence": 0.7}, max_consequent_size=2, min_count=2)
    kept = {k for k in by_key(derive_rules(snap, strict)) if set(k[0] + k[1]) == {"I1", "I2", "I5"}}
    assert kept == {k for k, c in expected.items() if c >= 0.7}
    assert len(kept) == 3


def test_consequent_size_limit():
    snap = make_snapshot(HKP)
    cfg = RulesConfig(**OPEN, max_consequent_size=1, min_count=2)
    assert all(len(r.consequent) == 1 for r in derive_rules(snap, cfg))


def test_tan_steinbach_kumar_milk_diapers_beer():
    snap = make_snapshot(TSK)
    cfg = RulesConfig(**OPEN, max_consequent_size=2, min_count=1)
    rules = by_key(derive_rules(snap, cfg))
    r = rules[(("Diapers", "Milk"), ("Beer",))]
    assert r.support.value == pytest.approx(0.4)  # published: s = 0.4
    assert r.confidence.value == pytest.approx(2 / 3)  # published: c = 0.67
    assert r.lift.value == pytest.approx(1.11, abs=0.005)  # computed, not published
    # the six rules from {Milk, Diapers, Beer}, s = 0.4 each (book lists them, from memory)
    six = {
        (("Beer", "Diapers"), ("Milk",)): 0.67,
        (("Beer", "Milk"), ("Diapers",)): 1.0,
        (("Diapers", "Milk"), ("Beer",)): 0.67,
        (("Beer",), ("Diapers", "Milk")): 0.67,
        (("Diapers",), ("Beer", "Milk")): 0.5,
        (("Milk",), ("Beer", "Diapers")): 0.5,
    }
    for key, conf in six.items():
        assert rules[key].confidence.value == pytest.approx(conf, abs=0.005)
        assert rules[key].support.value == pytest.approx(0.4)


def test_filters_and_order_against_brute_force():
    rng = random.Random(3)
    items = [f"p{i}" for i in range(8)]
    baskets = [set(rng.sample(items, rng.randint(1, 4))) for _ in range(300)]
    snap = make_snapshot(baskets)
    cfg = RulesConfig(
        min_support=0.03, min_confidence=0.3, min_lift=1.05, max_p_value=None, min_count=5
    )
    got = derive_rules(snap, cfg)
    # brute force: every rule with a one-item consequent over itemsets of size 2..3
    expected = set()
    n = len(baskets)
    for k in (2, 3):
        for z in combinations(items, k):
            a = sum(set(z) <= t for t in baskets)
            if a < 5 or a / n < 0.03:
                continue
            for y in z:
                x = tuple(i for i in z if i != y)
                r = sum(set(x) <= t for t in baskets)
                q = sum(y in t for t in baskets)
                if a / r >= 0.3 and n * a / (r * q) >= 1.05:
                    expected.add((x, (y,)))
    assert {r.key for r in got} == expected
    lifts = [r.lift.low for r in got]
    assert lifts == sorted(lifts, reverse=True)
    capped = derive_rules(snap, dataclasses.replace(cfg, max_rules=3))
    assert [r.key for r in capped] == [r.key for r in got[:3]]


def test_conservative_intervals_with_slack():
    rng = random.Random(11)
    items = [f"p{i}" for i in range(6)]
    baskets = [set(rng.sample(items, rng.randint(1, 3))) for _ in range(400)]
    baskets += [{"p0", "p1"}] * 60
    exact_snap = make_snapshot(baskets)
    loose = make_snapshot(baskets, slack=3, rng=random.Random(5))
    exact_rules = by_key(derive_rules(exact_snap, RulesConfig(**OPEN, min_count=1)))
    loose_rules = derive_rules(loose, RulesConfig(**OPEN, min_count=1))
    assert len(loose_rules) > 20
    for rule in loose_rules:
        true = exact_rules[rule.key]
        # every interval holds the exact value
        for name in ("support", "confidence", "lift", "leverage", "conviction"):
            assert rule.measure(name).interval.contains(true.measure(name).value), name
    # conservative: the lift filter is on the low end, so the exact lift passes too
    strict = derive_rules(loose, RulesConfig(**{**OPEN, "min_lift": 1.1}, min_count=1))
    assert {r.key for r in strict} == {(("p0",), ("p1",)), (("p1",), ("p0",))}
    for rule in strict:
        assert rule.lift.low >= 1.1 and exact_rules[rule.key].lift.value >= 1.1
    # non-conservative: judged on the point value, which may pass where the low end does not
    point = derive_rules(
        loose, RulesConfig(**{**OPEN, "min_lift": 1.02, "conservative": False}, min_count=1)
    )
    assert all(r.lift.value >= 1.02 for r in point)
    assert any(r.lift.low < 1.02 for r in point)
    # default joint count threshold: 10 x max_error
    assert joint_count_threshold(loose, RulesConfig()) == 10 * loose.max_error
    assert all(r.joint_count.low >= 60 for r in derive_rules(loose, RulesConfig(**OPEN)))


def test_significance_filter():
    rng = random.Random(2)
    items = [f"p{i}" for i in range(6)]
    baskets = [set(rng.sample(items, 2)) for _ in range(500)]
    baskets += [{"tea", "scone"}] * 40 + [{"tea"}] * 20 + [{"scone"}] * 20
    snap = make_snapshot(baskets, max_size=2)
    cfg = RulesConfig(**{**OPEN, "max_p_value": 1e-6}, min_count=5)
    rules = derive_rules(snap, cfg)
    assert {r.key for r in rules} == {(("scone",), ("tea",)), (("tea",), ("scone",))}
    assert all(r.p_value is not None and r.p_value <= 1e-6 for r in rules)
    chi = derive_rules(snap, RulesConfig(**{**OPEN, "max_p_value": 1e-6, "significance": "chi2"}))
    assert {r.key for r in chi} == {r.key for r in rules}


def test_measure_rules_and_round_trip():
    snap = make_snapshot(TSK)
    got = measure_rules(snap, [(("Milk", "Diapers"), ("Beer",)), (("Unknown",), ("Beer",))])
    assert got[0].confidence.value == pytest.approx(2 / 3)
    assert got[1].joint_count.low == 0
    rule = derive_rules(snap, RulesConfig(**OPEN, min_count=1))[0]
    assert Rule.from_dict(rule.as_dict()) == rule


def test_empty_snapshot():
    snap = make_snapshot([])
    assert derive_rules(snap, RulesConfig()) == []
