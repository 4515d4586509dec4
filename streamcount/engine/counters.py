"""Lossy Counting of itemsets over one pane, batch by batch, on integer-encoded itemsets.

This is the itemset version of Lossy Counting (Manku & Motwani, "Approximate Frequency Counts
over Data Streams", VLDB 2002), with the paper's Apriori-style pruning inside a batch.

Rules (``w = ceil(1/epsilon)`` transactions per bucket; a batch covers transactions
``N0+1 .. N1``, ``b0 = ceil(N0/w)``, ``b1 = ceil(N1/w)``, ``beta = b1 - b0``):

* every tracked itemset gains its batch count: ``f += c``; it is deleted when ``f + delta <= b1``;
* an untracked itemset with batch count ``c`` becomes ``(c, b0)``, and the same deletion test
  applies to it at once, so it is kept only when ``c + b0 > b1``, i.e. ``c > beta`` (the paper
  inserts at ``c >= beta`` and deletes at the next batch; a pane may never see another batch,
  and deleting any entry with ``f + delta <= b_current`` is always sound, since its true count
  is at most ``f + delta``);
* level by level (size 1, 2, ... K): an itemset is counted only when every subset one item
  smaller is tracked after this batch; a tracked itemset with an untracked subset is deleted
  (its true count is at most the subset's, ``<= b1``), so the summary is downward closed.

Invariants after every batch (checked by :meth:`LossySummary.check_invariants` against nothing
but itself, and by the tests against exact recounts)::

    tracked X:    f <= true(X) <= f + delta,   delta <= b_current
    untracked X:  true(X) <= b_current = ceil(N / w)   (<= epsilon * N at bucket boundaries)

``epsilon = 0`` counts exactly: nothing is ever deleted and ``delta = 0``.

Hot path: a batch is a CSR pair (``indptr``, ``items``) of ascending, distinct item ids per
transaction. Each level enumerates the k-combinations of each transaction's surviving items
with one fancy-index per basket length (a precomputed combination table), packs them into
int64 keys in a batch-local dense radix, and counts them with one sort (``np.unique``). No
Python object is created per itemset.

Memory: per tracked itemset ``4k`` bytes of ids plus 16 bytes of ``(f, delta)``; a batch holds
its enumerated combinations in chunks of at most ``_CHUNK_COMBOS`` rows.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Protocol

import numpy as np

from streamcount.engine.keys import combination_table, fits_int64, lookup, pack, unpack

__all__ = ["Level", "LossySummary", "Summary", "bucket_width"]

# Rows of combinations materialised at once while enumerating a batch (bounds peak memory:
# about 8 bytes x k per row plus the packed key).
_CHUNK_COMBOS = 1 << 21
# Dense membership matrices for (k-1)-subsets are used up to this many cells.
_DENSE_CELLS = 1 << 24
# Counting by bincount (O(n + cells), no sort) when the key space has at most this many cells
# and at most _DENSE_PER_KEY cells per key counted (zeroing and scanning a cell costs about a
# thirtieth of sorting a key).
_BINCOUNT_CELLS = 1 << 22
_DENSE_PER_KEY = 16


def bucket_width(epsilon: float) -> int:
    """Transactions per bucket, ``ceil(1/epsilon)``; 0 for exact counting (``epsilon == 0``).

    >>> bucket_width(0.001), bucket_width(0.3), bucket_width(0.0)
    (1000, 4, 0)
    """
    if epsilon < 0 or epsilon >= 1:
        raise ValueError(f"epsilon = {epsilon!r}: must be in [0, 1) (0 counts exactly)")
    if epsilon == 0:
        return 0
    return math.ceil(1.0 / epsilon - 1e-12)


@dataclass(frozen=True, slots=True)
class Level:
    """Tracked itemsets of one size: ``items`` rows (ascending ids, rows in lexicographic order),
    ``f`` counts since insertion and ``delta`` the bound on what was missed before."""

    items: np.ndarray  # (n, k) int32
    f: np.ndarray  # (n,) int64
    delta: np.ndarray  # (n,) int64

    @classmethod
    def empty(cls, size: int) -> Level:
        return cls(
            np.zeros((0, size), dtype=np.int32),
            np.zeros(0, dtype=np.int64),
            np.zeros(0, dtype=np.int64),
        )

    def __len__(self) -> int:
        return int(self.f.shape[0])

    @property
    def nbytes(self) -> int:
        return int(self.items.nbytes + self.f.nbytes + self.delta.nbytes)


class Summary(Protocol):
    """What a pane asks of a counting summary, so that another kernel can be dropped in.

    A summary counts the itemsets of size ``1..max_itemset_size`` of the transactions it was
    given (``n`` of them) with Lossy Counting's guarantee: a tracked itemset's true count lies
    in ``[f, f + delta]``, an untracked one's in ``[0, b_current]``. :class:`LossySummary` is
    the kernel in use; a replacement must keep every invariant :meth:`check_invariants` states.
    """

    @property
    def n(self) -> int:
        """Transactions counted."""
        ...

    @property
    def b_current(self) -> int:
        """Bound on the true count of any untracked itemset."""
        ...

    @property
    def levels(self) -> tuple[Level, ...]:
        """Tracked entries per itemset size, read-only (sorted rows of item ids)."""
        ...

    @property
    def tracked(self) -> tuple[int, ...]:
        """Entries per itemset size."""
        ...

    @property
    def nbytes(self) -> int:
        """Bytes held by the entries' arrays."""
        ...

    def add_batch(self, indptr: np.ndarray, items: np.ndarray) -> None:
        """Count one batch (CSR of ascending, distinct ids per transaction)."""
        ...

    def bounds(self, items: list[int]) -> tuple[int, int]:
        """``(lower, upper)`` bounds of one itemset's true count."""
        ...

    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        """The entries as named arrays (for checkpoints); :meth:`from_arrays` reverses it."""
        ...

    def check_invariants(self) -> None:
        """Assert every structural invariant."""
        ...


