"""Transactions as CSR rows of item ids (``flat`` ids one transaction after another, and
``lengths``): the row operations the engine needs, vectorised over a whole chunk."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from streamcount.engine.batchcount import radix_sorted
from streamcount.engine.counters import Level
from streamcount.engine.keys import fits_int64, pack

__all__ = ["renumber", "select_rows", "sort_dedupe"]


def renumber(levels: Sequence[Level], ids: np.ndarray) -> list[Level]:
    """``levels`` with every item id ``i`` replaced by ``ids[i]``, rows re-sorted (ascending
    ids within a row, rows in lexicographic order); nothing is sorted when ``ids`` is
    increasing (the order is kept).

    >>> lv = Level(np.array([[0, 1], [0, 2]], dtype=np.int32), np.array([5, 6]), np.array([0, 0]))
    >>> out = renumber([Level.empty(1), lv], np.array([9, 4, 2]))[1]
    >>> out.items.tolist(), out.f.tolist()
    ([[2, 9], [4, 9]], [6, 5])
    """
    ids = np.asarray(ids, dtype=np.int64)
    increasing = bool((np.diff(ids) > 0).all())
    out = []
    for k, level in enumerate(levels, start=1):
        rows = np.asarray(level.items).reshape(-1, k)
        f = np.asarray(level.f, dtype=np.int64)
        delta = np.asarray(level.delta, dtype=np.int64)
        if not rows.shape[0]:
            out.append(Level.empty(k))
            continue
        rows = ids[rows]
        if not increasing:
            rows = _sort_rows(rows)
            radix = int(rows.max()) + 1
            if fits_int64(radix, k):
                order = np.argsort(pack(rows, radix))  # keys are distinct: any sort will do
            else:
                order = np.lexsort(rows.T[::-1])
            rows, f, delta = rows[order], f[order], delta[order]
        out.append(Level(rows.astype(np.int32), f, delta))
    return out


def _sort_rows(rows: np.ndarray) -> np.ndarray:
    """Each row ascending: a sorting network of minimum/maximum for up to three columns (ten
    times faster than ``np.sort(axis=1)`` on such short rows), else ``np.sort``."""
    k = rows.shape[1]
    if k == 1:
        return rows
    if k == 2:
        a, b = rows[:, 0], rows[:, 1]
        return np.stack((np.minimum(a, b), np.maximum(a, b)), axis=1)
    if k == 3:
        a, b, c = rows[:, 0], rows[:, 1], rows[:, 2]
        a, b = np.minimum(a, b), np.maximum(a, b)
        b, c = np.minimum(b, c), np.maximum(b, c)
        a, b = np.minimum(a, b), np.maximum(a, b)
        return np.stack((a, b, c), axis=1)
    return np.sort(rows, axis=1)


def take_rows(
    rows: np.ndarray, flat: np.ndarray, lengths: np.ndarray, keep: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The CSR ``flat``/``lengths`` of ``rows`` (ascending) restricted to the rows ``keep``
    (ascending, a subset of ``rows``)."""
    if keep.shape[0] == rows.shape[0]:
        return flat, lengths
    which = np.searchsorted(rows, keep)
    ends = np.cumsum(lengths)
    sel = lengths[which]
    starts = ends[which] - sel
    take = np.repeat(starts - (np.cumsum(sel) - sel), sel) + np.arange(int(sel.sum()))
    return flat[take], sel


def select_rows(
    flat: np.ndarray, lengths: np.ndarray, ok: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The rows ``ok`` of a CSR chunk."""
    return flat[np.repeat(ok, lengths)], lengths[ok]


def sort_dedupe(
    flat: np.ndarray, lengths: np.ndarray, vocab_size: int
) -> tuple[np.ndarray, np.ndarray]:
    """Sort the ids of each transaction and drop repeats, all transactions at once (one radix
    sort of ``transaction * radix + id`` keys).

    >>> flat, lengths = sort_dedupe(np.array([3, 1, 3, 2, 0]), np.array([3, 2]), 4)
    >>> flat.tolist(), lengths.tolist()
    ([1, 3, 0, 2], [2, 2])
    """
    t = lengths.shape[0]
    if flat.size == 0:
        return flat, lengths
    txn = np.repeat(np.arange(t, dtype=np.int64), lengths)
    radix = max(vocab_size, 1)
    combined = txn * radix + flat
    # already ascending and distinct within every transaction? (common for sorted feeds)
    step = np.diff(combined)
    if (step > 0).all():
        return flat, lengths
    combined = radix_sorted(combined, t * radix)
    keep = np.concatenate(([True], combined[1:] != combined[:-1]))
    combined = combined[keep]
    new_txn = combined // radix
    return (combined % radix).astype(np.int32), np.bincount(new_txn, minlength=t).astype(np.int64)
