"""Engine behaviour on small hand-made streams, checkpoints, and replay_chunks end to end."""

from __future__ import annotations

import json

import pytest
from oracle import exact_counts, exact_window_counts

from streamcount.config.settings import Config, EngineConfig, RulesConfig
from streamcount.engine.engine import Engine
from streamcount.errors import ParseError
from streamcount.intake.records import Decoded
from streamcount.replay import replay_decoded


def _counts(snap) -> dict[tuple[str, ...], int]:
    return {
        tuple(sorted(snap.item_names[j] for j in row)): c
        for level in snap.levels
        for row, c in zip(level.items.tolist(), level.count.tolist(), strict=True)
    }


def _stream(n: int) -> list[list[str]]:
    """A deterministic invented-shop stream (no randomness needed)."""
    goods = ["tea", "jam", "honey", "bread", "salt", "oats"]
    return [[goods[i % 6], goods[(i * 7 + 1) % 6], goods[(i // 3) % 6]] for i in range(n)]


def test_checkpoint_of_a_fresh_engine_round_trips() -> None:
    # Regression: a checkpoint taken before the first transaction (empty vocabulary) must
    # restore. Engine.from_state(config, *Engine(config).state()) must not raise.
    config = EngineConfig(epsilon=0.1, max_itemset_size=2, window_size=20, pane_size=10)
    meta, arrays = Engine(config).state()
    restored = Engine.from_state(config, json.loads(json.dumps(meta)), arrays)
    restored.check_invariants()
    assert restored.snapshot().transactions == 0
    restored.add([["tea", "jam"]] * 10)  # one whole bucket (w = 10)
    restored.flush()
    assert _counts(restored.snapshot()) == {("tea",): 10, ("jam",): 10, ("jam", "tea"): 10}


def test_from_state_refuses_other_settings() -> None:
    config = EngineConfig(epsilon=0.1, max_itemset_size=2, window_size=20, pane_size=10)
    engine = Engine(config)
    engine.add(_stream(5))
    meta, arrays = engine.state()
    other = EngineConfig(epsilon=0.2, max_itemset_size=2, window_size=20, pane_size=10)
    with pytest.raises(ValueError, match="epsilon"):
        Engine.from_state(other, meta, arrays)


def test_rejections_by_reason() -> None:
    engine = Engine(
        EngineConfig(epsilon=0.0, max_itemset_size=2, window_size=10, pane_size=5,
                     max_basket_items=3)
    )  # fmt: skip
    result = engine.add([["tea"], [], ["a", "b", "c", "d"], ["a", "a", "b", "b", "c"], ["jam"]])
    assert [(r.index, r.reason) for r in result.rejections] == [
        (1, "empty"),
        (2, "too_many_items"),
    ]
    # 5 entries but 3 distinct items: within max_basket_items, counted as a set
    assert result.accepted == 3 and result.last_seq == 3
    engine.flush()
    snap = engine.snapshot()
    assert snap.bounds([engine.vocabulary.get("a"), engine.vocabulary.get("b")]) == (1, 1)
    assert engine.statistics().rejected == {"empty": 1, "too_many_items": 1}


def test_time_window_needs_timestamps() -> None:
    engine = Engine(
        EngineConfig(epsilon=0.0, window_seconds=20.0, pane_seconds=10.0, max_itemset_size=1)
    )
    result = engine.add([["tea"], ["jam"]], [None, 3.0])
    assert [(r.index, r.reason) for r in result.rejections] == [(0, "missing_field")]
    assert result.accepted == 1


def test_recent_and_baseline_snapshots_split_the_window() -> None:
    baskets = _stream(40)
    closes: list[int] = []
    engine = Engine(
        EngineConfig(epsilon=0.0, max_itemset_size=2, window_size=30, pane_size=10, batch_size=4),
        on_pane_closed=lambda eng: closes.append(eng.snapshot().last_seq),
    )
    assert not engine.window_full
    engine.add(baskets[:30])
    assert closes == [10, 20, 30]  # the callback sees the window right at each close
    assert engine.window_full
    engine.add(baskets[30:])
    whole = engine.snapshot()
    recent = engine.snapshot(newest=1)
    baseline = engine.snapshot(skip_newest=1)
    assert (whole.first_seq, whole.last_seq) == (11, 40)
    assert (recent.first_seq, recent.last_seq) == (31, 40)
    assert (baseline.first_seq, baseline.last_seq) == (11, 30)
    assert _counts(whole) == dict(exact_window_counts(baskets, 11, 40, 2))
    assert _counts(recent) == dict(exact_window_counts(baskets, 31, 40, 2))
    assert _counts(baseline) == dict(exact_window_counts(baskets, 11, 30, 2))


def test_statistics_describe_the_window() -> None:
    engine = Engine(
        EngineConfig(epsilon=0.25, max_itemset_size=2, window_size=16, pane_size=8, batch_size=4)
    )
    engine.add(_stream(22))
    stats = engine.statistics()
    # panes [1..8] [9..16] closed; [17..22]: 4 counted (one batch), 2 buffered
    assert stats.transactions_seen == 22
    assert stats.buffered_transactions == 2
    assert stats.window_transactions == 12  # panes 9..16 and 17..20
    assert stats.window_max_error == 2 + 1  # ceil(8/4) + ceil(4/4)
    assert stats.vocabulary_items == 6
    snap = engine.snapshot()
    assert (snap.first_seq, snap.last_seq, snap.max_error) == (9, 20, 3)


# -- replay_decoded -------------------------------------------------------------------------


def test_replay_decoded_reports_the_last_panes() -> None:
    baskets = _stream(23)
    chunks = [
        Decoded(baskets[:7], errors=[ParseError("malformed", "a bad record")]),
        Decoded([*baskets[7:15], []]),
        Decoded(baskets[15:]),
    ]
    config = Config(
        engine=EngineConfig(
            epsilon=0.0, max_itemset_size=3, window_size=10, pane_size=5, batch_size=2
        ),
        rules=RulesConfig(min_support=0.25),
    )
    result = replay_decoded(chunks, config)
    report = json.loads(json.dumps(result.report))
    # 23 accepted; newest pane holds 21..23, so the window is panes 16..20 and 21..23
    assert report["window"] == {
        "first_seq": 16,
        "last_seq": 23,
        "transactions": 8,
        "max_error": 0,
        "epsilon": 0.0,
        "pane_size": 5,
    }
    exact = exact_counts(baskets[15:23], 3)
    expected = sorted(
        ((len(k), -c, list(k)) for k, c in exact.items() if c >= 0.25 * 8),
    )
    assert [(len(s["items"]), -s["count"], s["items"]) for s in report["itemsets"]] == expected
    for s in report["itemsets"]:
        assert all(isinstance(x, str) for x in s["items"])
        assert s["upper"] == s["count"]
        assert s["support"] == pytest.approx(s["count"] / 8)
    assert report["input"] == {
        "transactions": 23,
        "rejected": {"malformed": 1, "empty": 1},
    }