class LossySummary:
    """Lossy Counting summary of the itemsets of size ``1..max_itemset_size`` in one pane.

    Parameters
    ----------
    epsilon:
        Error parameter in ``[0, 1)``; every count is at most ``ceil(epsilon * n)`` below the
        true count of this summary's ``n`` transactions (exactly: ``<= ceil(n / w)``).
    max_itemset_size:
        Largest itemset size counted (K).

    Examples
    --------
    Exact mode against a plain recount (Han, Kamber & Pei, 3rd ed., Table 6.1):

    >>> s = LossySummary(0.0, 2)
    >>> baskets = [[0, 1, 4], [1, 3], [1, 2], [0, 1, 3], [0, 2], [1, 2], [0, 2], [0, 1, 2, 4],
    ...            [0, 1, 2]]
    >>> s.add_baskets(baskets)
    >>> s.bounds([0, 1]), s.bounds([1]), s.n
    ((4, 4), (7, 7), 9)

    References
    ----------
    Manku, G. S. & Motwani, R. (2002). Approximate Frequency Counts over Data Streams. VLDB.
    """

    __slots__ = ("_levels", "epsilon", "max_itemset_size", "n", "width")

    def __init__(self, epsilon: float, max_itemset_size: int) -> None:
        if max_itemset_size < 1:
            raise ValueError(f"max_itemset_size = {max_itemset_size!r}: must be >= 1")
        self.epsilon = float(epsilon)
        self.width = bucket_width(epsilon)
        self.max_itemset_size = int(max_itemset_size)
        self.n = 0
        self._levels: list[Level] = [Level.empty(k) for k in range(1, max_itemset_size + 1)]

    # -- bounds ----------------------------------------------------------------------------

    @property
    def b_current(self) -> int:
        """``ceil(n / w)``: the bound on the count of any untracked itemset (0 when exact)."""
        return -(-self.n // self.width) if self.width else 0

    @property
    def levels(self) -> tuple[Level, ...]:
        """The tracked entries of each itemset size (index 0 is size 1), read-only: rows of
        ascending item ids in lexicographic order, with ``f`` and ``delta``."""
        return tuple(self._levels)

    @property
    def tracked(self) -> tuple[int, ...]:
        return tuple(len(level) for level in self.levels)

    @property
    def nbytes(self) -> int:
        return sum(level.nbytes for level in self.levels)

    def bounds(self, items: list[int]) -> tuple[int, int]:
        """``(f, f + delta)`` of one itemset, or ``(0, b_current)`` when untracked. O(log n)."""
        row = np.array([sorted(set(items))], dtype=np.int32)
        level = self._levels[row.shape[1] - 1]
        if len(level):
            radix = int(max(level.items.max(), row.max())) + 1
            pos, found = lookup(pack(level.items, radix), pack(row, radix))
            if found[0]:
                i = int(pos[0])
                return int(level.f[i]), int(level.f[i] + level.delta[i])
        return 0, self.b_current

    # -- updates ---------------------------------------------------------------------------

    def add_baskets(self, baskets: list[list[int]]) -> None:
        """Convenience: count a batch given as lists of item ids (duplicates merged)."""
        rows = [sorted(set(b)) for b in baskets]
        indptr = np.zeros(len(rows) + 1, dtype=np.int64)
        np.cumsum([len(r) for r in rows], out=indptr[1:])
        flat = np.fromiter((i for r in rows for i in r), dtype=np.int32, count=int(indptr[-1]))
        self.add_batch(indptr, flat)

    def add_batch(self, indptr: np.ndarray, items: np.ndarray) -> None:
        """Count one batch of transactions and apply the deletion and insertion rules.

        ``indptr`` (int64, length ``t + 1``) and ``items`` (int32) are a CSR encoding of ``t``
        transactions whose ids are ascending and distinct within each transaction. A batch of
        whole buckets (``n`` and ``n + t`` multiples of ``w``) gives the tightest summary; any
        other batch is handled by the partial-batch rule (``beta`` may be 0).

        Cost: O(total combinations of surviving items x log) per level, vectorised.
        """
        t = int(indptr.shape[0] - 1)
        if t <= 0:
            return
        n0, n1 = self.n, self.n + t
        if self.width:
            b0 = -(-n0 // self.width)
            b1 = -(-n1 // self.width)
        else:
            b0 = b1 = 0
        beta = b1 - b0
        # new entries must survive the deletion test: c + b0 > b1 (exact mode: any c >= 1)
        min_new = beta + 1
        exact = self.width == 0
        self.n = n1
        items = np.asarray(items, dtype=np.int32)
        indptr = np.asarray(indptr, dtype=np.int64)

        # ---- level 1 -------------------------------------------------------------------
        lengths = np.diff(indptr)
        top = int(items.max()) + 1 if items.size else 0
        old = self._levels[0]
        if len(old):
            top = max(top, int(old.items[:, 0].max()) + 1)
        counts = np.bincount(items, minlength=top).astype(np.int64)
        old_ids = old.items[:, 0]
        f_old = old.f + counts[old_ids]
        keep_old = np.ones(len(old), dtype=bool) if exact else (f_old + old.delta > b1)
        is_old = np.zeros(top, dtype=bool)
        is_old[old_ids] = True
        new_ids = np.flatnonzero((counts >= min_new) & ~is_old).astype(np.int32)
        ids = np.concatenate((old_ids[keep_old], new_ids))
        f = np.concatenate((f_old[keep_old], counts[new_ids]))
        d = np.concatenate((old.delta[keep_old], np.full(new_ids.shape[0], b0, dtype=np.int64)))
        order = np.argsort(ids, kind="stable")
        self._levels[0] = Level(ids[order].reshape(-1, 1), f[order], d[order])
        if self.max_itemset_size == 1:
            return

        # ---- batch-local dense ids of the surviving items (order preserving) ----------------
        survivors = self._levels[0].items[:, 0]
        m = int(survivors.shape[0])
        local = np.full(top, -1, dtype=np.int64)
        local[survivors] = np.arange(m, dtype=np.int64)
        txn_of = np.repeat(np.arange(t, dtype=np.int64), lengths)
        loc_items = local[items]
        keep = loc_items >= 0
        cur_items = loc_items[keep]
        cur_txn = txn_of[keep]
        prev_keys = np.arange(m, dtype=np.int64)  # level-1 survivors in local radix

        for k in range(2, self.max_itemset_size + 1):
            old = self._levels[k - 1]
            if m == 0:
                self._levels[k - 1] = Level.empty(k)
                continue
            # Items that belong to some tracked (k-1)-set are the only ones a k-set can use.
            if k >= 3:
                allowed = np.zeros(m, dtype=bool)
                allowed[_unpack_local(prev_keys, m, k - 1).ravel()] = True
                sel = allowed[cur_items]
                cur_items = cur_items[sel]
                cur_txn = cur_txn[sel]
            membership = _Membership(prev_keys, m, k - 1)
            batch = _count_combinations(cur_items, cur_txn, t, k, m, membership)

            # tracked entries: to local ids; drop those with a pruned item or subset
            if len(old):
                loc_rows = local[old.items] if old.items.size else old.items.astype(np.int64)
                ok = (loc_rows >= 0).all(axis=1)
                loc_rows = np.where(ok[:, None], loc_rows, 0)
                ok &= membership.all_subsets_present(loc_rows)
                old_keys = _pack_local(loc_rows[ok], m)
                old_f = old.f[ok]
                old_d = old.delta[ok]
            else:
                old_keys = _pack_local(np.zeros((0, k), dtype=np.int64), m)
                old_f = old_d = np.zeros(0, dtype=np.int64)
            # the local radix keeps the order of rows, so old_keys is sorted
            f_old = old_f + batch.take(old_keys)
            keep_old = np.ones(f_old.shape[0], dtype=bool) if exact else (f_old + old_d > b1)
            new_keys, new_counts = batch.fresh(min_new, old_keys)
            keys, f, d = _merge_sorted(
                old_keys[keep_old],
                (f_old[keep_old], old_d[keep_old]),
                new_keys,
                (new_counts, np.full(new_keys.shape[0], b0, dtype=np.int64)),
            )
            rows_local = _unpack_local(keys, m, k)
            self._levels[k - 1] = Level(survivors[rows_local].astype(np.int32), f, d)
            prev_keys = keys
            if keys.shape[0] == 0:  # nothing of size k is tracked, so nothing larger can be
                for j in range(k + 1, self.max_itemset_size + 1):
                    self._levels[j - 1] = Level.empty(j)
                return

    # -- merging, persistence, checks -----------------------------------------------------

    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        out: dict[str, np.ndarray] = {}
        for k, level in enumerate(self.levels, start=1):
            out[f"{prefix}L{k}.items"] = level.items
            out[f"{prefix}L{k}.f"] = level.f
            out[f"{prefix}L{k}.delta"] = level.delta
        return out

    @classmethod
    def from_arrays(
        cls,
        epsilon: float,
        max_itemset_size: int,
        n: int,
        arrays: dict[str, np.ndarray],
        prefix: str,
    ) -> LossySummary:
        s = cls(epsilon, max_itemset_size)
        s.n = int(n)
        for k in range(1, max_itemset_size + 1):
            s._levels[k - 1] = Level(
                np.asarray(arrays[f"{prefix}L{k}.items"], dtype=np.int32).reshape(-1, k),
                np.asarray(arrays[f"{prefix}L{k}.f"], dtype=np.int64),
                np.asarray(arrays[f"{prefix}L{k}.delta"], dtype=np.int64),
            )
        return s

    def check_invariants(self) -> None:
        """Assert every structural invariant; raises AssertionError naming the broken one."""
        assert self.n >= 0, f"n = {self.n} < 0"
        bc = self.b_current
        for k, level in enumerate(self.levels, start=1):
            assert level.items.dtype == np.int32, f"L{k} items dtype {level.items.dtype}"
            assert level.f.dtype == np.int64 and level.delta.dtype == np.int64, f"L{k} dtypes"
            assert level.items.ndim == 2 and level.items.shape[1] == k, f"L{k} shape"
            assert level.items.shape[0] == level.f.shape[0] == level.delta.shape[0], f"L{k} len"
            if not len(level):
                continue
            assert (level.f >= 1).all(), f"L{k}: an entry with f < 1"
            assert (level.delta >= 0).all() and (level.delta <= bc).all(), (
                f"L{k}: delta outside [0, b_current={bc}]"
            )
            assert int(level.f.max()) <= self.n, f"L{k}: f above n"
            if k > 1:
                assert (np.diff(level.items, axis=1) > 0).all(), f"L{k}: row not ascending"
            # one radix for this level and the one below, so their keys are comparable
            radix = max(int(lv.items.max(initial=0)) for lv in self._levels[max(k - 2, 0) : k]) + 1
            keys = pack(level.items, radix)
            order = np.lexsort(level.items.T[::-1])
            assert (order == np.arange(len(level))).all(), f"L{k}: rows not in order"
            assert (keys[1:] != keys[:-1]).all(), f"L{k}: duplicate rows"
            if k > 1:
                prev = self._levels[k - 2]
                prev_keys = pack(prev.items, radix) if len(prev) else prev.f[:0]
                for drop in range(k):
                    sub = np.delete(level.items, drop, axis=1)
                    if len(prev):
                        _, found = lookup(prev_keys, pack(sub, radix))
                        ok = bool(found.all())
                    else:
                        ok = False
                    assert ok, f"L{k}: an itemset has an untracked subset (not downward closed)"


# ---- private helpers ------------------------------------------------------------------------


def _pack_local(rows: np.ndarray, m: int) -> np.ndarray:
    return pack(rows, max(m, 1))


def _unpack_local(keys: np.ndarray, m: int, size: int) -> np.ndarray:
    return unpack(keys, max(m, 1), size).astype(np.int64)


class _Membership:
    """Is every (k-1)-subset of a k-row tracked?  Dense matrix for pairs, sorted keys beyond.

    For k = 2 every pair of surviving items qualifies (their 1-subsets are the survivors).
    """

    __slots__ = ("dense", "keys", "m", "size")

    def __init__(self, keys: np.ndarray, m: int, size: int) -> None:
        self.keys = keys
        self.m = m
        self.size = size
        self.dense: np.ndarray | None = None
        if size == 2 and m * m <= _DENSE_CELLS:
            rows = _unpack_local(keys, m, 2)
            dense = np.zeros((m, m), dtype=bool)
            dense[rows[:, 0], rows[:, 1]] = True
            self.dense = dense

    def all_subsets_present(self, rows: np.ndarray) -> np.ndarray:
        n, k = rows.shape
        if self.size == 1 or n == 0:
            return np.ones(n, dtype=bool)
        ok = np.ones(n, dtype=bool)
        for cols in _drop_one(k):
            if self.dense is not None:
                ok &= self.dense[rows[:, cols[0]], rows[:, cols[1]]]
            else:
                _, found = lookup(self.keys, _pack_local(rows[:, cols], self.m))
                ok &= found
        return ok


@lru_cache(maxsize=16)
def _drop_one(k: int) -> tuple[list[int], ...]:
    """Column lists of the k subsets one item smaller: ``(1..k-1), (0, 2..k-1), ...``."""
    return tuple([c for c in range(k) if c != drop] for drop in range(k))


@lru_cache(maxsize=512)
def _triple_pair_index(length: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """For baskets of ``length`` items: the pair table, and for each triple of the triple
    table the positions of its pairs (ab, ac, bc) in the pair table."""
    pairs = combination_table(length, 2)
    triples = combination_table(length, 3)
    where = np.full((length, length), -1, dtype=np.int64)
    where[pairs[:, 0], pairs[:, 1]] = np.arange(pairs.shape[0])
    ab = where[triples[:, 0], triples[:, 1]]
    ac = where[triples[:, 0], triples[:, 2]]
    bc = where[triples[:, 1], triples[:, 2]]
    return pairs, ab, ac, bc


def _merge_sorted(
    keys_a: np.ndarray,
    values_a: tuple[np.ndarray, ...],
    keys_b: np.ndarray,
    values_b: tuple[np.ndarray, ...],
) -> tuple[np.ndarray, ...]:
    """Merge two sorted runs of distinct keys (no key in both) and their value arrays.

    One binary search of ``keys_b`` in ``keys_a`` gives every element's final position, so no
    sort is needed: O((a + b) + b log a).

    >>> _merge_sorted(np.array([2, 7]), (np.array([20, 70]),), np.array([1, 5, 9]),
    ...               (np.array([10, 50, 90]),))
    (array([1, 2, 5, 7, 9]), array([10, 20, 50, 70, 90]))
    """
    if keys_b.shape[0] == 0:
        return (keys_a, *values_a)
    if keys_a.shape[0] == 0:
        return (keys_b, *values_b)
    n = keys_a.shape[0] + keys_b.shape[0]
    at_b = np.searchsorted(keys_a, keys_b) + np.arange(keys_b.shape[0])
    is_a = np.ones(n, dtype=bool)
    is_a[at_b] = False
    out = []
    for a, b in zip((keys_a, *values_a), (keys_b, *values_b), strict=True):
        merged = np.empty(n, dtype=np.result_type(a.dtype, b.dtype))
        merged[at_b] = b
        merged[is_a] = a
        out.append(merged)
    return tuple(out)


class _BatchCounts:
    """How often each k-itemset occurs in one batch, as a dense array over the local key space
    (``dense[key]``) or as sorted distinct keys with their counts."""

    __slots__ = ("counts", "dense", "keys")

    def __init__(
        self,
        keys: np.ndarray | None = None,
        counts: np.ndarray | None = None,
        dense: np.ndarray | None = None,
    ) -> None:
        self.keys = keys
        self.counts = counts
        self.dense = dense

    @classmethod
    def of_keys(cls, keys: np.ndarray, cells: int | None) -> _BatchCounts:
        """Count ``keys`` (one per occurrence); ``cells`` is the key space when the keys are
        int64 in ``[0, cells)``, else ``None``. A histogram (O(keys + cells), no sort) when
        the key space is small beside the keys, else one sort."""
        if (
            cells is not None
            and cells <= _BINCOUNT_CELLS
            and cells <= _DENSE_PER_KEY * max(keys.shape[0], 1)
        ):
            return cls(dense=np.bincount(keys, minlength=cells))
        uniq, counts = np.unique(keys, return_counts=True)
        return cls(uniq, counts.astype(np.int64))

    def take(self, keys: np.ndarray) -> np.ndarray:
        """The batch count of each of ``keys`` (0 for one absent from the batch)."""
        if self.dense is not None:
            return self.dense[keys].astype(np.int64) if keys.shape[0] else keys[:0].astype(np.int64)
        assert self.keys is not None and self.counts is not None
        if not keys.shape[0] or not self.keys.shape[0]:
            return np.zeros(keys.shape[0], dtype=np.int64)
        pos, found = lookup(self.keys, keys)
        return np.where(found, self.counts[pos], 0)

    def fresh(self, min_count: int, tracked: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Sorted keys counted at least ``min_count`` times that are not in the sorted
        ``tracked``, with their counts (consumes a dense histogram)."""
        if self.dense is not None:
            dense = self.dense
            if tracked.shape[0]:
                dense[tracked] = 0
            keys = np.flatnonzero(dense >= min_count)
            return keys, dense[keys].astype(np.int64)
        assert self.keys is not None and self.counts is not None
        sel = self.counts >= min_count
        if tracked.shape[0] and self.keys.shape[0]:
            _, found = lookup(tracked, self.keys)
            sel &= ~found
        return self.keys[sel], self.counts[sel]


def _pair_keys(items: np.ndarray, txn: np.ndarray, t: int, radix: int) -> np.ndarray:
    """Keys ``a * radix + b`` of every pair ``a < b`` of positions in the same transaction.

    ``items``/``txn`` list each transaction's ids (ascending within it, transactions in
    order). The item at position ``p`` pairs with the ``r_p`` items after it in its
    transaction; all pairs come out in one pass: ``repeat`` of the first item and a running
    index for the second, O(pairs) with no per-length loop.

    >>> _pair_keys(np.array([1, 2, 3, 0, 4]), np.array([0, 0, 0, 1, 1]), 2, 10).tolist()
    [12, 13, 23, 4]
    """
    ends = np.cumsum(np.bincount(txn, minlength=t))
    pos = np.arange(items.shape[0], dtype=np.int64)
    later = ends[txn] - pos - 1
    first_slot = np.cumsum(later) - later  # where the pairs of position p start
    total = int(first_slot[-1] + later[-1]) if later.shape[0] else 0
    # second position = slot - first_slot[p] + p + 1 for every slot of position p
    second = np.arange(total, dtype=np.int64) + np.repeat(pos + 1 - first_slot, later)
    return np.repeat(items.astype(np.int64) * radix, later) + items[second]


def _count_combinations(
    items: np.ndarray, txn: np.ndarray, t: int, k: int, m: int, membership: _Membership
) -> _BatchCounts:
    """The k-combinations present in a batch, counted (keys in local radix ``m``).

    ``items``/``txn`` list each transaction's surviving local ids (ascending within a
    transaction, transactions in order). Pairs are enumerated in one pass
    (:func:`_pair_keys`). For larger k, transactions are grouped by their surviving length
    ``L``; each group is a ``(g, L)`` matrix indexed once with the ``C(L, k) x k``
    combination table, so the work is a few large numpy operations per distinct length. For
    triples the pair test runs on the ``C(L, 2)`` pairs of each basket and is combined per
    triple through index tables, so a triple is materialised only when its three pairs are
    tracked. Counting is one ``bincount`` when the key space is small, else one sort.
    """
    radix = max(m, 1)
    cells = radix**k if fits_int64(radix, k) else None
    if items.size == 0:
        return _BatchCounts.of_keys(_pack_local(np.zeros((0, k), dtype=np.int64), m), None)
    if k == 2:
        return _BatchCounts.of_keys(_pair_keys(items, txn, t, radix), cells)
    lengths = np.bincount(txn, minlength=t)
    starts = np.zeros(t + 1, dtype=np.int64)
    np.cumsum(lengths, out=starts[1:])
    key_parts: list[np.ndarray] = []
    triple_dense = k == 3 and membership.dense is not None
    for length in np.unique(lengths[lengths >= k]).tolist():
        table = combination_table(length, k)
        group = np.flatnonzero(lengths == length)
        step = max(1, _CHUNK_COMBOS // table.shape[0])
        for lo in range(0, group.shape[0], step):
            g = group[lo : lo + step]
            mat = items[starts[g][:, None] + np.arange(length)]
            if triple_dense:
                assert membership.dense is not None
                pairs, ab, ac, bc = _triple_pair_index(length)
                pair_ok = membership.dense[mat[:, pairs[:, 0]], mat[:, pairs[:, 1]]]
                valid = pair_ok[:, ab] & pair_ok[:, ac] & pair_ok[:, bc]
                row, combo = np.nonzero(valid)
                if row.size == 0:
                    continue
                sel = table[combo]
                a = mat[row, sel[:, 0]]
                b = mat[row, sel[:, 1]]
                c = mat[row, sel[:, 2]]
                key_parts.append((a * radix + b) * radix + c)
                continue
            combos = mat[:, table].reshape(-1, k)
            combos = combos[membership.all_subsets_present(combos)]
            if combos.shape[0]:
                key_parts.append(_pack_local(combos, m))
    if not key_parts:
        return _BatchCounts.of_keys(_pack_local(np.zeros((0, k), dtype=np.int64), m), None)
    keys = np.concatenate(key_parts) if len(key_parts) > 1 else key_parts[0]
    return _BatchCounts.of_keys(keys, cells)
