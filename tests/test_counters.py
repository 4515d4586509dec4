"""LossySummary (one pane's Lossy Counting of itemsets) against brute-force exact counts.

Method: Manku & Motwani, "Approximate Frequency Counts over Data Streams", VLDB 2002; the
batch rules and check values as restated in the team's algorithm notes (ALGORITHMS.md sections
1.1-1.3; those notes are not part of this repository, so each check below also names the paper
or says that it was computed).
"""

from __future__ import annotations

import math
from itertools import combinations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from oracle import exact_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.counters import Level, LossySummary, bucket_width
from streamcount.engine.engine import Engine


def _level_dict(summary: LossySummary, k: int) -> dict[tuple[int, ...], tuple[int, int]]:
    level = summary.levels[k - 1]
    return {
        tuple(row): (f, d)
        for row, f, d in zip(
            level.items.tolist(), level.f.tolist(), level.delta.tolist(), strict=True
        )
    }


def _assert_downward_closed(summary: LossySummary) -> None:
    """Every (k-1)-subset of a tracked k-set is tracked (own check, not check_invariants)."""
    for k in range(2, summary.max_itemset_size + 1):
        smaller = set(_level_dict(summary, k - 1))
        for row in _level_dict(summary, k):
            for sub in combinations(row, k - 1):
                assert sub in smaller, f"{row} tracked but its subset {sub} is not"


def _assert_lossy_invariants(summary: LossySummary, truth: dict, *, whole_buckets: bool) -> None:
    """ALGORITHMS.md §1.2/§1.3 item 1: tracked f <= true <= f + delta; untracked true <= b."""
    b = summary.b_current
    tracked = set()
    for k in range(1, summary.max_itemset_size + 1):
        for row, (f, d) in _level_dict(summary, k).items():
            true = truth.get(row, 0)
            assert f <= true <= f + d, f"{row}: true {true} outside [{f}, {f + d}]"
            assert d <= (b - 1 if whole_buckets else b), f"{row}: delta {d}, b_current {b}"
            tracked.add(row)
    for row, true in truth.items():
        if row not in tracked:
            assert true <= b, f"untracked {row}: true {true} > b_current {b}"
    if whole_buckets and summary.width:
        assert b <= summary.epsilon * summary.n + 1e-9


# -- bucket width ------------------------------------------------------------------------------


def test_bucket_width_is_ceil_of_inverse_epsilon() -> None:
    # w = ceil(1/epsilon) (ALGORITHMS.md §1.1; Manku & Motwani 2002)
    assert bucket_width(0.001) == 1000
    assert bucket_width(0.3) == 4  # ceil(3.33...) = 4
    assert bucket_width(0.25) == 4
    assert bucket_width(1 / 3) == 3
    assert bucket_width(0.0) == 0
    with pytest.raises(ValueError, match="epsilon"):
        bucket_width(1.0)
    with pytest.raises(ValueError, match="epsilon"):
        bucket_width(-0.1)


# -- golden single-item trace --------------------------------------------------------------------

# Computed check value, not published: ALGORITHMS.md §1.3 item 5 (epsilon 0.25, w = 4).
_TRACE = "a b a c | a b d a | e a b b | c c c d | a f g h"
_TRACE_D = {
    4: {"a": (2, 0)},
    8: {"a": (4, 0)},
    12: {"a": (5, 0), "b": (2, 2)},
    16: {"a": (5, 0), "c": (3, 3)},
    20: {"a": (6, 0), "c": (3, 3)},
}


def test_golden_single_item_trace_bucket_by_bucket() -> None:
    ids = {c: i for i, c in enumerate("abcdefgh")}
    summary = LossySummary(0.25, 1)
    for bucket in _TRACE.split("|"):
        summary.add_baskets([[ids[c]] for c in bucket.split()])
        summary.check_invariants()
        got = {"abcdefgh"[row[0]]: fd for row, fd in _level_dict(summary, 1).items()}
        assert got == _TRACE_D[summary.n], f"N={summary.n}"
    # true counts a 6, b 4, c 4, d 2, e f g h 1 (ALGORITHMS.md §1.3 item 5, computed)
    assert summary.bounds([ids["a"]]) == (6, 6)
    assert summary.bounds([ids["c"]]) == (3, 6)
    assert summary.bounds([ids["b"]]) == (0, 5)  # untracked: (0, b_current = 20/4)


