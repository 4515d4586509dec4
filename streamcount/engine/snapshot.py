"""Immutable views of the window's counts, handed to rules, alerts, the HTTP API and reports.

A :class:`WindowSnapshot` is built by the engine after each batch or pane close and never
changes afterwards, so readers on other threads need no lock: the engine swaps a reference.

Bounds (Manku & Motwani 2002, summed over panes as in the pane scheme): for every itemset X of
size ``1..max_itemset_size``, with ``true`` its exact count over transactions
``first_seq..last_seq``::

    count(X) <= true(X) <= upper(X),    upper(X) - count(X) <= max_error

An itemset not listed in a level has ``count = 0`` and ``upper = max_error``.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from streamcount.engine.keys import lookup, pack

__all__ = ["EngineStatistics", "FrequentItemset", "LevelCounts", "WindowSnapshot"]


@dataclass(frozen=True, slots=True)
class LevelCounts:
    """Tracked itemsets of one size with their window bounds.

    Attributes
    ----------
    size:
        Items per itemset.
    items:
        ``(n, size)`` int32 item ids; each row ascending, rows in lexicographic order.
    count:
        ``(n,)`` int64 lower bounds (never above the true count).
    upper:
        ``(n,)`` int64 upper bounds (never below the true count).
    """

    size: int
    items: NDArray[np.int32]
    count: NDArray[np.int64]
    upper: NDArray[np.int64]

    def __len__(self) -> int:
        return int(self.count.shape[0])

    @classmethod
    def empty(cls, size: int) -> LevelCounts:
        arrays = (
            np.zeros((0, size), dtype=np.int32),
            np.zeros(0, dtype=np.int64),
            np.zeros(0, dtype=np.int64),
        )
        for arr in arrays:
            arr.setflags(write=False)
        return cls(size, *arrays)


@dataclass(frozen=True, slots=True)
class FrequentItemset:
    """One reported itemset: names sorted, lower and upper bound of its count, and support."""

    items: tuple[str, ...]
    count: int
    upper: int
    support: float

    def as_dict(self) -> dict[str, object]:
        return {
            "items": list(self.items),
            "count": self.count,
            "upper": self.upper,
            "support": self.support,
        }


@dataclass(frozen=True, slots=True)
class WindowSnapshot:
    """Counts of every tracked itemset over a span of panes, frozen.

    Attributes
    ----------
    first_seq, last_seq:
        Sequence numbers (accepted transactions, from 1) of the span's ends; for a time-based
        window with out-of-order events, the smallest and largest in it. 0 when empty.
    transactions:
        Transactions counted in the span (``N``).
    max_error:
        Largest possible undercount, ``sum over panes of ceil(n_j / w)``; at most
        ``ceil(epsilon * N)`` plus one per pane whose length is not a multiple of ``w``.
    epsilon:
        The Lossy Counting error parameter (0: exact counts).
    pane_size:
        Transactions per pane (count-based window) or ``None`` (time-based).
    panes:
        Panes in the span.
    levels:
        ``levels[k - 1]`` holds the itemsets of size ``k``.
    item_names:
        The vocabulary: ``item_names[i]`` is the name of item id ``i``. It is the engine's
        append-only list (shared, not copied): names are only ever added after the ids this
        snapshot uses, so what the snapshot reads never changes.
    first_ts, last_ts:
        Smallest and largest event timestamp in the span (``None`` without timestamps).
    """

    first_seq: int
    last_seq: int
    transactions: int
    max_error: int
    epsilon: float
    pane_size: int | None
    panes: int
    levels: tuple[LevelCounts, ...]
    item_names: Sequence[str]
    first_ts: float | None = None
    last_ts: float | None = None
    #: packed keys of each level, computed on first use (a cache, not part of the value)
    _keys: dict[int, tuple[int, np.ndarray]] = field(
        default_factory=dict, init=False, repr=False, compare=False
    )

    @property
    def max_itemset_size(self) -> int:
        return len(self.levels)

    def window_dict(self) -> dict[str, object]:
        """The ``window`` object of reports and the HTTP API."""
        return {
            "first_seq": self.first_seq,
            "last_seq": self.last_seq,
            "transactions": self.transactions,
            "max_error": self.max_error,
            "epsilon": self.epsilon,
            "pane_size": self.pane_size,
        }

    def bounds(self, item_ids: Iterable[int]) -> tuple[int, int]:
        """``(count, upper)`` of one itemset given by item ids (any order).

        An itemset that is not tracked has ``(0, max_error)``; the empty itemset has
        ``(N, N)``.
        """
        ids = sorted(set(int(i) for i in item_ids))
        if not ids:
            return self.transactions, self.transactions
        if len(ids) > len(self.levels):
            raise ValueError(
                f"itemset of size {len(ids)} is larger than max_itemset_size={len(self.levels)}"
            )
        count, upper = self.bounds_many(np.array([ids], dtype=np.int32))
        return int(count[0]), int(upper[0])

    def bounds_many(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Vectorised :meth:`bounds` for an ``(n, k)`` array of ascending item-id rows."""
        rows = np.asarray(rows, dtype=np.int32)
        n, k = rows.shape
        if k == 0:
            full = np.full(n, self.transactions, dtype=np.int64)
            return full, full.copy()
        level = self.levels[k - 1]
        count = np.zeros(n, dtype=np.int64)
        upper = np.full(n, self.max_error, dtype=np.int64)
        if len(level) and n:
            radix, keys = self._level_keys(k)
            # an id beyond every tracked id cannot be in a tracked itemset
            idx = np.flatnonzero((rows < radix).all(axis=1))
            pos, found = lookup(keys, pack(rows[idx], radix))
            hit = idx[found]
            count[hit] = level.count[pos[found]]
            upper[hit] = level.upper[pos[found]]
        return count, upper

    def _level_keys(self, size: int) -> tuple[int, np.ndarray]:
        """``(radix, sorted packed keys)`` of the tracked itemsets of one size, cached.

        Readers on several threads may compute it at once; they compute the same value.
        """
        cached = self._keys.get(size)
        if cached is None:
            items = self.levels[size - 1].items
            radix = int(items.max()) + 1 if items.size else 1
            cached = (radix, pack(items, radix))
            self._keys[size] = cached
        return cached

    def frequent(
        self, min_support: float, *, sizes: Iterable[int] | None = None
    ) -> Iterator[FrequentItemset]:
        """Itemsets reported at ``min_support`` (a fraction of the window's transactions).

        Reported iff ``count >= min_support * N - max_error``: every itemset whose true count
        is at least ``min_support * N`` is reported (no false negatives) and none whose true
        count is below ``min_support * N - max_error``. Sizes ascending; within a size, by
        count descending then by item names.
        """
        n = self.transactions
        cut = min_support * n - self.max_error
        wanted = set(sizes) if sizes is not None else None
        for level in self.levels:
            if wanted is not None and level.size not in wanted:
                continue
            if n == 0 or not len(level):
                continue
            idx = np.flatnonzero((level.count >= cut) & (level.count > 0))
            rows = []
            for i in idx.tolist():
                names = tuple(sorted(self.item_names[j] for j in level.items[i].tolist()))
                rows.append((-int(level.count[i]), names, i))
            rows.sort()
            for negc, names, i in rows:
                yield FrequentItemset(names, -negc, int(level.upper[i]), -negc / n)


@dataclass(frozen=True, slots=True)
class EngineStatistics:
    """A frozen snapshot of the engine's counters, read by metrics and the status endpoint."""

    #: transactions accepted since start (or since the state was first created, across restores)
    transactions_seen: int
    #: transactions set aside by the engine, by reason (``too_many_items``, ``too_late``, ...)
    rejected: dict[str, int]
    #: transactions in the current window (counted, i.e. excluding the not yet counted buffer)
    window_transactions: int
    #: the window's largest possible undercount
    window_max_error: int
    #: tracked itemsets summed over the panes held, per itemset size (index 0 is size 1)
    tracked_itemsets: tuple[int, ...]
    #: bytes held by the panes' numpy arrays and the batch buffers
    held_bytes: int
    #: panes held in memory (open ones and closed ones still in the window)
    live_panes: int
    #: panes in a full window (the window's length in panes)
    window_panes: int
    #: transactions received but not yet counted (waiting for a whole batch)
    buffered_transactions: int
    #: largest event timestamp seen (``None`` without timestamps)
    max_event_ts: float | None
    #: distinct item names interned
    vocabulary_items: int
