"""The one hook in the counting kernel: pairs that are never counted (drop_excluded_pairs).

Oracle: brute-force counts (tests/oracle.py) of the same transactions, minus every itemset that
holds an excluded pair. The summary must equal them when counting exactly and keep the Lossy
Counting bounds otherwise (Manku & Motwani 2002), for every itemset holding no excluded pair;
no itemset holding one is ever tracked.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Hashable
from itertools import combinations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from oracle import exact_counts

from streamcount.engine.counters import LossySummary, drop_excluded_pairs
from streamcount.engine.keys import PairSet

ITEMS = 8

pairs_strategy = st.lists(
    st.tuples(st.integers(0, ITEMS - 1), st.integers(0, ITEMS - 1)).filter(lambda p: p[0] != p[1]),
    max_size=10,
)
baskets_strategy = st.lists(
    st.lists(st.integers(0, ITEMS - 1), min_size=1, max_size=6, unique=True), max_size=60
)


def excluded_set(pairs: list[tuple[int, int]]) -> PairSet:
    out = PairSet()
    out.replace(np.array([a for a, _ in pairs]), np.array([b for _, b in pairs]))
    return out


@given(
    survivors=st.lists(st.integers(0, 1000), min_size=2, max_size=12, unique=True),
    data=st.data(),
)
def test_drop_excluded_pairs_removes_exactly_the_excluded(
    survivors: list[int], data: st.DataObject
) -> None:
    survivors = sorted(survivors)
    m = len(survivors)
    all_pairs = list(combinations(range(m), 2))
    present = data.draw(st.lists(st.sampled_from(all_pairs), unique=True))
    banned = data.draw(st.lists(st.sampled_from(all_pairs), unique=True))
    keys = np.array(sorted(a * m + b for a, b in present), dtype=np.int64)
    counts = np.arange(1, keys.shape[0] + 1, dtype=np.int64)
    excluded = excluded_set([(survivors[b], survivors[a]) for a, b in banned])  # either order
    kept, kept_counts = drop_excluded_pairs(keys, counts, np.array(survivors), m, excluded)
    expected = [(k, c) for k, c in zip(keys.tolist(), counts.tolist(), strict=True)
                if divmod(k, m) not in set(banned)]  # fmt: skip
    assert list(zip(kept.tolist(), kept_counts.tolist(), strict=True)) == expected


def oracle(baskets: list[list[int]], pairs: list[tuple[int, int]], k: int) -> Counter:
    banned = {frozenset(p) for p in pairs}
    counts = exact_counts(baskets, k)
    return Counter(
        {
            s: c
            for s, c in counts.items()
            if not any(frozenset(p) in banned for p in combinations(s, 2))
        }
    )


def tracked(summary: LossySummary) -> dict[tuple[Hashable, ...], tuple[int, int]]:
    out = {}
    for level in summary.levels:
        for row, f, d in zip(
            level.items.tolist(), level.f.tolist(), level.delta.tolist(), strict=True
        ):
            out[tuple(row)] = (f, f + d)
    return out


@given(pairs=pairs_strategy, baskets=baskets_strategy, k=st.integers(2, 4))
def test_exact_summary_never_counts_an_excluded_pair(
    pairs: list[tuple[int, int]], baskets: list[list[int]], k: int
) -> None:
    summary = LossySummary(0.0, k, excluded_set(pairs))
    for lo in range(0, len(baskets), 7):
        summary.add_baskets(baskets[lo : lo + 7])
    summary.check_invariants()
    got = {s: low for s, (low, _) in tracked(summary).items()}
    assert got == dict(oracle(baskets, pairs, k))


@given(
    pairs=pairs_strategy,
    baskets=baskets_strategy,
    epsilon=st.sampled_from([0.1, 0.2, 0.3]),
)
def test_lossy_summary_keeps_its_bounds_beside_excluded_pairs(
    pairs: list[tuple[int, int]], baskets: list[list[int]], epsilon: float
) -> None:
    summary = LossySummary(epsilon, 3, excluded_set(pairs))
    for lo in range(0, len(baskets), 10):
        summary.add_baskets(baskets[lo : lo + 10])
    summary.check_invariants()
    exact = oracle(baskets, pairs, 3)
    found = tracked(summary)
    for itemset, (low, high) in found.items():
        assert itemset in exact, f"{itemset} holds an excluded pair or never occurred"
        assert low <= exact[itemset] <= high
    for itemset, true in exact.items():
        if itemset not in found:
            assert true <= summary.b_current
