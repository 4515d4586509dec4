"""Panes merged from workers' summaries (engine.merged, Engine.add_merged_pane).

A feed is split into disjoint parts (as workers split it by order id), each part counted by its
own engine with the same settings; every closed pane travels through the wire format
(``encode_pane``/``decode_pane``) and the panes of one index are merged. References: a single
engine over the whole feed (exact mode: equal itemset by itemset) and brute-force recounts
(tests/oracle.py) for the Lossy Counting bounds, with ``max_error`` the sum of the parts'
bounds (the pane-sum rule, Manku & Motwani 2002 summed over parts).
"""

from __future__ import annotations

import math
import random
from collections.abc import Sequence

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oracle import assert_snapshot_bounds, exact_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.counters import Level
from streamcount.engine.engine import Engine
from streamcount.engine.merged import MergedSummary, PanePart, merge_parts
from streamcount.engine.pane import Pane
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.engine.wire import PaneMeta, decode_pane, encode_pane

PANE_SECONDS = 10.0
#: the feeds' events lie in [0, 8 panes): at this watermark every pane of them is closed
END = 8 * PANE_SECONDS


def _table(snap: WindowSnapshot) -> dict[tuple[str, ...], tuple[int, int]]:
    out = {}
    for level in snap.levels:
        rows = zip(level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True)
        for row, c, u in rows:
            out[tuple(sorted(snap.item_names[i] for i in row))] = (c, u)
    return out


def _config(epsilon: float, k: int, window_panes: int, batch: int = 7) -> EngineConfig:
    return EngineConfig(
        epsilon=epsilon,
        max_itemset_size=k,
        window_seconds=PANE_SECONDS * window_panes,
        pane_seconds=PANE_SECONDS,
        batch_size=batch,
    )


def _worker_panes(
    config: EngineConfig, baskets: Sequence[Sequence[str]], ts: Sequence[float], worker: str
) -> dict[int, tuple[PaneMeta, tuple[Level, ...], list[str]]]:
    """Every pane one worker closes, through the wire format."""
    out = {}

    def closed(engine: Engine) -> None:
        pane = engine.last_closed
        assert pane is not None
        meta = PaneMeta(
            pane.index,
            pane.counted,
            engine.epsilon,
            engine.max_itemset_size,
            "f",
            "none",
            pane.min_ts,
            pane.max_ts,
            worker,
        )
        out[pane.index] = decode_pane(encode_pane(pane.summary, engine.vocabulary.names, meta))

    engine = Engine(config, on_pane_closed=closed)
    for lo in range(0, len(baskets), 13):
        engine.add(baskets[lo : lo + 13], ts[lo : lo + 13])
    engine.advance_watermark(END)  # every pane closes
    return out


