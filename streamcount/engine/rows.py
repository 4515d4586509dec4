"""Transactions as CSR rows of item ids (``flat`` ids one transaction after another, and
``lengths``): the row operations the engine needs, vectorised over a whole chunk."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from streamcount.engine.counters import Level

__all__ = ["renumber", "select_rows", "sort_dedupe"]


def renumber(levels: Sequence[Level], ids: np.ndarray) -> list[Level]:
    """``levels`` with every item id ``i`` replaced by ``ids[i]``, rows re-sorted (ascending
    ids within a row, rows in lexicographic order)."""
    out = []
    for k, level in enumerate(levels, start=1):
        rows = np.asarray(level.items).reshape(-1, k)
        rows = np.sort(ids[rows], axis=1) if rows.size else rows.astype(np.int32)
        order = np.lexsort(rows.T[::-1]) if rows.shape[0] else np.zeros(0, dtype=np.int64)
        f = np.asarray(level.f, dtype=np.int64)
        delta = np.asarray(level.delta, dtype=np.int64)
        out.append(Level(rows[order].astype(np.int32), f[order], delta[order]))
    return out


def select_rows(
    flat: np.ndarray, lengths: np.ndarray, ok: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The rows ``ok`` of a CSR chunk."""
    return flat[np.repeat(ok, lengths)], lengths[ok]


def sort_dedupe(
    flat: np.ndarray, lengths: np.ndarray, vocab_size: int
) -> tuple[np.ndarray, np.ndarray]:
    """Sort the ids of each transaction and drop repeats, all transactions at once."""
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
    combined.sort()
    keep = np.concatenate(([True], combined[1:] != combined[:-1]))
    combined = combined[keep]
    new_txn = combined // radix
    return (combined % radix).astype(np.int32), np.bincount(new_txn, minlength=t).astype(np.int64)
