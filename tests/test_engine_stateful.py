"""Stateful test of the engine against a naive model (hypothesis RuleBasedStateMachine).

The model is the list of accepted transactions; the window's exact counts are recounted from
it by brute force (tests/oracle.py). Checkpoints go through ``Engine.state()`` ->
JSON (manifest) + ``np.savez``/``np.load(allow_pickle=False)`` (arrays) -> ``Engine.from_state``,
and afterwards every estimate must be identical to the engine that was saved.
"""

from __future__ import annotations

import io
import json

import numpy as np
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, rule
from oracle import assert_snapshot_bounds, exact_window_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

_NAMES = ["tea", "jam", "honey", "bread", "salt"]  # invented shop items
_basket = st.lists(st.sampled_from(_NAMES), min_size=1, max_size=5)


def _snapshot_key(engine: Engine) -> tuple:
    """Everything a snapshot reports, as plain values (for identity checks)."""
    snap = engine.snapshot()
    levels = tuple((lv.items.tolist(), lv.count.tolist(), lv.upper.tolist()) for lv in snap.levels)
    return (
        snap.first_seq,
        snap.last_seq,
        snap.transactions,
        snap.max_error,
        snap.panes,
        levels,
        tuple(snap.item_names),
    )


def _round_trip(engine: Engine, config: EngineConfig) -> Engine:
    meta, arrays = engine.state()
    meta = json.loads(json.dumps(meta))
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    buf.seek(0)
    with np.load(buf, allow_pickle=False) as npz:
        loaded = {name: npz[name] for name in npz.files}
    return Engine.from_state(config, meta, loaded)


class EngineMachine(RuleBasedStateMachine):
    @initialize(
        epsilon=st.sampled_from([0.0, 0.5, 0.25, 0.1]),
        max_itemset_size=st.integers(1, 3),
        pane_size=st.integers(1, 8),
        window_panes=st.integers(1, 3),
        batch_size=st.integers(1, 10),
    )
    def setup(
        self,
        epsilon: float,
        max_itemset_size: int,
        pane_size: int,
        window_panes: int,
        batch_size: int,
    ) -> None:
        self.config = EngineConfig(
            epsilon=epsilon,
            max_itemset_size=max_itemset_size,
            window_size=pane_size * window_panes,
            pane_size=pane_size,
            batch_size=batch_size,
        )
        self.engine = Engine(self.config)
        self.model: list[list[str]] = []  # accepted transactions, seq = index + 1
        self.flushed = True

    @rule(baskets=st.lists(st.one_of(_basket, st.just([])), max_size=12))
    def add(self, baskets: list[list[str]]) -> None:
        result = self.engine.add(baskets)
        empty = [i for i, b in enumerate(baskets) if not b]
        assert [(r.index, r.reason) for r in result.rejections] == [(i, "empty") for i in empty]
        self.model.extend(b for b in baskets if b)
        assert result.accepted == len(baskets) - len(empty)
        assert result.last_seq == len(self.model)
        self.flushed = False

    @rule(basket=_basket)
    def close_pane(self, basket: list[str]) -> None:
        size = self.config.pane_size
        fill = size - len(self.model) % size
        result = self.engine.add([basket] * fill)
        self.model.extend([basket] * fill)
        assert result.panes_closed == 1
        # a pane close counts the whole pane: everything accepted so far is counted
        assert self.engine.snapshot().last_seq == len(self.model)
        self.flushed = True

    @rule()
    def flush(self) -> None:
        self.engine.flush()
        self.flushed = True

    @rule()
    def checkpoint_round_trip(self) -> None:
        before = _snapshot_key(self.engine)
        stats = self.engine.statistics()
        restored = _round_trip(self.engine, self.config)
        restored.check_invariants()
        assert _snapshot_key(restored) == before
        after = restored.statistics()
        for name in (
            "transactions_seen",
            "rejected",
            "window_transactions",
            "window_max_error",
            "tracked_itemsets",
            "live_panes",
            "held_bytes",
            "buffered_transactions",
        ):
            assert getattr(after, name) == getattr(stats, name), name
        # both continue identically on the same input
        probe = [["tea", "jam"], ["jam"], ["honey", "tea", "jam"]]
        twin = _round_trip(self.engine, self.config)
        self.engine.add(probe)
        twin.add(probe)
        assert _snapshot_key(twin) == _snapshot_key(self.engine)
        restored.add(probe)
        self.model.extend(probe)
        assert _snapshot_key(restored) == _snapshot_key(self.engine)
        self.engine = restored
        self.flushed = False

    @invariant()
    def bounds_hold(self) -> None:
        if not hasattr(self, "engine"):
            return
        self.engine.check_invariants()
        snap = self.engine.snapshot()
        k = self.config.max_itemset_size
        assert snap.last_seq <= len(self.model)
        if self.flushed:
            assert snap.last_seq == len(self.model)
        if snap.transactions:
            assert snap.last_seq - snap.first_seq + 1 == snap.transactions
        exact = exact_window_counts(self.model, snap.first_seq, snap.last_seq, k)
        assert_snapshot_bounds(snap, exact, k, supports=[0.3, 0.6])
        if self.config.epsilon == 0:
            got = {
                tuple(sorted(snap.item_names[j] for j in row)): c
                for level in snap.levels
                for row, c in zip(level.items.tolist(), level.count.tolist(), strict=True)
            }
            assert got == dict(exact)


TestEngineMachine = EngineMachine.TestCase
