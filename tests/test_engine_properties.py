"""Property tests: the engine's window counts against an exact brute-force recount.

Every snapshot covers the accepted transactions ``first_seq..last_seq`` (count-based) or the
accepted transactions of its live panes (time-based); the brute-force oracle recounts exactly
those, and the window guarantees of Lossy Counting summed over panes (Manku & Motwani, VLDB
2002; the pane scheme of ALGORITHMS.md §2) must hold against it.
"""

from __future__ import annotations

import math
from itertools import combinations

from hypothesis import given
from hypothesis import strategies as st
from oracle import assert_snapshot_bounds, exact_counts, exact_window_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

EPSILONS = [0.0, 0.5, 0.34, 0.25, 0.2, 0.1, 0.05, 0.01]


def _baskets(alphabet: int, max_len: int = 5, max_size: int = 80) -> st.SearchStrategy:
    names = [f"p{i}" for i in range(alphabet)]
    return st.lists(
        st.lists(st.sampled_from(names), min_size=1, max_size=max_len),  # duplicates allowed
        min_size=0,
        max_size=max_size,
    )


def _assert_panes_downward_closed(engine: Engine) -> None:
    """Each pane summary is downward closed (own check from the rows, not check_invariants)."""
    for pane in engine.window.panes.values():
        levels = pane.summary.levels
        for k in range(2, len(levels) + 1):
            smaller = {tuple(r) for r in levels[k - 2].items.tolist()}
            for row in levels[k - 1].items.tolist():
                for sub in combinations(row, k - 1):
                    assert sub in smaller, f"pane {pane.index}: {row} tracked, {sub} not"


def _assert_error_budget(snap, epsilon: float) -> None:
    # max_error = sum_j ceil(n_j / w) <= ceil(epsilon * N) + live panes (ALGORITHMS.md §2)
    if epsilon == 0:
        assert snap.max_error == 0
    else:
        assert snap.max_error <= math.ceil(epsilon * snap.transactions - 1e-9) + snap.panes


@st.composite
def count_scenarios(draw: st.DrawFn) -> dict:
    alphabet = draw(st.integers(2, 6))
    pane_size = draw(st.integers(1, 12))
    return {
        "baskets": draw(_baskets(alphabet)),
        "epsilon": draw(st.sampled_from(EPSILONS)),
        "pane_size": pane_size,
        "window_size": pane_size * draw(st.integers(1, 4)),
        "batch_size": draw(st.integers(1, 20)),
        "max_itemset_size": draw(st.integers(1, 4)),
        "chunks": draw(st.lists(st.integers(1, 25), min_size=1, max_size=10)),
        "supports": draw(st.lists(st.floats(0.05, 1.0), min_size=1, max_size=3)),
    }


