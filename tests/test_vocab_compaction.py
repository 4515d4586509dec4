"""Item names the window no longer uses are released: the name table is bounded by the window,
and nothing a reader sees changes (counts, rules, alerts, checkpoints, older snapshots).

The oracle is the same engine with compaction switched off, and an exact recount of the window.
"""

from __future__ import annotations

import json
import random

import numpy as np
import pytest
from oracle import exact_window_counts

import streamcount.engine.engine as engine_module
from streamcount.config.settings import AlertsConfig, Config, EngineConfig, RulesConfig
from streamcount.engine.engine import Engine
from streamcount.intake.records import Decoded
from streamcount.pipeline import Pipeline


def churning_baskets(n: int, seed: int, *, fresh_every: int = 3) -> list[list[str]]:
    """Baskets of a few steady items plus item names that keep changing (new SKUs all the
    time, as in a shop whose catalogue turns over)."""
    rng = random.Random(seed)
    steady = [f"steady-{i}" for i in range(12)]
    out = []
    for t in range(n):
        basket = rng.sample(steady, rng.randint(1, 4))
        if t % fresh_every == 0:
            basket.append(f"seasonal-{t}")  # seen once, never again
        if rng.random() < 0.05:
            basket += ["steady-0", "steady-1"]
        out.append(basket)
    return out


def _table(snap):
    return {
        tuple(sorted(snap.item_names[i] for i in row)): (int(c), int(u))
        for level in snap.levels
        for row, c, u in zip(level.items.tolist(), level.count, level.upper, strict=True)
    }


@pytest.mark.parametrize("epsilon", [0.0, 0.01])
def test_compaction_bounds_the_names_and_changes_no_count(epsilon, monkeypatch):
    cfg = EngineConfig(
        epsilon=epsilon, max_itemset_size=2, window_size=2000, pane_size=500, batch_size=500
    )
    baskets = churning_baskets(30_000, seed=4)
    monkeypatch.setattr(engine_module, "COMPACT_MIN_RELEASED", 100)
    compacting = Engine(cfg)
    sizes = []
    for i in range(0, len(baskets), 700):
        compacting.add(baskets[i : i + 700])
        compacting.check_invariants()
        sizes.append(len(compacting.vocabulary))
    monkeypatch.setattr(engine_module, "COMPACT_MIN_RELEASED", 10**12)
    plain = Engine(cfg)
    for i in range(0, len(baskets), 700):
        plain.add(baskets[i : i + 700])
    # 10,000 one-off names went through the feed; the table holds what the panes hold
    assert len(plain.vocabulary) > 10_000
    assert max(sizes[10:]) < 2 * 12 + 2 * 5 * 500 // 3  # steady items + ~2 windows of names
    a, b = compacting.fresh_snapshot(), plain.fresh_snapshot()
    assert (a.first_seq, a.last_seq, a.transactions, a.max_error) == (
        b.first_seq,
        b.last_seq,
        b.transactions,
        b.max_error,
    )
    assert _table(a) == _table(b)
    exact = exact_window_counts(baskets, a.first_seq, a.last_seq, 2)
    for items, (count, upper) in _table(a).items():
        assert count <= exact[items] <= upper


def test_a_snapshot_taken_before_keeps_its_names():
    cfg = EngineConfig(epsilon=0.0, max_itemset_size=2, window_size=1000, pane_size=500)
    eng = Engine(cfg)
    eng.add([["old-a", "old-b"]] * 500)
    before = eng.snapshot()
    eng.add([["new-c"]] * 1500)
    mapping = eng.compact_vocabulary(force=True)
    assert mapping is not None and mapping[0] == -1  # old-a is gone from every pane
    assert list(before.item_names[:2]) == ["old-a", "old-b"]
    assert _table(before)[("old-a", "old-b")] == (500, 500)
    assert "old-a" not in eng.vocabulary.names


def test_alerts_and_checkpoints_are_the_same_with_compaction(monkeypatch):
    rng = random.Random(8)
    baskets = churning_baskets(40_000, seed=9, fresh_every=2)
    for t in range(20_000, 40_000):
        if rng.random() < 0.05:
            baskets[t] = [*baskets[t], "fig-tart", "lavender-tea"]  # a new pair appears
    cfg = Config(
        engine=EngineConfig(
            epsilon=0.0, max_itemset_size=2, window_size=4000, pane_size=1000, batch_size=1000
        ),
        rules=RulesConfig(min_support=0.01, min_lift=2.0, max_p_value=None),
        alerts=AlertsConfig(false_alerts_per_million=10.0),
    )

    def run(minimum: int, *, restart_at: int | None = None) -> tuple[list[dict], Pipeline]:
        monkeypatch.setattr(engine_module, "COMPACT_MIN_RELEASED", minimum)
        pipe = Pipeline(cfg)
        alerts: list[dict] = []
        pipe.on_alerts(alerts.extend)
        for i in range(0, len(baskets), 1000):
            if restart_at is not None and i == restart_at:
                meta, arrays = pipe.state()
                pipe = Pipeline(cfg)
                pipe.load_state(json.loads(json.dumps(meta)), arrays)
                pipe.on_alerts(alerts.extend)
            pipe.add(Decoded(baskets[i : i + 1000]))
            pipe.check_invariants()
            pipe.monitor.check_invariants()
        return alerts, pipe

    plain, plain_pipe = run(10**12)
    compacted, pipe = run(50)
    restarted, _ = run(50, restart_at=27_000)
    assert [a["kind"] for a in plain if "fig-tart" in a["items"]]  # the change is found
    assert compacted == plain == restarted
    assert len(pipe.engine.vocabulary) < len(plain_pipe.engine.vocabulary) / 4
    tracker = pipe.monitor.tracker
    assert tracker.radix == len(pipe.engine.vocabulary)
    for size, bank in tracker.banks.items():
        rows = tracker.rows_of(bank.keys, size)
        assert (rows < len(pipe.engine.vocabulary)).all()
        assert np.all(np.diff(bank.keys) > 0)
