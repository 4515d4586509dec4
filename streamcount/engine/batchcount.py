"""Counting the k-itemsets of one batch: the inner loop of Lossy Counting, vectorised.

:meth:`~streamcount.engine.counters.LossySummary.add_batch` hands over, level by level, the
batch's surviving items as two parallel arrays (``items``: local ids, ascending within each
transaction; ``txn``: the transaction of each, in order) and a :class:`Membership` test of the
tracked ``(k-1)``-itemsets. :func:`count_batch` enumerates the ``k``-itemsets present whose
every ``(k-1)``-subset is tracked, packs each into one int64 key (local radix ``m``) and
counts them into a :class:`BatchCounts`.

Enumeration, with no loop over transactions or basket lengths:

* **pairs**: the item at position ``p`` pairs with the ``r_p`` items after it in its
  transaction; ``np.repeat`` of the first item and a running index for the second produce
  every pair in one pass;
* **triples**: the pair test runs on the ``C(L, 2)`` pairs of each basket (baskets grouped by
  length ``L``, up to 40 items) and is combined per triple in boolean arrays through index
  tables; longer baskets use bitsets of their tracked pairs (``row[p] & row[q]``). Either way
  no triple with an untracked pair is materialised;
* **k >= 4**: transactions grouped by length, each group indexed once with a combination
  table (the earlier method; rare, and only on short baskets).

Counting: one ``np.bincount`` over the key space when it is small beside the number of keys
(no sort, no scan of every present key: entries are read by threshold), otherwise a radix sort
of the keys (16-bit digits, each a stable counting sort). Work is cut into chunks of at most
``CHUNK`` candidate itemsets, so memory stays bounded however long a basket is.
"""

from __future__ import annotations

from collections.abc import Iterator
from functools import lru_cache

import numpy as np

from streamcount.engine.keys import combination_table, fits_int64, lookup, pack, unpack

__all__ = ["CHUNK", "BatchCounts", "Membership", "count_batch", "merge_sorted"]

#: candidate itemsets materialised at once (about 8 bytes x a few arrays each)
CHUNK = 1 << 21
# Dense membership matrices for pairs are used up to this many cells (bytes).
_DENSE_CELLS = 1 << 24
# A histogram over the key space (O(keys + cells), no sort) is used when the space has at most
# this many cells and at most _DENSE_PER_KEY cells per key counted (zeroing and scanning a
# cell costs about a twentieth of radix-sorting a key); otherwise the keys are sorted.
_BINCOUNT_CELLS = 1 << 22
_DENSE_PER_KEY = 20
# Triples of baskets up to this many surviving items are enumerated by length with tables of
# C(L, 3) rows (cached: about 4 MB in all); longer baskets by extending tracked pairs.
_SHORT_BASKET = 40


# ---- tracked (k-1)-itemsets -------------------------------------------------------------------


