"""The engine's other entry points give what :meth:`Engine.add` gives on the same input.

``Engine.add_ids`` takes transactions already interned to ids; the reference is ``Engine.add``
on the same transactions as names, whose own guarantees the property tests check against a
brute-force recount. Compared: the window (itemset names with count and upper bound at every
pane close and at the end), the sequence numbers and every rejection with its index.
"""

from __future__ import annotations

from itertools import pairwise

import numpy as np
import pytest
from hypothesis import example, given
from hypothesis import strategies as st

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

EPSILONS = [0.0, 0.5, 0.25, 0.1]


def _window(engine: Engine) -> tuple[object, ...]:
    snap = engine.snapshot()
    rows = []
    for level in snap.levels:
        for row, c, u in zip(
            level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True
        ):
            rows.append((tuple(sorted(snap.item_names[i] for i in row)), c, u))
    return (snap.window_dict(), snap.panes, snap.first_ts, snap.last_ts, sorted(rows))


def _panes(engine: Engine) -> list[tuple[object, ...]]:
    """Every pane held, as raw arrays (item ids, f, delta per level) and positions."""
    out = []
    for idx, pane in engine.window.panes.items():
        levels = [
            (lv.items.tolist(), lv.f.tolist(), lv.delta.tolist()) for lv in pane.summary.levels
        ]
        out.append((idx, pane.closed, pane.first_seq, pane.last_seq, pane.summary.n, levels))
    return out


def _recording(config: EngineConfig) -> tuple[Engine, list[tuple[object, ...]]]:
    seen: list[tuple[object, ...]] = []
    return Engine(config, on_pane_closed=lambda e: seen.append(_window(e))), seen


@st.composite
def scenarios(draw: st.DrawFn) -> dict:
    names = [f"p{i}" for i in range(draw(st.integers(2, 6)))]
    basket = st.lists(st.sampled_from(names), min_size=0, max_size=6)  # empty, repeats allowed
    timed = draw(st.booleans())
    pane = draw(st.integers(1, 8))
    cfg = {
        "epsilon": draw(st.sampled_from(EPSILONS)),
        "max_itemset_size": draw(st.integers(1, 3)),
        "batch_size": draw(st.integers(1, 10)),
        "max_basket_items": draw(st.integers(1, 5)),
    }
    if timed:
        cfg.update(window_seconds=float(pane * 3), pane_seconds=float(pane))
        cfg["allowed_lateness_seconds"] = float(draw(st.integers(0, pane * 3 - 1)))
    else:
        cfg.update(window_size=pane * draw(st.integers(1, 3)), pane_size=pane)
    baskets = draw(st.lists(basket, max_size=60))
    times = None
    if timed:
        stamp = st.one_of(st.none(), st.integers(0, 40).map(float))
        times = draw(st.lists(stamp, min_size=len(baskets), max_size=len(baskets)))
    chunks = draw(st.lists(st.integers(1, 20), min_size=1, max_size=8))
    return {"names": names, "config": cfg, "baskets": baskets, "times": times, "chunks": chunks}


@given(scenarios())
def test_add_ids_equals_add_on_the_same_transactions(sc: dict) -> None:
    config = EngineConfig(**sc["config"])
    by_name, closes_a = _recording(config)
    by_id, closes_b = _recording(config)
    for name in sc["names"]:  # the vocabulary an id feed was decoded with
        by_id.vocabulary.encode_flat([name])
    baskets, times = sc["baskets"], sc["times"]
    lo, i = 0, 0
    while lo < len(baskets):
        hi = lo + sc["chunks"][i % len(sc["chunks"])]
        part = baskets[lo:hi]
        stamps = None if times is None else times[lo:hi]
        a = by_name.add(part, stamps)
        flat = by_id.vocabulary.encode_flat([n for b in part for n in b])
        lengths = np.array([len(b) for b in part], dtype=np.int64)
        b = by_id.add_ids(flat, lengths, stamps)
        assert (a.accepted, a.panes_closed, a.last_seq) == (b.accepted, b.panes_closed, b.last_seq)
        assert a.rejections == b.rejections
        lo, i = hi, i + 1
    assert closes_a == closes_b
    by_name.flush()
    by_id.flush()
    assert _window(by_name) == _window(by_id)
    by_id.check_invariants()


def test_add_ids_refuses_unknown_ids_and_bad_lengths() -> None:
    engine = Engine(EngineConfig(epsilon=0.0, window_size=4, pane_size=2))
    engine.vocabulary.encode_flat(["tea", "jam"])
    with pytest.raises(ValueError, match="ids must lie in"):
        engine.add_ids(np.array([0, 2]), np.array([2]))
    with pytest.raises(ValueError, match="add up to"):
        engine.add_ids(np.array([0, 1]), np.array([1]))
    assert engine.transactions_seen == 0
    result = engine.add_ids(np.array([1, 0, 1]), np.array([3, 0]))
    assert result.accepted == 1
    assert [(r.index, r.reason) for r in result.rejections] == [(1, "empty")]


