"""Brute-force exact itemset counts: the independent reference the engine is tested against.

Nothing here uses streamcount. Each transaction is read as a set; every ``k``-subset
(``k = 1..K``) is enumerated with :func:`itertools.combinations` and counted in a
:class:`collections.Counter`. Slow on purpose (pure Python), so only small data goes through
:func:`exact_counts`; :func:`count_itemset` counts one itemset by set containment.
"""

from __future__ import annotations

import gzip
from collections import Counter
from collections.abc import Hashable, Iterable, Sequence
from itertools import combinations

from data_files import data_path

__all__ = [
    "count_itemset",
    "exact_counts",
    "exact_window_counts",
    "read_transactions",
]


def exact_counts(
    baskets: Iterable[Iterable[Hashable]], max_itemset_size: int
) -> Counter[tuple[Hashable, ...]]:
    """Exact count of every itemset of size ``1..max_itemset_size`` (keys: sorted tuples).

    >>> c = exact_counts([["b", "a", "a"], ["a"]], 2)
    >>> c[("a",)], c[("a", "b")], c[("b",)]
    (2, 1, 1)
    """
    counts: Counter[tuple[Hashable, ...]] = Counter()
    for basket in baskets:
        items = sorted(set(basket))
        for k in range(1, min(max_itemset_size, len(items)) + 1):
            counts.update(combinations(items, k))
    return counts


def exact_window_counts(
    baskets: Sequence[Iterable[Hashable]], first_seq: int, last_seq: int, max_itemset_size: int
) -> Counter[tuple[Hashable, ...]]:
    """Exact counts over transactions ``first_seq..last_seq`` (1-based, inclusive).

    ``baskets[i]`` is the transaction with sequence number ``i + 1`` (the engine numbers
    accepted transactions 1, 2, ... in arrival order). ``first_seq == 0`` means empty.
    """
    if first_seq == 0:
        return Counter()
    return exact_counts(baskets[first_seq - 1 : last_seq], max_itemset_size)


def count_itemset(baskets: Iterable[Iterable[Hashable]], itemset: Iterable[Hashable]) -> int:
    """Transactions containing every item of ``itemset`` (plain set containment)."""
    wanted = set(itemset)
    return sum(1 for basket in baskets if wanted.issubset(basket))


def read_transactions(name: str) -> list[list[str]]:
    """A gzip basket file of ``tests/data``: one transaction per line, whitespace split."""
    with gzip.open(data_path(name), "rt", encoding="ascii") as fh:
        return [line.split() for line in fh if line.strip()]


def assert_snapshot_bounds(
    snap: object,
    exact: Counter[tuple[Hashable, ...]],
    max_itemset_size: int,
    *,
    supports: Iterable[float] = (),
) -> None:
    """Assert the window guarantees of ``snap`` (a ``WindowSnapshot``) against ``exact``.

    ``exact`` holds the true counts of the snapshot's transactions, keyed by sorted tuples of
    item *names*. Checks (Manku & Motwani 2002, summed over panes): tracked ⇒
    ``count <= true <= upper`` and ``upper - count <= max_error``; untracked ⇒
    ``true <= max_error``; and for every ``s`` in ``supports``: ``true >= s*N`` ⇒ reported by
    ``frequent(s)`` (when ``s*N > max_error``), reported ⇒ ``true >= s*N - max_error``.
    """
    names = list(snap.item_names)  # type: ignore[attr-defined]
    max_error = snap.max_error  # type: ignore[attr-defined]
    n = snap.transactions  # type: ignore[attr-defined]
    tracked: set[tuple[Hashable, ...]] = set()
    for k, level in enumerate(snap.levels, start=1):  # type: ignore[attr-defined]
        assert level.size == k
        for row, count, upper in zip(
            level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True
        ):
            key = tuple(sorted(names[i] for i in row))
            true = exact.get(key, 0)
            assert count <= true <= upper, f"{key}: true {true} outside [{count}, {upper}]"
            assert upper - count <= max_error, f"{key}: width {upper - count} > {max_error}"
            tracked.add(key)
    for key, true in exact.items():
        if len(key) > max_itemset_size or key in tracked:
            continue
        assert true <= max_error, f"untracked {key}: true {true} > max_error {max_error}"
    for s in supports:
        reported = {f.items: f for f in snap.frequent(s)}  # type: ignore[attr-defined]
        for key, true in exact.items():
            if len(key) <= max_itemset_size and true >= s * n and s * n > max_error:
                assert key in reported, f"false negative at s={s}: {key} true {true}, N={n}"
        for key in reported:
            true = exact.get(key, 0)
            assert true >= s * n - max_error, f"{key} reported at s={s} with true {true}"