@given(count_scenarios())
def test_count_window_bounds_against_exact_recount(sc: dict) -> None:
    config = EngineConfig(
        epsilon=sc["epsilon"],
        max_itemset_size=sc["max_itemset_size"],
        window_size=sc["window_size"],
        pane_size=sc["pane_size"],
        batch_size=sc["batch_size"],
    )
    k_max = sc["max_itemset_size"]
    engine = Engine(config)
    baskets = sc["baskets"]
    pos, i = 0, 0

    def check() -> None:
        engine.check_invariants()
        snap = engine.snapshot()
        if snap.transactions:
            assert snap.last_seq - snap.first_seq + 1 == snap.transactions
            assert (snap.first_seq - 1) % sc["pane_size"] == 0, "window starts mid-pane"
        assert snap.last_seq <= pos
        exact = exact_window_counts(baskets, snap.first_seq, snap.last_seq, k_max)
        assert_snapshot_bounds(snap, exact, k_max, supports=sc["supports"])
        _assert_error_budget(snap, sc["epsilon"])
        _assert_panes_downward_closed(engine)

    while pos < len(baskets):
        chunk = baskets[pos : pos + sc["chunks"][i % len(sc["chunks"])]]
        i += 1
        result = engine.add(chunk)
        assert result.accepted == len(chunk)
        pos += len(chunk)
        assert result.last_seq == pos  # accepted transactions are numbered 1, 2, ...
        check()
    engine.flush()
    check()
    # after a flush the window is exactly the last window_size/pane_size panes
    snap = engine.snapshot()
    n = len(baskets)
    if n:
        newest = (n - 1) // sc["pane_size"]
        oldest = max(0, newest - sc["window_size"] // sc["pane_size"] + 1)
        assert (snap.first_seq, snap.last_seq) == (oldest * sc["pane_size"] + 1, n)
    else:
        assert (snap.first_seq, snap.last_seq, snap.transactions) == (0, 0, 0)


@given(
    baskets=_baskets(4, max_size=40),
    max_itemset_size=st.integers(1, 4),
    pane_size=st.integers(1, 10),
    window_panes=st.integers(1, 4),
)
def test_exact_mode_equals_recount(
    baskets: list[list[str]], max_itemset_size: int, pane_size: int, window_panes: int
) -> None:
    engine = Engine(
        EngineConfig(
            epsilon=0.0,
            max_itemset_size=max_itemset_size,
            window_size=pane_size * window_panes,
            pane_size=pane_size,
            batch_size=3,
        )
    )
    engine.add(baskets)
    engine.flush()
    engine.check_invariants()
    snap = engine.snapshot()
    exact = exact_window_counts(baskets, snap.first_seq, snap.last_seq, max_itemset_size)
    got = {}
    for level in snap.levels:
        for row, c, u in zip(
            level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True
        ):
            assert c == u
            got[tuple(sorted(snap.item_names[j] for j in row))] = c
    assert got == dict(exact)


# -- time-based windows ---------------------------------------------------------------------------


@st.composite
def time_scenarios(draw: st.DrawFn) -> dict:
    pane_seconds = draw(st.sampled_from([5, 10]))
    window_panes = draw(st.integers(1, 4))
    # lateness at most (window_panes - 1) panes, so "too late" is decided by the watermark
    # alone (an event older than the window is always behind the watermark too)
    lateness = draw(st.integers(0, (window_panes - 1) * pane_seconds))
    baskets = draw(_baskets(4, max_size=60))
    steps = draw(st.lists(st.integers(0, 6), min_size=len(baskets), max_size=len(baskets)))
    jitter = draw(st.lists(st.integers(0, 25), min_size=len(baskets), max_size=len(baskets)))
    base, ts = 0, []
    for step, back in zip(steps, jitter, strict=True):
        base += step
        ts.append(float(max(0, base - back)))  # out of order by up to 25 s
    return {
        "baskets": baskets,
        "ts": ts,
        "pane_seconds": pane_seconds,
        "window_panes": window_panes,
        "lateness": lateness,
        "epsilon": draw(st.sampled_from([0.0, 0.0, 0.5, 0.25, 0.1])),
        "max_itemset_size": draw(st.integers(1, 3)),
        "batch_size": draw(st.integers(1, 12)),
        "chunks": draw(st.lists(st.integers(1, 15), min_size=1, max_size=8)),
    }


@given(time_scenarios())
def test_time_window_late_events_and_exact_window(sc: dict) -> None:
    p, lateness = sc["pane_seconds"], sc["lateness"]
    config = EngineConfig(
        epsilon=sc["epsilon"],
        max_itemset_size=sc["max_itemset_size"],
        window_seconds=float(p * sc["window_panes"]),
        pane_seconds=float(p),
        allowed_lateness_seconds=float(lateness),
        batch_size=sc["batch_size"],
    )
    k_max = sc["max_itemset_size"]
    engine = Engine(config)
    baskets, ts = sc["baskets"], sc["ts"]
    accepted: list[tuple[list[str], float]] = []  # by sequence number - 1
    max_ts = -math.inf
    late_total = pos = i = 0
    while pos < len(baskets):
        size = sc["chunks"][i % len(sc["chunks"])]
        i += 1
        chunk, chunk_ts = baskets[pos : pos + size], ts[pos : pos + size]
        # model: an event is too late when its pane ended at or before the watermark
        # (largest earlier event time minus the allowed lateness)
        expected_late = []
        for j, t in enumerate(chunk_ts):
            watermark = max_ts - lateness
            if max_ts > -math.inf and math.floor(t / p) <= math.floor(watermark / p) - 1:
                expected_late.append(j)
            else:
                accepted.append((chunk[j], t))
            max_ts = max(max_ts, t)
        result = engine.add(chunk, chunk_ts)
        assert [r.index for r in result.rejections] == expected_late
        assert all(r.reason == "too_late" for r in result.rejections)
        assert result.rejected_by_reason.get("too_late", 0) == len(expected_late)
        assert result.accepted == len(chunk) - len(expected_late)
        assert result.last_seq == len(accepted)
        late_total += len(expected_late)
        pos += len(chunk)
        engine.check_invariants()
        snap = engine.snapshot()
        _assert_error_budget(snap, sc["epsilon"])
        _assert_panes_downward_closed(engine)
    assert engine.statistics().rejected.get("too_late", 0) == late_total
    engine.flush()
    engine.check_invariants()
    snap = engine.snapshot()
    if not accepted:
        assert snap.transactions == 0
        return
    newest = max(math.floor(t / p) for _, t in accepted)
    live = [
        (seq, b)
        for seq, (b, t) in enumerate(accepted, start=1)
        if math.floor(t / p) >= newest - sc["window_panes"] + 1
    ]
    assert snap.transactions == len(live)
    assert (snap.first_seq, snap.last_seq) == (live[0][0], max(s for s, _ in live))
    exact = exact_counts((b for _, b in live), k_max)
    assert_snapshot_bounds(snap, exact, k_max, supports=[0.2, 0.5])
    if sc["epsilon"] == 0:
        got = {
            tuple(sorted(snap.item_names[j] for j in row)): c
            for level in snap.levels
            for row, c in zip(level.items.tolist(), level.count.tolist(), strict=True)
        }
        assert got == dict(exact)


def test_time_window_rejects_a_late_event_by_reason() -> None:
    # A hand-made stream: pane_seconds 10, no lateness allowed; after t = 25 the watermark
    # is 25, so pane [10, 20) has closed and an event at t = 12 is too late.
    engine = Engine(
        EngineConfig(
            epsilon=0.0,
            max_itemset_size=2,
            window_seconds=30.0,
            pane_seconds=10.0,
            allowed_lateness_seconds=0.0,
            batch_size=10,
        )
    )
    result = engine.add([["tea"], ["tea", "jam"], ["jam"], ["tea"]], [1.0, 25.0, 12.0, 21.0])
    assert [(r.index, r.reason) for r in result.rejections] == [(2, "too_late")]
    assert result.accepted == 3 and result.last_seq == 3
    engine.flush()
    snap = engine.snapshot()
    assert snap.transactions == 3
    assert snap.bounds([engine.vocabulary.get("tea")]) == (3, 3)
    assert snap.bounds([engine.vocabulary.get("jam")]) == (1, 1)
    assert engine.statistics().rejected == {"too_late": 1}


@given(
    baskets=_baskets(8, max_size=60),
    max_itemset_size=st.integers(1, 3),
    epsilon=st.sampled_from([0.05, 0.1, 0.25]),
    cap=st.sampled_from([0, 5, 40, 1 << 22]),
)
def test_the_fresh_overlay_keeps_the_bounds_exact_or_not(
    baskets: list[list[str]], max_itemset_size: int, epsilon: float, cap: int
) -> None:
    """The buffered transactions are added to answers as an overlay: exact while they expand
    to at most ``OVERLAY_EXACT_MAX`` candidates, counted with epsilon past it (a cap of 0
    forces that). Either way every Lossy Counting bound holds against a brute-force recount
    of the same transactions (Manku & Motwani 2002, summed over panes), and the buffer is
    never counted into the state."""
    import streamcount.engine.pane as pane_module

    saved = pane_module.OVERLAY_EXACT_MAX
    pane_module.OVERLAY_EXACT_MAX = cap
    try:
        engine = Engine(
            EngineConfig(
                epsilon=epsilon,
                max_itemset_size=max_itemset_size,
                window_size=40,
                pane_size=20,
                batch_size=20,
            )
        )
        engine.add(baskets)
        counted = engine.snapshot().transactions
        snap = engine.fresh_snapshot()
        assert engine.snapshot().transactions == counted, "the overlay touched the state"
    finally:
        pane_module.OVERLAY_EXACT_MAX = saved
    exact = exact_window_counts(baskets, snap.first_seq, snap.last_seq, max_itemset_size)
    assert snap.transactions == sum(1 for b in baskets[snap.first_seq - 1 : snap.last_seq])
    assert_snapshot_bounds(snap, exact, max_itemset_size, supports=(0.2, 0.5))
