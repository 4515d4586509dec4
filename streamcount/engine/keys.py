"""Integer keys for itemsets, so whole batches of itemsets sort, merge and search in numpy.

An itemset of size ``k`` is a row of ``k`` ascending int32 item ids. A block of rows packs into
one int64 per row in mixed radix (``((a*R + b)*R + c``) when ``R**k < 2**63``; otherwise into a
fixed-width bytes key (big-endian uint32 columns), whose byte order is the same lexicographic
order. Either way the keys of a block sort in the lexicographic order of its rows, so a sorted
key array and the row array it came from stay aligned.

Cost: packing is O(n*k) vectorised; ``unique_rows`` is one sort, O(n log n).
"""

from __future__ import annotations

from functools import lru_cache
from itertools import combinations

import numpy as np

__all__ = ["combination_table", "fits_int64", "lookup", "pack", "unique_with_sum", "unpack"]

_INT64_LIMIT = 2**63


def fits_int64(radix: int, size: int) -> bool:
    """True when rows of ``size`` ids below ``radix`` pack into int64 without overflow."""
    # int ** int is typed Any (a negative exponent gives a float); both are >= 0 here
    fits: bool = int(radix) ** int(size) < _INT64_LIMIT
    return fits


def pack(rows: np.ndarray, radix: int) -> np.ndarray:
    """Pack an ``(n, k)`` array of ids below ``radix`` into one sortable key per row.

    >>> pack(np.array([[1, 2], [0, 3]]), 10).tolist()
    [12, 3]
    """
    rows = np.asarray(rows)
    n, k = rows.shape
    if fits_int64(radix, k):
        if k == 0:
            return np.zeros(n, dtype=np.int64)
        key = rows[:, 0].astype(np.int64)
        for j in range(1, k):
            key *= radix
            key += rows[:, j]
        return key
    be = np.ascontiguousarray(rows, dtype=">u4")
    return be.view(f"V{4 * k}").reshape(n)


def unpack(keys: np.ndarray, radix: int, size: int) -> np.ndarray:
    """Inverse of :func:`pack`: an ``(n, size)`` int32 array of ids.

    >>> unpack(np.array([12, 3]), 10, 2).tolist()
    [[1, 2], [0, 3]]
    """
    n = keys.shape[0]
    if keys.dtype.kind == "V":
        return keys.view(">u4").reshape(n, size).astype(np.int32)
    out = np.empty((n, size), dtype=np.int32)
    rest = keys.astype(np.int64, copy=True)
    for j in range(size - 1, -1, -1):
        out[:, j] = rest % radix
        rest //= radix
    return out


def lookup(sorted_keys: np.ndarray, queries: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positions of ``queries`` in ``sorted_keys`` and whether each was found.

    >>> pos, found = lookup(np.array([3, 12, 40]), np.array([12, 5]))
    >>> pos.tolist(), found.tolist()
    ([1, 1], [True, False])
    """
    n = sorted_keys.shape[0]
    pos = np.searchsorted(sorted_keys, queries)
    if n == 0:
        return pos, np.zeros(queries.shape[0], dtype=bool)
    clipped = np.minimum(pos, n - 1)
    found = sorted_keys[clipped] == queries
    return clipped, found


def unique_with_sum(
    keys: np.ndarray, *values: np.ndarray
) -> tuple[np.ndarray, np.ndarray, tuple[np.ndarray, ...]]:
    """Sorted unique keys, the index of each key's first occurrence, and per-key sums.

    >>> k, first, (s,) = unique_with_sum(np.array([5, 1, 5]), np.array([1, 2, 3]))
    >>> k.tolist(), s.tolist()
    ([1, 5], [2, 4])
    """
    order = np.argsort(keys, kind="stable")
    sk = keys[order]
    n = sk.shape[0]
    if n == 0:
        return sk, order, tuple(np.zeros(0, dtype=v.dtype) for v in values)
    starts = np.flatnonzero(np.concatenate(([True], sk[1:] != sk[:-1])))
    sums = tuple(np.add.reduceat(v[order], starts) for v in values)
    return sk[starts], order[starts], sums


@lru_cache(maxsize=1024)
def combination_table(length: int, size: int) -> np.ndarray:
    """All ``size``-combinations of ``range(length)`` in lexicographic order, as an int32 array.

    >>> combination_table(4, 2).tolist()
    [[0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3]]
    """
    table = np.fromiter(
        (i for combo in combinations(range(length), size) for i in combo), dtype=np.int32
    )
    table = table.reshape(-1, size)
    table.setflags(write=False)
    return table
