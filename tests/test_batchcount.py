"""The batch kernel (streamcount.engine.batchcount) against brute-force counts.

The reference is :func:`itertools.combinations` over each transaction and a Python ``Counter``
of the k-itemsets whose every (k-1)-subset is in a given tracked set (the Apriori condition of
Lossy Counting's batch step, Manku & Motwani, VLDB 2002). Every path of the kernel is forced in
turn: dense histogram or sort, short or long baskets (bitsets), chunked or not; the sorting
helpers are checked against ``numpy.sort``.
"""

from __future__ import annotations

from collections import Counter
from itertools import combinations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from oracle import exact_counts

from streamcount.engine import batchcount
from streamcount.engine.batchcount import Membership, count_batch, merge_sorted, radix_sorted
from streamcount.engine.counters import LossySummary
from streamcount.engine.keys import pack


def _reference(
    baskets: list[list[int]], k: int, tracked: set[tuple[int, ...]] | None
) -> Counter[tuple[int, ...]]:
    """k-itemsets of the baskets whose (k-1)-subsets are all tracked (None: all qualify)."""
    out: Counter[tuple[int, ...]] = Counter()
    for basket in baskets:
        for combo in combinations(sorted(basket), k):
            if tracked is None or all(s in tracked for s in combinations(combo, k - 1)):
                out[combo] += 1
    return out


def _kernel(
    baskets: list[list[int]], k: int, m: int, tracked: set[tuple[int, ...]] | None
) -> Counter[tuple[int, ...]]:
    rows = [sorted(b) for b in baskets]
    items = np.array([i for r in rows for i in r], dtype=np.int64)
    txn = np.repeat(np.arange(len(rows)), [len(r) for r in rows])
    if tracked is None:
        membership = Membership(np.arange(m, dtype=np.int64), m, 1)
    else:
        sub = np.array(sorted(tracked), dtype=np.int64).reshape(-1, k - 1)
        membership = Membership(np.sort(pack(sub, m)), m, k - 1)
    counts = count_batch(items, txn, len(rows), k, m, membership)
    # every possible k-itemset: read its count back through the kernel's own lookups
    universe = np.array(list(combinations(range(m), k)), dtype=np.int64).reshape(-1, k)
    keys = pack(universe, m)
    got = counts.take(keys)
    fresh_keys, fresh_counts = counts.fresh(1, keys[:0])
    assert np.array_equal(fresh_keys, keys[got > 0]), "fresh() and take() disagree"
    assert np.array_equal(fresh_counts, got[got > 0])
    pairs = zip(universe.tolist(), got.tolist(), strict=True)
    return Counter({tuple(r): int(c) for r, c in pairs if c})


@st.composite
def batches(draw: st.DrawFn, k: int) -> tuple[list[list[int]], int, set | None]:
    m = draw(st.integers(k, 12))
    length = st.integers(0, m)
    baskets = [
        draw(st.lists(st.integers(0, m - 1), min_size=n, max_size=n, unique=True))
        for n in draw(st.lists(length, max_size=25))
    ]
    tracked = None
    if k >= 3:
        subsets = list(combinations(range(m), k - 1))
        tracked = set(draw(st.lists(st.sampled_from(subsets), max_size=len(subsets))))
    return baskets, m, tracked


PATHS = {
    "default": {},
    "sorted": {"_BINCOUNT_CELLS": 0},
    "dense": {"_DENSE_PER_KEY": 10**9},
    "long baskets, small chunks": {"_SHORT_BASKET": 2, "CHUNK": 7},
    "sparse membership": {"_DENSE_CELLS": 0},
}


@pytest.mark.parametrize("path", list(PATHS))
@pytest.mark.parametrize("k", [2, 3, 4])
@settings(max_examples=40)
@given(data=st.data())
def test_count_batch_equals_brute_force(path: str, k: int, data: st.DataObject) -> None:
    baskets, m, tracked = data.draw(batches(k))
    with pytest.MonkeyPatch.context() as mp:
        for name, value in PATHS[path].items():
            mp.setattr(batchcount, name, value)
        got = _kernel(baskets, k, m, tracked)
    assert got == _reference(baskets, k, tracked)


def test_long_baskets_in_exact_mode_equal_an_exact_recount() -> None:
    """Baskets longer than the short-basket cut (40 surviving items) take the bitset path:
    epsilon 0 must still count every itemset exactly (oracle: exact_counts)."""
    rng = np.random.default_rng(7)
    baskets = [sorted(rng.choice(70, size=int(n), replace=False).tolist()) for n in (45, 60, 3)]
    baskets += [sorted(rng.choice(70, size=50, replace=False).tolist()) for _ in range(4)]
    summary = LossySummary(0.0, 3)
    summary.add_baskets(baskets)
    truth = exact_counts(baskets, 3)
    got = {}
    for level in summary.levels:
        for row, f, d in zip(
            level.items.tolist(), level.f.tolist(), level.delta.tolist(), strict=True
        ):
            assert d == 0
            got[tuple(row)] = f
    assert got == dict(truth)


@given(st.lists(st.integers(0, 2**40), max_size=300), st.integers(0, 3))
def test_radix_sorted_equals_numpy_sort(values: list[int], extra_bits: int) -> None:
    keys = np.array(values, dtype=np.int64)
    cells = (max(values, default=0) + 1) << extra_bits
    assert radix_sorted(keys, cells).tolist() == sorted(values)


@given(st.sets(st.integers(-50, 50)), st.sets(st.integers(-50, 50)))
def test_merge_sorted_equals_a_sort(a: set[int], b: set[int]) -> None:
    b = b - a
    ka, kb = np.array(sorted(a), dtype=np.int64), np.array(sorted(b), dtype=np.int64)
    keys, values = merge_sorted(ka, (ka * 3,), kb, (kb * 3,))
    assert keys.tolist() == sorted(a | b)
    assert values.tolist() == [3 * x for x in sorted(a | b)]