@st.composite
def split_scenarios(draw: st.DrawFn) -> dict:
    names = [f"p{i}" for i in range(draw(st.integers(2, 7)))]
    pane = draw(st.integers(1, 6))
    baskets = draw(st.lists(st.lists(st.sampled_from(names), max_size=5), max_size=70))
    return {
        "config": {
            "epsilon": draw(st.sampled_from(EPSILONS)),
            "max_itemset_size": draw(st.integers(1, 3)),
            "batch_size": draw(st.integers(1, 8)),
            "max_basket_items": draw(st.integers(1, 4)),
            "pane_size": pane,
            "window_size": pane * draw(st.integers(1, 3)),
        },
        "baskets": baskets,
        "times": draw(st.lists(st.floats(0, 1e6), min_size=len(baskets), max_size=len(baskets))),
        "cuts": sorted(draw(st.sets(st.integers(1, max(len(baskets) - 1, 1)), max_size=4))),
    }


@given(split_scenarios())
@example(  # the second part meets x before y: its ids map onto the engine's out of order
    {
        "config": {
            "epsilon": 0.0,
            "max_itemset_size": 2,
            "batch_size": 2,
            "max_basket_items": 4,
            "pane_size": 2,
            "window_size": 4,
        },
        "baskets": [["y"], ["x"], ["x", "y"], ["x", "y"]],
        "times": [1.0, 2.0, 3.0, 4.0],
        "cuts": [2],
    }
)
def test_counted_panes_equal_counting_the_same_transactions(sc: dict) -> None:
    """Parts of the accepted transactions counted by separate engines (each with its own
    vocabulary, whole panes only), their panes handed over by item names with
    add_counted_pane and the pieces of panes cut by the parts added as transactions, give
    the same window at every close, the same vocabulary and the same end as one engine."""
    config = EngineConfig(**sc["config"])
    size = config.pane_size
    whole, closes_a = _recording(config)
    baskets, times = sc["baskets"], sc["times"]
    whole.add(baskets, times)
    keep, rejections = Engine(config).screen(baskets, times)
    assert [r.index for r in rejections] == sorted(set(range(len(baskets))) - set(keep.tolist()))
    accepted = [baskets[i] for i in keep.tolist()]
    stamps = [times[i] for i in keep.tolist()]

    merged, closes_b = _recording(config)
    bounds = [0, *[c for c in sc["cuts"] if c < len(accepted)], len(accepted)]
    for lo, hi in pairwise(bounds):
        # whole panes of this part: sequence numbers lo+1..hi, boundaries at multiples of size
        first = -(-lo // size) * size  # index of the first transaction of a whole pane
        last = (hi // size) * size
        worker = Engine(config)
        panes: list[tuple[object, ...]] = []

        def ship(eng: Engine, panes: list[tuple[object, ...]] = panes) -> None:
            pane = eng.window.panes[eng.window.closed_through]
            names = list(eng.vocabulary.names)
            panes.append((pane.summary.levels, names, pane.summary.n, pane.min_ts, pane.max_ts))

        worker.on_pane_closed = ship
        if first < last:
            worker.start_at(first + 1)
        # the part's names in order of first appearance, as the worker interns them
        for b in accepted[lo:hi]:
            merged.vocabulary.encode_flat(b)
        if first >= last:
            merged.add(accepted[lo:hi], stamps[lo:hi])
            continue
        worker.add(accepted[first:last], stamps[first:last])
        merged.add(accepted[lo:first], stamps[lo:first])
        for levels, names, n, t0, t1 in panes:
            result = merged.add_counted_pane(levels, names, n, min_ts=t0, max_ts=t1)
            assert result.panes_closed == 1
        merged.add(accepted[last:hi], stamps[last:hi])
    assert closes_a == closes_b
    assert list(whole.vocabulary.names) == list(merged.vocabulary.names)
    # the same ids, so every pane held is the same, array for array
    assert _panes(whole) == _panes(merged)
    whole.flush()
    merged.flush()
    assert _window(whole) == _window(merged)
    assert whole.transactions_seen == merged.transactions_seen
    merged.check_invariants()


def test_add_counted_pane_refuses_a_pane_out_of_place() -> None:
    config = EngineConfig(epsilon=0.0, window_size=4, pane_size=2, max_itemset_size=1)
    worker = Engine(config)
    worker.add([["tea"], ["jam"]])
    levels = worker.window.panes[0].summary.levels
    names = list(worker.vocabulary.names)
    engine = Engine(config)
    engine.add([["tea"]])  # mid-pane: the next transaction is not at a pane boundary
    with pytest.raises(ValueError, match="pane boundary"):
        engine.add_counted_pane(levels, names, 2)
    with pytest.raises(ValueError, match="pane boundary"):
        Engine(config).add_counted_pane(levels, names, 3)
    timed = EngineConfig(epsilon=0.0, window_seconds=4.0, pane_seconds=2.0)
    with pytest.raises(ValueError, match="count-based"):
        Engine(timed).add_counted_pane(levels, names, 2)
