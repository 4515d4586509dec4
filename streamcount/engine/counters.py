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
transaction. Each level renumbers the surviving items densely for the batch, and
:mod:`streamcount.engine.batchcount` enumerates and counts the candidate k-itemsets as int64
keys in that radix (pairs and triples in a few passes, a histogram or a radix sort). The
tracked entries, in the same radix, take their batch counts by lookup, and the new entries are
merged into them in order (no re-sort). No Python object is created per itemset.

Memory: per tracked itemset ``4k`` bytes of ids plus 16 bytes of ``(f, delta)``; a batch holds
its enumerated candidates in chunks of at most :data:`~streamcount.engine.batchcount.CHUNK`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from streamcount.engine.batchcount import Membership, count_batch, merge_sorted, unpack_local
from streamcount.engine.keys import PairSet, lookup, pack, unpack

__all__ = ["Level", "LossySummary", "Summary", "bucket_width", "drop_excluded_pairs"]


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

    #: the error parameter the summary counts with (0: exact)
    epsilon: float

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

    def remap(self, mapping: np.ndarray) -> None:
        """Renumber item ids through an increasing old-to-new map."""
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
    excluded_pairs:
        Pairs of item ids never counted (an item with one of its catalogue ancestors, see
        :func:`drop_excluded_pairs`); shared with the engine, which updates it. ``None``: none.

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

    __slots__ = ("_levels", "epsilon", "excluded_pairs", "max_itemset_size", "n", "width")

    def __init__(
        self, epsilon: float, max_itemset_size: int, excluded_pairs: PairSet | None = None
    ) -> None:
        if max_itemset_size < 1:
            raise ValueError(f"max_itemset_size = {max_itemset_size!r}: must be >= 1")
        self.excluded_pairs = excluded_pairs
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
            membership = Membership(prev_keys, m, k - 1)
            batch = count_batch(cur_items, cur_txn, t, k, m, membership)
            excluding = k == 2 and self.excluded_pairs is not None and len(self.excluded_pairs) > 0

            # tracked entries: to local ids; drop those with a pruned item or subset
            if len(old):
                loc_rows = local[old.items] if old.items.size else old.items.astype(np.int64)
                ok = np.asarray((loc_rows >= 0).all(axis=1))
                if excluding:  # pairs excluded since they were counted (a catalogue reload)
                    assert self.excluded_pairs is not None
                    ok &= ~self.excluded_pairs.contains(old.items[:, 0], old.items[:, 1])
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
            if excluding:  # excluded pairs are never inserted (tracked ones are dropped above)
                assert self.excluded_pairs is not None
                new_keys, new_counts = drop_excluded_pairs(
                    new_keys, new_counts, survivors, m, self.excluded_pairs
                )
            del batch  # its histogram or keys are no longer needed (memory)
            keys, f, d = merge_sorted(
                old_keys[keep_old],
                (f_old[keep_old], old_d[keep_old]),
                new_keys,
                (new_counts, np.full(new_keys.shape[0], b0, dtype=np.int64)),
            )
            rows_local = unpack(keys, max(m, 1), k)  # int32: survivors[...] stays int32
            self._levels[k - 1] = Level(survivors[rows_local], f, d)
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
        excluded_pairs: PairSet | None = None,
    ) -> LossySummary:
        s = cls(epsilon, max_itemset_size, excluded_pairs)
        s.n = int(n)
        for k in range(1, max_itemset_size + 1):
            s._levels[k - 1] = Level(
                np.asarray(arrays[f"{prefix}L{k}.items"], dtype=np.int32).reshape(-1, k),
                np.asarray(arrays[f"{prefix}L{k}.f"], dtype=np.int64),
                np.asarray(arrays[f"{prefix}L{k}.delta"], dtype=np.int64),
            )
        return s

    @classmethod
    def from_levels(
        cls, epsilon: float, max_itemset_size: int, n: int, levels: Sequence[Level]
    ) -> LossySummary:
        """A summary of ``n`` transactions with the given entries (e.g. counted by another
        process); the levels must be in this class's order (see :attr:`levels`)."""
        if len(levels) != max_itemset_size:
            raise ValueError(f"{len(levels)} levels for max_itemset_size={max_itemset_size}")
        s = cls(epsilon, max_itemset_size)
        s.n = int(n)
        s._levels = list(levels)
        return s

    def remap(self, mapping: np.ndarray) -> None:
        """Renumber item ids through an increasing ``mapping`` (old id -> new id); every id
        in use must map to one (``>= 0``). Rows stay sorted, so nothing is re-sorted."""
        table = np.asarray(mapping, dtype=np.int32)
        for k, level in enumerate(self._levels, start=1):
            if len(level):
                items = table[level.items]
                if (items < 0).any():
                    raise ValueError(f"remap: a tracked itemset of size {k} uses a released id")
                self._levels[k - 1] = Level(items, level.f, level.delta)

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


def drop_excluded_pairs(
    keys: np.ndarray, counts: np.ndarray, survivors: np.ndarray, m: int, excluded: PairSet
) -> tuple[np.ndarray, np.ndarray]:
    """A batch's level-2 counts without the pairs in ``excluded``.

    Applied to the batch's pair counts before they update tracked entries or insert new ones
    (tracked pairs that became excluded since they were counted, after a catalogue reload, are
    deleted in the same batch). ``keys`` are pairs packed in the batch-local radix ``m``
    (``a * m + b``, ``a < b`` local ids) and ``survivors[a]`` is the item id of local id ``a``.
    A pair dropped here stays untracked, so Apriori pruning keeps every larger itemset holding
    it out too: with ``excluded`` the pairs of an item and one of its catalogue ancestors, no
    tracked itemset holds an item together with its own ancestor (Srikant & Agrawal, VLDB
    1995). Cost: one sorted look-up per key, O(n log |excluded|).

    >>> pairs = PairSet()
    >>> pairs.replace(np.array([10]), np.array([30]))  # item 10's ancestor is item 30
    >>> survivors = np.array([10, 20, 30])  # local ids 0, 1, 2
    >>> keys = np.array([0 * 3 + 1, 0 * 3 + 2, 1 * 3 + 2])  # (10, 20), (10, 30), (20, 30)
    >>> kept, counts = drop_excluded_pairs(keys, np.array([4, 9, 2]), survivors, 3, pairs)
    >>> kept.tolist(), counts.tolist()
    ([1, 5], [4, 2])
    """
    if keys.shape[0] == 0 or not len(excluded):
        return keys, counts
    radix = max(m, 1)
    a = survivors[keys // radix]
    b = survivors[keys % radix]
    keep = ~excluded.contains(a, b)
    return keys[keep], counts[keep]


# ---- private helpers ------------------------------------------------------------------------


def _pack_local(rows: np.ndarray, m: int) -> np.ndarray:
    return pack(rows, max(m, 1))


def _unpack_local(keys: np.ndarray, m: int, size: int) -> np.ndarray:
    return unpack_local(keys, m, size)
