"""The engine's other entry points give what :meth:`Engine.add` gives on the same input.

``Engine.add_ids`` takes transactions already interned to ids; the reference is ``Engine.add``
on the same transactions as names, whose own guarantees the property tests check against a
brute-force recount. Compared: the window (itemset names with count and upper bound at every
pane close and at the end), the sequence numbers and every rejection with its index.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
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
    return (snap.window_dict(), snap.panes, sorted(rows))


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