def test_golden_single_item_trace_queries_through_engine() -> None:
    # ALGORITHMS.md §1.3 item 5 (computed): s = 0.3 reports {a, c}; s = 0.5 only {a}.
    eng = Engine(
        EngineConfig(epsilon=0.25, max_itemset_size=1, window_size=20, pane_size=20, batch_size=4)
    )
    eng.add([[c] for c in _TRACE.replace("|", " ").split()])
    eng.flush()
    snap = eng.snapshot()
    assert (snap.transactions, snap.max_error) == (20, 5)
    assert [(f.items, f.count, f.upper) for f in snap.frequent(0.3)] == [
        (("a",), 6, 6),
        (("c",), 3, 6),
    ]
    assert [f.items for f in snap.frequent(0.5)] == [("a",)]


# -- single-item space bound ---------------------------------------------------------------------


def _harmonic(b: int) -> float:
    return sum(1.0 / i for i in range(1, b + 1))


@given(
    inv_eps=st.integers(2, 50),
    buckets=st.integers(1, 40),
    alphabet=st.integers(2, 400),
    zipf=st.booleans(),
    seed=st.integers(0, 2**32 - 1),
)
def test_single_item_space_bound_w_times_harmonic(
    inv_eps: int, buckets: int, alphabet: int, zipf: bool, seed: int
) -> None:
    # |D| <= w * H_B at every bucket boundary (ALGORITHMS.md §1.1, proof of Manku & Motwani's
    # space theorem; the check value is derived there, [C]-validated).
    epsilon = 1.0 / inv_eps
    w = bucket_width(epsilon)
    rng = np.random.default_rng(seed)
    if zipf:
        stream = (rng.zipf(1.3, size=w * buckets) - 1) % alphabet
    else:
        stream = rng.integers(0, alphabet, size=w * buckets)
    summary = LossySummary(epsilon, 1)
    truth: dict[tuple[int, ...], int] = {}
    for j in range(buckets):
        bucket = stream[j * w : (j + 1) * w].tolist()
        summary.add_baskets([[x] for x in bucket])
        for x in bucket:
            truth[(x,)] = truth.get((x,), 0) + 1
        summary.check_invariants()
        b = summary.b_current
        assert b == j + 1
        assert len(summary.levels[0]) <= w * _harmonic(b) + 1e-9
        _assert_lossy_invariants(summary, truth, whole_buckets=True)


# -- itemsets against brute force ----------------------------------------------------------------

_baskets = st.lists(st.lists(st.integers(0, 7), min_size=1, max_size=6), min_size=1, max_size=60)


@given(
    baskets=_baskets,
    epsilon=st.sampled_from([0.0, 0.5, 0.34, 0.25, 0.2, 0.1, 0.05, 0.01]),
    max_itemset_size=st.integers(1, 4),
    cuts=st.lists(st.integers(1, 15), min_size=1, max_size=20),
    aligned=st.booleans(),
)
def test_itemset_summary_bounds_after_every_batch(
    baskets: list[list[int]],
    epsilon: float,
    max_itemset_size: int,
    cuts: list[int],
    aligned: bool,
) -> None:
    summary = LossySummary(epsilon, max_itemset_size)
    w = summary.width
    pos, i = 0, 0
    while pos < len(baskets):
        size = cuts[i % len(cuts)] * (w if aligned and w else 1)
        i += 1
        batch = baskets[pos : pos + size]
        pos += len(batch)
        summary.add_baskets(batch)
        summary.check_invariants()
        truth = exact_counts(baskets[:pos], max_itemset_size)
        whole = bool(w) and summary.n % w == 0 and aligned
        _assert_lossy_invariants(summary, truth, whole_buckets=whole)
        _assert_downward_closed(summary)
        if epsilon == 0:
            got = {
                row: f
                for k in range(1, max_itemset_size + 1)
                for row, (f, _) in _level_dict(summary, k).items()
            }
            assert got == dict(truth)
    assert summary.n == len(baskets)