class Membership:
    """Is a (k-1)-itemset tracked? ``keys``: the tracked ones, sorted, in local radix ``m``.

    Pairs are tested in a dense ``m x m`` matrix when it has at most ``_DENSE_CELLS`` cells,
    else by binary search; larger itemsets by binary search. Size 1 means every surviving
    item, so every pair of them qualifies.
    """

    __slots__ = ("dense", "keys", "m", "size")

    def __init__(self, keys: np.ndarray, m: int, size: int) -> None:
        self.keys = keys
        self.m = m
        self.size = size
        self.dense: np.ndarray | None = None  # flat m*m bool
        if size == 2 and m * m <= _DENSE_CELLS:
            dense = np.zeros(m * m, dtype=bool)
            dense[keys] = True  # a pair key is a * m + b: the flat cell itself
            self.dense = dense

    def pairs(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Whether each pair ``(a[i], b[i])`` (``a < b``; arrays of any one shape) is tracked
        (size 2 only)."""
        return self.tracked(a * self.m + b)

    def tracked(self, key: np.ndarray) -> np.ndarray:
        """Whether each pair key ``a * m + b`` (any shape) is tracked (size 2 only)."""
        if self.dense is not None:
            hit: np.ndarray = self.dense[key]
            return hit
        _, found = lookup(self.keys, key.ravel())
        return found.reshape(key.shape)

    def all_subsets_present(self, rows: np.ndarray) -> np.ndarray:
        """Whether every (k-1)-subset of each ascending row of ``rows`` (``(n, k)``) is
        tracked."""
        n, k = rows.shape
        if self.size == 1 or n == 0:
            return np.ones(n, dtype=bool)
        ok = np.ones(n, dtype=bool)
        for cols in _drop_one(k):
            if self.size == 2:
                ok &= self.pairs(rows[:, cols[0]], rows[:, cols[1]])
            else:
                _, found = lookup(self.keys, pack(rows[:, cols], max(self.m, 1)))
                ok &= found
        return ok


@lru_cache(maxsize=16)
def _drop_one(k: int) -> tuple[list[int], ...]:
    """Column lists of the k subsets one item smaller: ``(1..k-1), (0, 2..k-1), ...``."""
    return tuple([c for c in range(k) if c != drop] for drop in range(k))


# ---- counts of one batch ----------------------------------------------------------------------


class _Triangle:
    """Pairs ``a < b`` of ids below ``m`` numbered row by row in the upper triangle:
    ``start[a] + (b - a - 1)`` with ``start[a] = a * (2m - a - 1) / 2``. Half the cells of
    ``a * m + b``, in the same order.

    >>> t = _Triangle(4)
    >>> t.of_keys(np.array([1, 2, 3, 6, 7, 11])).tolist()
    [0, 1, 2, 3, 4, 5]
    >>> t.to_keys(np.array([0, 4, 5])).tolist()
    [1, 7, 11]
    """

    __slots__ = ("cells", "m", "start")

    def __init__(self, m: int) -> None:
        a = np.arange(max(m, 1), dtype=np.int64)
        self.m = m
        self.start = a * (2 * m - a - 1) // 2
        self.cells = m * (m - 1) // 2

    def of_keys(self, keys: np.ndarray) -> np.ndarray:
        a, b = np.divmod(keys, self.m)
        index: np.ndarray = self.start[a] + (b - a - 1)
        return index

    def to_keys(self, index: np.ndarray) -> np.ndarray:
        a = np.searchsorted(self.start, index, side="right") - 1
        keys: np.ndarray = a * self.m + (index - self.start[a] + a + 1)
        return keys


class BatchCounts:
    """How often each k-itemset occurs in one batch: a dense array over the local key space
    (``dense[key]``), or sorted distinct keys with their counts."""

    __slots__ = ("counts", "dense", "keys", "triangle")

    def __init__(
        self,
        keys: np.ndarray | None = None,
        counts: np.ndarray | None = None,
        dense: np.ndarray | None = None,
        triangle: _Triangle | None = None,
    ) -> None:
        self.keys = keys
        self.counts = counts
        self.dense = dense
        #: when set, ``dense`` is indexed by pair position in the upper triangle (pairs only)
        self.triangle = triangle

    @classmethod
    def of_chunks(cls, chunks: Iterator[np.ndarray], cells: int | None, total: int) -> BatchCounts:
        """Count the keys of every chunk (one key per occurrence, ``total`` at most in all).

        ``cells`` is the key space when keys are int64 in ``[0, cells)``, else ``None``
        (bytes keys). A histogram when the space is small beside ``total``, else each chunk
        sorted and the chunks' runs summed.
        """
        dense_ok = cells is not None and cells <= _BINCOUNT_CELLS
        if dense_ok and cells is not None and cells <= _DENSE_PER_KEY * max(total, 1):
            dense: np.ndarray | None = None
            for keys in chunks:
                if keys.shape[0]:
                    part = np.bincount(keys, minlength=cells)
                    dense = part if dense is None else dense + part
            return cls(dense=dense if dense is not None else np.zeros(cells, dtype=np.int64))
        # small chunks (one per basket length) are pooled up to CHUNK keys before a sort; each
        # sorted pool is merged into the running total at once, so memory follows the number
        # of distinct keys, not the number of chunks
        total_keys = np.zeros(0, dtype=np.int64)
        total_counts = np.zeros(0, dtype=np.int64)
        pool: list[np.ndarray] = []
        pooled = 0
        for keys in chunks:
            pool.append(keys)
            pooled += keys.shape[0]
            if pooled >= CHUNK:
                total_keys, total_counts = _add_counts(
                    total_keys, total_counts, *_sorted_counts(_concat(pool), cells)
                )
                pool, pooled = [], 0
        if pooled or not total_keys.shape[0]:
            total_keys, total_counts = _add_counts(
                total_keys, total_counts, *_sorted_counts(_concat(pool), cells)
            )
        return cls(total_keys, total_counts)

    def take(self, keys: np.ndarray) -> np.ndarray:
        """The batch count of each of ``keys`` (0 for one absent from the batch)."""
        if not keys.shape[0]:
            return np.zeros(0, dtype=np.int64)
        if self.dense is not None:
            cells = keys if self.triangle is None else self.triangle.of_keys(keys)
            counts: np.ndarray = self.dense[cells].astype(np.int64)
            return counts
        assert self.keys is not None and self.counts is not None
        if not self.keys.shape[0]:
            return np.zeros(keys.shape[0], dtype=np.int64)
        pos, found = lookup(self.keys, keys)
        return np.where(found, self.counts[pos], 0)

    def fresh(self, min_count: int, tracked: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Sorted keys counted at least ``min_count`` times that are not in the sorted
        ``tracked``, with their counts (consumes a dense histogram)."""
        if self.dense is not None:
            dense, tri = self.dense, self.triangle
            if tracked.shape[0]:
                dense[tracked if tri is None else tri.of_keys(tracked)] = 0
            cells = np.flatnonzero(dense >= min_count)
            keys = cells if tri is None else tri.to_keys(cells)
            return keys, dense[cells].astype(np.int64)
        assert self.keys is not None and self.counts is not None
        sel = self.counts >= min_count
        if tracked.shape[0] and self.keys.shape[0]:
            _, found = lookup(tracked, self.keys)
            sel &= ~found
        return self.keys[sel], self.counts[sel]


def _add_counts(
    keys_a: np.ndarray, counts_a: np.ndarray, keys_b: np.ndarray, counts_b: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The sum of two sorted runs of distinct keys with counts (a key in both adds up).

    >>> [x.tolist() for x in _add_counts(np.array([1, 4]), np.array([1, 1]),
    ...                                   np.array([2, 4]), np.array([5, 5]))]
    [[1, 2, 4], [1, 5, 6]]
    """
    if not keys_a.shape[0]:
        return keys_b, counts_b
    if not keys_b.shape[0]:
        return keys_a, counts_a
    pos, found = lookup(keys_a, keys_b)
    counts_a = counts_a.copy()
    counts_a[pos[found]] += counts_b[found]
    fresh = ~found
    keys, counts = merge_sorted(keys_a, (counts_a,), keys_b[fresh], (counts_b[fresh],))
    return keys, counts


def _concat(parts: list[np.ndarray]) -> np.ndarray:
    if not parts:
        return np.zeros(0, dtype=np.int64)
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def _sorted_counts(keys: np.ndarray, cells: int | None) -> tuple[np.ndarray, np.ndarray]:
    """Distinct ``keys`` in order with how often each occurs."""
    if cells is None or keys.shape[0] == 0:  # bytes keys: one comparison sort
        uniq, counts = np.unique(keys, return_counts=True)
        return uniq, counts.astype(np.int64)
    ordered = radix_sorted(keys, cells)
    starts = np.flatnonzero(np.concatenate(([True], ordered[1:] != ordered[:-1])))
    counts = np.diff(np.append(starts, keys.shape[0]))
    return ordered[starts], counts.astype(np.int64)


def radix_sorted(keys: np.ndarray, cells: int) -> np.ndarray:
    """``keys`` (non-negative int64 below ``cells``) sorted by 16-bit digits, least significant
    first: each pass is a stable counting sort (numpy sorts 16-bit integers stably by radix),
    O(n) per digit and a few times cheaper than a comparison sort of int64.

    >>> radix_sorted(np.array([70000, 3, 65536, 2]), 1 << 17).tolist()
    [2, 3, 65536, 70000]
    """
    for shift in range(0, max(int(cells - 1).bit_length(), 1), 16):
        digit = ((keys >> shift) & 0xFFFF).astype(np.uint16)
        keys = keys[np.argsort(digit, kind="stable")]
    return keys


def merge_sorted(
    keys_a: np.ndarray,
    values_a: tuple[np.ndarray, ...],
    keys_b: np.ndarray,
    values_b: tuple[np.ndarray, ...],
) -> tuple[np.ndarray, ...]:
    """Merge two sorted runs of distinct keys (no key in both) and their value arrays.

    One binary search of ``keys_b`` in ``keys_a`` gives every element's final position, so
    nothing is re-sorted: O(a + b log a).

    >>> merge_sorted(np.array([2, 7]), (np.array([20, 70]),), np.array([1, 5, 9]),
    ...              (np.array([10, 50, 90]),))
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


# ---- enumeration ------------------------------------------------------------------------------


def _spans(weights: np.ndarray, limit: int) -> list[tuple[int, int]]:
    """Consecutive ranges ``[lo, hi)`` of ``weights`` whose sums stay within ``limit`` (a single
    heavier element gets a range of its own)."""
    n = weights.shape[0]
    total = int(weights.sum())
    if total <= limit:
        return [(0, n)] if n else []
    ends = np.cumsum(weights)
    out = []
    lo = 0
    while lo < n:
        base = int(ends[lo - 1]) if lo else 0
        hi = int(np.searchsorted(ends, base + limit, side="right"))
        hi = max(hi, lo + 1)
        out.append((lo, hi))
        lo = hi
    return out


def _pair_chunks(
    items: np.ndarray, later: np.ndarray, radix: int, triangle: _Triangle | None = None
) -> Iterator[np.ndarray]:
    """Keys ``a * radix + b`` (or triangle positions) of every pair of positions in one
    transaction, in chunks: the item at position ``p`` pairs with the ``later[p]`` items
    after it."""
    wide = items.astype(np.int64)
    first = wide * radix if triangle is None else triangle.start[wide] - wide - 1
    for lo, hi in _spans(later, CHUNK):
        lat = later[lo:hi]
        first_slot = np.cumsum(lat) - lat
        total = int(first_slot[-1] + lat[-1])
        starts = np.arange(lo + 1, hi + 1, dtype=np.int64)
        q = np.arange(total, dtype=np.int64) + np.repeat(starts - first_slot, lat)
        yield np.repeat(first[lo:hi], lat) + wide[q]


def _triple_chunks(
    items: np.ndarray, lengths: np.ndarray, radix: int, membership: Membership
) -> Iterator[np.ndarray]:
    """Keys of every triple of positions in one transaction whose three pairs are tracked.

    Baskets of at most ``_SHORT_BASKET`` items are taken by length: all ``C(L, 2)`` pairs of a
    group tested at once, combined per triple through index tables in boolean arrays, and
    only the triples that pass materialised. Longer baskets (whose tables would be large) go
    through bitsets of tracked pairs (:func:`_long_triple_chunks`).
    """
    wide = items.astype(np.int64)
    starts = np.zeros(lengths.shape[0] + 1, dtype=np.int64)
    np.cumsum(lengths, out=starts[1:])
    short = (lengths >= 3) & (lengths <= _SHORT_BASKET)
    for length in np.unique(lengths[short]).tolist():
        pairs, ab, ac, bc = _triple_pair_index(length)
        table = combination_table(length, 3)
        group = np.flatnonzero(lengths == length)
        step = max(1, CHUNK // table.shape[0])
        for lo in range(0, group.shape[0], step):
            g = group[lo : lo + step]
            mat = wide[starts[g][:, None] + np.arange(length)]
            pair_key = mat[:, pairs[:, 0]] * radix + mat[:, pairs[:, 1]]
            pair_ok = membership.tracked(pair_key)
            valid = pair_ok[:, ab] & pair_ok[:, ac] & pair_ok[:, bc]
            if valid.any():  # key of (a, b, c) = key of (a, b) * radix + c
                yield (pair_key[:, ab] * radix + mat[:, table[:, 2]])[valid]
    long = np.flatnonzero(lengths > _SHORT_BASKET)
    if long.shape[0]:
        yield from _long_triple_chunks(wide, starts[long], lengths[long], radix, membership)


def _long_triple_chunks(
    wide: np.ndarray, starts: np.ndarray, lengths: np.ndarray, radix: int, membership: Membership
) -> Iterator[np.ndarray]:
    """Triples of long baskets by bitsets: per basket the tracked pairs of its upper triangle
    as an ``L x L`` matrix, each row packed into bits; a tracked pair ``(p, q)`` completes to
    a triple with every ``r`` set in ``row[p] & row[q]``. Only passing triples are ever
    unpacked. Baskets go in groups of similar length (within a quarter of each other, at
    most ``CHUNK / 2`` matrix cells), padded to the group's longest."""
    order = np.argsort(lengths, kind="stable")
    starts, lengths = starts[order], lengths[order]
    for lo, hi in _length_groups(lengths, CHUNK // 2):
        width = int(lengths[hi - 1])  # the longest of the group
        g = hi - lo
        first = starts[lo:hi, None]
        mat = wide[first + np.minimum(np.arange(width)[None, :], lengths[lo:hi, None] - 1)]
        pi, pj = _upper_pairs(width)
        # pair (pi, pj) of a basket is real when pj < its length (then pi is too)
        tracked = membership.tracked(mat[:, pi] * radix + mat[:, pj])
        tracked &= pj[None, :] < lengths[lo:hi, None]
        ok = np.zeros((g, width, width), dtype=bool)
        ok[:, pi, pj] = tracked
        bits = np.packbits(ok, axis=2)
        j, t = np.nonzero(tracked)
        p, q = pi[t], pj[t]
        step = max(1, CHUNK // width)
        for lo2 in range(0, j.shape[0], step):
            jj, pp, qq = j[lo2 : lo2 + step], p[lo2 : lo2 + step], q[lo2 : lo2 + step]
            both = bits[jj, pp] & bits[jj, qq]
            has = both.any(axis=1)
            if not has.any():
                continue
            jj, pp, qq, both = jj[has], pp[has], qq[has], both[has]
            pair, r = np.nonzero(np.unpackbits(both, axis=1, count=width))
            jp = jj[pair]
            yield (mat[jp, pp[pair]] * radix + mat[jp, qq[pair]]) * radix + mat[jp, r]


def _length_groups(lengths: np.ndarray, budget: int) -> list[tuple[int, int]]:
    """Ranges of ascending ``lengths`` whose longest is within a quarter of the shortest and
    whose ``count x longest**2`` stays within ``budget`` (one basket at least)."""
    out = []
    lo, n = 0, lengths.shape[0]
    while lo < n:
        top = int(np.searchsorted(lengths, int(lengths[lo]) * 5 // 4, side="right"))
        hi = lo + 1
        while hi < top and (hi + 1 - lo) * int(lengths[hi]) ** 2 <= budget:
            hi += 1
        out.append((lo, hi))
        lo = hi
    return out


@lru_cache(maxsize=256)
def _upper_pairs(width: int) -> tuple[np.ndarray, np.ndarray]:
    """Positions ``(i, j)``, ``i < j < width``, row by row."""
    i, j = np.triu_indices(width, 1)
    return i.astype(np.int64), j.astype(np.int64)


@lru_cache(maxsize=64)
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


def _generic_chunks(
    items: np.ndarray, lengths: np.ndarray, k: int, m: int, membership: Membership
) -> Iterator[np.ndarray]:
    """Keys of the k-combinations (k >= 4) whose subsets are tracked: transactions grouped by
    length, each group indexed once with the combination table."""
    starts = np.zeros(lengths.shape[0] + 1, dtype=np.int64)
    np.cumsum(lengths, out=starts[1:])
    for length in np.unique(lengths[lengths >= k]).tolist():
        table = combination_table(length, k)
        group = np.flatnonzero(lengths == length)
        step = max(1, CHUNK // table.shape[0])
        for lo in range(0, group.shape[0], step):
            g = group[lo : lo + step]
            mat = items[starts[g][:, None] + np.arange(length)]
            combos = mat[:, table].reshape(-1, k)
            combos = combos[membership.all_subsets_present(combos)]
            if combos.shape[0]:
                yield pack(combos, max(m, 1))


def count_batch(
    items: np.ndarray, txn: np.ndarray, t: int, k: int, m: int, membership: Membership
) -> BatchCounts:
    """Count the k-itemsets of a batch whose every (k-1)-subset is tracked.

    ``items``/``txn`` list each transaction's surviving local ids (ascending within a
    transaction, transactions ``0..t-1`` in order); keys are packed in radix ``m``.

    >>> from streamcount.engine.keys import pack
    >>> items, txn = np.array([0, 1, 2, 1, 2]), np.array([0, 0, 0, 1, 1])
    >>> c = count_batch(items, txn, 2, 2, 3, Membership(np.arange(3), 3, 1))
    >>> c.take(pack(np.array([[0, 1], [1, 2], [0, 2]]), 3)).tolist()
    [1, 2, 1]
    """
    radix = max(m, 1)
    cells = radix**k if fits_int64(radix, k) else None
    lengths = np.bincount(txn, minlength=t)
    if items.size == 0 or int(lengths.max()) < k:
        return BatchCounts.of_chunks(iter(()), cells, 0)
    ends = np.cumsum(lengths)
    later = ends[txn] - np.arange(items.shape[0], dtype=np.int64) - 1
    if k == 2:
        total = int(later.sum())
        tri = _Triangle(radix)
        if tri.cells <= _BINCOUNT_CELLS and tri.cells <= _DENSE_PER_KEY * max(total, 1):
            dense: np.ndarray | None = None
            for keys in _pair_chunks(items, later, radix, tri):
                part = np.bincount(keys, minlength=tri.cells)
                dense = part if dense is None else dense + part
            if dense is None:
                dense = np.zeros(tri.cells, dtype=np.int64)
            return BatchCounts(dense=dense, triangle=tri)
        return BatchCounts.of_chunks(_pair_chunks(items, later, radix), cells, total)
    if k == 3 and cells is not None:
        # the pairs of positions stand in for the number of triples in the choice of counting
        # method (a histogram of m**3 cells only pays for tiny m)
        chunks = _triple_chunks(items, lengths, radix, membership)
        return BatchCounts.of_chunks(chunks, cells, int(later.sum()))
    return BatchCounts.of_chunks(_generic_chunks(items, lengths, k, m, membership), cells, 0)


def unpack_local(keys: np.ndarray, m: int, size: int) -> np.ndarray:
    """Rows of local ids (int64) from keys packed in radix ``m``."""
    return unpack(keys, max(m, 1), size).astype(np.int64)