def _merged_engine(
    config: EngineConfig, parts: Sequence[dict[int, tuple[PaneMeta, tuple[Level, ...], list[str]]]]
) -> Engine:
    engine = Engine(config)
    for index in sorted({i for p in parts for i in p}):
        got = [p[index] for p in parts if index in p]
        merged = merge_parts(
            [PanePart(lv, names, m.transactions, m.absent_bound) for m, lv, names in got],
            config.max_itemset_size,
        )
        lows = [m.start for m, _, _ in got if m.start is not None]
        highs = [m.end for m, _, _ in got if m.end is not None]
        engine.add_merged_pane(
            index,
            merged.levels,
            merged.names,
            merged.transactions,
            absent_bound=merged.absent_bound,
            parts=merged.parts,
            min_ts=min(lows, default=None),
            max_ts=max(highs, default=None),
        )
        engine.check_invariants()
    # the workers' watermark (their empty summaries say so): closed, then the window slides
    # there as the merger's idle watermark does
    last = int(END // PANE_SECONDS) - 1
    if engine.window.closed_through < last:
        empty = PanePart(
            tuple(Level.empty(k) for k in range(1, engine.max_itemset_size + 1)), [], 0, 0
        )
        engine.add_merged_pane(last, empty.levels, (), 0, absent_bound=0)
    engine.advance_watermark(END)
    return engine


def _feed(seed: int, n: int, panes: int) -> tuple[list[list[str]], list[float]]:
    rng = random.Random(seed)
    items = [f"i{j}" for j in range(12)]
    baskets = [rng.sample(items, rng.randint(1, 5)) for _ in range(n)]
    ts = sorted(rng.uniform(0, panes * PANE_SECONDS) for _ in range(n))
    return baskets, ts


@given(
    seed=st.integers(0, 10**6),
    n=st.integers(1, 400),
    panes=st.integers(1, 8),
    window_panes=st.integers(1, 5),
    workers=st.integers(1, 3),
    k=st.integers(1, 3),
)
@settings(deadline=None)
def test_exact_merge_equals_one_engine(
    seed: int, n: int, panes: int, window_panes: int, workers: int, k: int
) -> None:
    config = _config(0.0, k, window_panes)
    baskets, ts = _feed(seed, n, panes)
    rng = random.Random(seed + 1)
    owner = [rng.randrange(workers) for _ in baskets]
    parts = [
        _worker_panes(
            config,
            [b for b, o in zip(baskets, owner, strict=True) if o == w],
            [t for t, o in zip(ts, owner, strict=True) if o == w],
            f"w{w}",
        )
        for w in range(workers)
    ]
    merged = _merged_engine(config, parts)
    single = Engine(config)
    single.add(baskets, ts)
    single.advance_watermark(END)
    got, want = merged.snapshot(), single.snapshot()
    assert (got.transactions, got.max_error, got.panes) == (want.transactions, 0, want.panes)
    assert (got.first_ts, got.last_ts) == (want.first_ts, want.last_ts)
    assert _table(got) == _table(want)


@given(
    seed=st.integers(0, 10**6),
    n=st.integers(1, 600),
    panes=st.integers(1, 6),
    workers=st.integers(1, 4),
    epsilon=st.sampled_from([0.5, 0.2, 0.1, 0.05]),
    k=st.integers(1, 3),
)
@settings(deadline=None)
def test_lossy_merge_keeps_the_bounds_with_summed_error(
    seed: int, n: int, panes: int, workers: int, epsilon: float, k: int
) -> None:
    config = _config(epsilon, k, window_panes=8)  # every pane of the feed
    baskets, ts = _feed(seed, n, panes)
    owner = [random.Random(seed + i).randrange(workers) for i in range(n)]
    parts = [
        _worker_panes(
            config,
            [b for b, o in zip(baskets, owner, strict=True) if o == w],
            [t for t, o in zip(ts, owner, strict=True) if o == w],
            f"w{w}",
        )
        for w in range(workers)
    ]
    merged = _merged_engine(config, parts)
    snap = merged.snapshot()
    # the window holds every pane: its max_error is the sum of every part's ceil(n_i / w)
    width = math.ceil(1 / epsilon - 1e-12)
    part_bounds = [-(-m.transactions // width) for p in parts for m, _, _ in p.values()]
    assert snap.max_error == sum(part_bounds)
    assert snap.transactions == n
    assert_snapshot_bounds(snap, exact_counts(baskets, k), k, supports=(0.2, 0.4))


def test_absent_bound_is_the_sum_of_the_parts_not_of_the_total() -> None:
    # the worked example of the module notes (w = 4): parts of 10 and 6 transactions
    a = PanePart(
        (Level(np.array([[0]], dtype=np.int32), np.array([5]), np.array([1])),),
        ["tea"],
        10,
        3,
    )
    b = PanePart((Level(np.zeros((0, 1), dtype=np.int32), np.zeros(0), np.zeros(0)),), [], 6, 2)
    merged = merge_parts([a, b], 1)
    assert merged.absent_bound == 5 != math.ceil(16 / 4)
    assert merged.transactions == 16 and merged.names == ("tea",)
    level = merged.levels[0]
    assert (level.f.tolist(), (level.f + level.delta).tolist()) == ([5], [8])


def test_a_merged_pane_survives_a_checkpoint_with_its_bound() -> None:
    config = _config(0.25, 2, window_panes=8)
    baskets, ts = _feed(3, 200, 3)
    parts = [
        _worker_panes(config, baskets[w::2], ts[w::2], f"w{w}")  # two interleaved halves
        for w in range(2)
    ]
    engine = _merged_engine(config, parts)
    before = engine.snapshot()
    meta, arrays = engine.state()
    restored = Engine.from_state(config, meta, arrays)
    restored.check_invariants()
    after = restored.snapshot()
    assert after.max_error == before.max_error > math.ceil(before.transactions / 4)
    assert _table(after) == _table(before)
    assert all(isinstance(p.summary, MergedSummary) for p in restored.window.panes.values())


def test_merged_panes_come_in_order_and_refuse_counting() -> None:
    config = _config(0.0, 2, window_panes=2)
    engine = Engine(config)
    empty = (Level.empty(1), Level.empty(2))
    engine.add_merged_pane(5, empty, (), 0, absent_bound=0)  # nothing in it: nothing opens
    assert engine.window.closed_through == 5 and not engine.window.panes
    with pytest.raises(ValueError, match="at or below the last closed pane"):
        engine.add_merged_pane(4, empty, (), 0, absent_bound=0)
    one = merge_parts(
        [
            PanePart(
                (
                    Level(np.array([[0], [1]], dtype=np.int32), np.array([2, 1]), np.zeros(2)),
                    Level(np.array([[0, 1]], dtype=np.int32), np.array([1]), np.zeros(1)),
                ),
                ["jam", "tea"],
                2,
                0,
            )
        ],
        2,
    )
    closes: list[int] = []
    engine.on_pane_closed = lambda e: closes.append(e.last_closed.index)  # type: ignore[union-attr]
    result = engine.add_merged_pane(
        6, one.levels, one.names, one.transactions, absent_bound=0, min_ts=60.5, max_ts=61.0
    )
    assert (result.accepted, result.panes_closed, result.last_seq, closes) == (2, 1, 2, [6])
    pane: Pane = engine.window.panes[6]
    assert pane.closed and (pane.first_seq, pane.last_seq) == (1, 2)
    with pytest.raises(ValueError, match="takes no more transactions"):
        pane.summary.add_batch(np.array([0, 1]), np.array([0], dtype=np.int32))
    count = Engine(EngineConfig(epsilon=0.0, window_size=4, pane_size=2))
    with pytest.raises(ValueError, match="time-based windows only"):
        count.add_merged_pane(0, one.levels, one.names, 2, absent_bound=0)