def test_exact_mode_matches_published_table() -> None:
    # Han, Kamber & Pei, 3rd ed. (2012), Table 6.1 (I1..I5 as ids 0..4); counts from
    # ALGORITHMS.md §7B: {I1,I2} 4, {I2} 7, {I1,I2,I3} 2, {I1,I2,I5} 2.
    summary = LossySummary(0.0, 3)
    summary.add_baskets(
        [[0, 1, 4], [1, 3], [1, 2], [0, 1, 3], [0, 2], [1, 2], [0, 2], [0, 1, 2, 4], [0, 1, 2]]
    )
    assert summary.bounds([0, 1]) == (4, 4)
    assert summary.bounds([1]) == (7, 7)
    assert summary.bounds([2, 1, 0]) == (2, 2)
    assert summary.bounds([0, 1, 4]) == (2, 2)
    assert summary.bounds([2, 3]) == (0, 0)  # never seen together: exact zero


def test_check_invariants_accepts_closed_summary_with_large_subset_ids() -> None:
    # Regression: a downward-closed summary whose (k-1)-sets hold an id above every id of
    # the k-sets must pass. {0,7} is a tracked pair with 7 > max id of the only triple.
    summary = LossySummary(0.0, 3)
    summary.add_baskets([[0, 1, 2], [0, 7]])
    _assert_downward_closed(summary)  # own check: it is closed
    summary.check_invariants()


def test_check_invariants_detects_a_broken_closure() -> None:
    summary = LossySummary(0.0, 2)
    summary.add_baskets([[0, 1], [0, 1, 2]])
    level1 = summary.levels[0]
    keep = level1.items[:, 0] != 1  # forget item 1 while {0,1} and {1,2} stay tracked
    summary._levels[0] = Level(level1.items[keep], level1.f[keep], level1.delta[keep])
    with pytest.raises(AssertionError, match="downward closed"):
        summary.check_invariants()


@given(
    baskets=_baskets,
    epsilon=st.sampled_from([0.0, 0.5, 0.25, 0.1]),
    max_itemset_size=st.integers(1, 4),
    split=st.integers(0, 60),
    more=_baskets,
)
def test_arrays_round_trip_is_identical(
    baskets: list[list[int]], epsilon: float, max_itemset_size: int, split: int, more: list
) -> None:
    summary = LossySummary(epsilon, max_itemset_size)
    summary.add_baskets(baskets[:split])
    summary.add_baskets(baskets[split:])
    copy = LossySummary.from_arrays(
        epsilon, max_itemset_size, summary.n, summary.to_arrays("p."), "p."
    )
    copy.check_invariants()
    for a, b in ((summary, copy),):
        for la, lb in zip(a.levels, b.levels, strict=True):
            np.testing.assert_array_equal(la.items, lb.items)
            np.testing.assert_array_equal(la.f, lb.f)
            np.testing.assert_array_equal(la.delta, lb.delta)
    assert copy.b_current == summary.b_current
    summary.add_baskets(more)
    copy.add_baskets(more)
    for la, lb in zip(summary.levels, copy.levels, strict=True):
        np.testing.assert_array_equal(la.items, lb.items)
        np.testing.assert_array_equal(la.f, lb.f)
        np.testing.assert_array_equal(la.delta, lb.delta)


def test_untracked_bound_is_b_current() -> None:
    summary = LossySummary(0.1, 2)  # w = 10
    summary.add_baskets([[0, 1]] * 9 + [[5]])
    summary.add_baskets([[0, 1]] * 10)
    assert summary.b_current == math.ceil(20 / 10)
    # {5}: f + delta <= 2 after the second bucket, so it is deleted: (0, b_current)
    assert summary.bounds([5]) == (0, 2)
    assert summary.bounds([0, 5]) == (0, 2)
    assert summary.bounds([0, 1]) == (19, 19)
