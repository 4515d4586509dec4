"""The open FIMI datasets in tests/data (provenance, terms and checksums in its README.md).

* whole retail / T10I4D100K in exact mode reproduce reference_counts.json (exact counts
  computed by full enumeration, see tests/data/README.md);
* chess / mushroom in exact mode equal the brute-force recount of tests/oracle.py;
* epsilon 0.001 over a 50,000-transaction window of 5,000-transaction panes keeps every
  Lossy Counting guarantee against the exact counts of that same window.

Files are read with gzip + whitespace split (tests/oracle.py), independent of the project's
readers.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from functools import lru_cache

import numpy as np
import pytest
from data_files import data_path
from oracle import count_itemset, exact_counts, read_transactions

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

REFERENCE = data_path("reference_counts.json")


@lru_cache(maxsize=2)
def _data(name: str) -> tuple[tuple[str, ...], ...]:
    return tuple(tuple(t) for t in read_transactions(name))


def _exact_engine(baskets, max_itemset_size: int):
    """The engine in exact mode (epsilon 0) with the whole input as one window."""
    n = len(baskets)
    engine = Engine(
        EngineConfig(
            epsilon=0.0,
            max_itemset_size=max_itemset_size,
            window_size=n,
            pane_size=n,
            batch_size=n,
            max_basket_items=1000,
        )
    )
    result = engine.add(baskets)
    assert result.accepted == n
    engine.flush()
    snap = engine.snapshot()
    assert (snap.first_seq, snap.last_seq, snap.transactions, snap.max_error) == (1, n, n, 0)
    return snap


def _rows(snap, keys) -> np.ndarray:
    """Ascending item-id rows of ``snap`` for itemsets given by item names (-1: unknown)."""
    index = {name: i for i, name in enumerate(snap.item_names)}
    rows = np.array([[index.get(str(x), -1) for x in key] for key in keys], dtype=np.int64)
    return np.sort(rows, axis=1)


def _lookup(snap, keys) -> tuple[np.ndarray, np.ndarray]:
    """(count, upper) of itemsets given by names; an item never seen gives (0, 0) in exact mode."""
    rows = _rows(snap, keys)
    known = (rows >= 0).all(axis=1)
    count = np.zeros(len(keys), dtype=np.int64)
    upper = np.full(len(keys), snap.max_error, dtype=np.int64)
    if known.any():
        c, u = snap.bounds_many(rows[known].astype(np.int32))
        count[known], upper[known] = c, u
    return count, upper


def _top(snap, size: int, n: int) -> list[list]:
    """The ``n`` largest counts of one size as [[items as ints], count], ties by itemset."""
    level = snap.levels[size - 1]
    cut = np.sort(level.count)[::-1][min(n, len(level)) - 1]
    idx = np.flatnonzero(level.count >= cut)
    rows = [
        (-int(level.count[i]), sorted(int(snap.item_names[j]) for j in level.items[i].tolist()))
        for i in idx.tolist()
    ]
    rows.sort()
    return [[k, -c] for c, k in rows[:n]]


def _names(snap, level, idx) -> list[tuple[str, ...]]:
    return [
        tuple(sorted(snap.item_names[j] for j in level.items[i].tolist())) for i in idx.tolist()
    ]


def _project(baskets, keep: set[str]) -> list[list[str]]:
    """Each transaction restricted to ``keep``; empty ones dropped.

    Exact for every itemset made only of kept items: its count is unchanged, since a
    transaction contains it iff the transaction's kept part does.
    """
    return [p for p in ([i for i in t if i in keep] for t in baskets) if p]


@pytest.mark.slow
@pytest.mark.parametrize("dataset", ["retail", "T10I4D100K"])
def test_whole_file_exact_mode_reproduces_reference_counts(dataset: str) -> None:
    ref = json.loads(REFERENCE.read_text())["datasets"][dataset]
    baskets = _data(ref["file"])
    n = len(baskets)
    assert n == ref["transactions"]  # reference_counts.json (tests/data/README.md)
    # sizes 1-2 on the raw file
    raw = _exact_engine(baskets, 2)
    # size 3 on the file restricted to the items of pairs at >= 0.5 %: exact for every
    # itemset that can be frequent at 0.5 % or 1 % (all its pairs are frequent), and keeps
    # the triple enumeration affordable (52.5M triple occurrences in retail, tests/data/README.md)
    pairs = raw.levels[1]
    frequent_pairs = pairs.items[pairs.count >= ref["min_count"]["0.5%"]]
    keep = {raw.item_names[j] for j in np.unique(frequent_pairs).tolist()}
    proj = _exact_engine(_project(baskets, keep), 3)
    # every itemset at >= 0.5 %, with its exact count (reference_counts.json)
    listed = ref["itemsets_at_or_above_0.5pct"]
    for size, entries in listed.items():
        keys = [tuple(items) for items, _ in entries]
        want = np.array([c for _, c in entries])
        count, upper = _lookup(proj if size == "3" else raw, keys)
        np.testing.assert_array_equal(count, want, err_msg=f"{dataset} size {size}")
        np.testing.assert_array_equal(upper, want)
    # per-size totals at 1 % and 0.5 % through frequent() (reference_counts.json)
    for label, s in (("1%", 0.01), ("0.5%", 0.005)):
        sizes = Counter(len(f.items) for f in raw.frequent(s))
        cut = ref["min_count"][label]
        sizes[3] = sum(
            1 for f in proj.frequent(cut / proj.transactions, sizes=[3]) if f.count >= cut
        )
        want = ref["frequent_itemsets_size_1_to_3"][label]
        assert {str(k): v for k, v in sizes.items()} == {
            k: v for k, v in want.items() if k != "total"
        }
        assert sum(sizes.values()) == want["total"]
    # top pairs and triples, ordered by count descending then itemset (reference_counts.json)
    assert _top(raw, 2, 20) == ref["top20_pairs"]
    assert _top(proj, 3, 10) == ref["top10_triples"]


@pytest.mark.slow
@pytest.mark.parametrize("name", ["chess.dat.gz", "mushroom.dat.gz"])
def test_dense_dataset_exact_mode_equals_brute_force(name: str) -> None:
    baskets = _data(name)
    snap = _exact_engine(baskets, 3)
    brute = exact_counts(baskets, 3)
    got = {
        tuple(sorted(snap.item_names[j] for j in row)): c
        for level in snap.levels
        for row, c in zip(level.items.tolist(), level.count.tolist(), strict=True)
    }
    assert got == dict(brute)


@pytest.mark.slow
@pytest.mark.parametrize("dataset", ["T10I4D100K.dat.gz", "retail.dat.gz"])
def test_epsilon_window_guarantees_against_exact_window(dataset: str) -> None:
    baskets = _data(dataset)
    epsilon, window, pane = 0.001, 50_000, 5_000
    engine = Engine(
        EngineConfig(
            epsilon=epsilon,
            max_itemset_size=3,
            window_size=window,
            pane_size=pane,
            batch_size=pane,
            max_basket_items=1000,
        )
    )
    for lo in range(0, len(baskets), 7_000):  # chunks not aligned with panes
        engine.add(baskets[lo : lo + 7_000])
        engine.check_invariants()
    engine.flush()
    engine.check_invariants()
    snap = engine.snapshot()
    n_all = len(baskets)
    newest = (n_all - 1) // pane
    first = (newest - window // pane + 1) * pane + 1
    assert (snap.first_seq, snap.last_seq) == (first, n_all)
    win = baskets[first - 1 : n_all]
    n = len(win)
    assert snap.transactions == n
    # max_error <= ceil(epsilon * N) + panes (ALGORITHMS.md §2)
    assert snap.max_error <= math.ceil(epsilon * n - 1e-9) + snap.panes

    # exact counts of the same window: singles by Counter; pairs/triples by the engine in
    # exact mode over the window restricted to S = items of tracked pairs/triples plus items
    # at >= 1 % (exact for every itemset over S, see _project); every tracked itemset and
    # every itemset at >= 1 % is over S
    singles = Counter(i for t in win for i in t)
    keep = {snap.item_names[j] for lv in snap.levels[1:] for j in np.unique(lv.items).tolist()}
    keep |= {i for i, c in singles.items() if c >= 0.01 * n}
    exact_snap = _exact_engine(_project(win, keep), 3)

    def true_counts(keys: list[tuple[str, ...]]) -> np.ndarray:
        if keys and len(keys[0]) == 1:
            return np.array([singles[k[0]] for k in keys], dtype=np.int64)
        return _lookup(exact_snap, keys)[0]

    tracked: set[tuple[str, ...]] = set()
    for level in snap.levels:
        keys = _names(snap, level, np.arange(len(level)))
        tracked.update(keys)
        if not keys:
            continue
        true = true_counts(keys)
        bad = np.flatnonzero((level.count > true) | (true > level.upper))
        assert bad.size == 0, f"{keys[bad[0]]}: true {true[bad[0]]} outside bounds"
        assert (level.upper - level.count <= snap.max_error).all()
    # every itemset (over S) whose true count exceeds max_error is tracked
    heavy = {(i,): c for i, c in singles.items() if c > snap.max_error}
    for level in exact_snap.levels[1:]:
        idx = np.flatnonzero(level.count > snap.max_error)
        heavy.update(zip(_names(exact_snap, level, idx), level.count[idx].tolist(), strict=True))
    missing = [key for key in heavy if key not in tracked]
    assert not missing, f"untracked with true > max_error: {missing[:5]}"
    # no false negatives at min_support 0.01 (0.01 * N = 500 > max_error)
    assert 0.01 * n > snap.max_error
    reported = {f.items: f for f in snap.frequent(0.01)}
    frequent = {key for key, true in heavy.items() if true >= 0.01 * n}
    assert frequent, "the check needs frequent itemsets"
    assert frequent <= set(reported)
    for key in reported:
        (true,) = true_counts([key])
        assert true >= 0.01 * n - snap.max_error

    # spot-check the exact reference with the brute-force oracle on a sample of itemsets
    win_sets = [set(t) for t in win]
    rng = np.random.default_rng(20020820)
    pool = sorted(tracked)
    sample = [pool[i] for i in rng.choice(len(pool), size=40, replace=False)]
    sample += sorted(frequent, key=lambda k: (-len(k), k))[:10]
    for key in sample:
        assert count_itemset(win_sets, key) == int(true_counts([key])[0]), key
