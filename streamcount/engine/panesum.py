"""Pane-sum maths: the window as the sum of its panes' summaries.

Each pane keeps its own summary with the same epsilon (so the same bucket width ``w``). The
window's estimate of an itemset is the sum over its panes (the pane scheme): with
``B_j = ceil(n_j / w)`` the bound on anything a pane does not track::

    count(X) = sum_j f_j(X)                      (0 where pane j does not track X)
    upper(X) = sum_j (f_j + delta_j  if tracked else  B_j)
    max_error = sum_j B_j  <=  epsilon * N + (panes whose length is not a multiple of w)

Splitting the window into panes costs memory, not accuracy. A pane that leaves the window is
subtracted exactly (:func:`subtract_panes`); summaries of disjoint parts of a feed (panes, or
the same pane on several workers) add up by the same rule (Agarwal et al., "Mergeable
summaries", PODS 2012, for the general idea; the Lossy Counting rule is the pane scheme).

Worked example (``w = 4``): panes of 10, 10 and 6 transactions give ``B = 3, 3, 2`` and
``max_error = 8``; an itemset tracked in the first two panes as ``(f, delta) = (5, 1), (7, 0)``
and absent from the third has ``count = 12`` and ``upper = 6 + 7 + 2 = 15``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from streamcount.engine.keys import lookup, pack, unique_with_sum
from streamcount.engine.pane import Pane
from streamcount.engine.snapshot import LevelCounts, WindowSnapshot

__all__ = ["PaneSum", "combine_panes", "merge_sums", "subtract_panes", "sum_panes"]


_Part = tuple[np.ndarray, np.ndarray, np.ndarray, int, np.ndarray]


def _sum_parts(size: int, parts: Sequence[_Part], radix: int) -> tuple[LevelCounts, np.ndarray]:
    """Sum ``(items, lower, upper, absent bound, presence)`` parts of one itemset size.

    The upper bound of an itemset is its own upper bound in each part that lists it plus the
    part's absent bound where it is missing: summed as ``sum(upper - absent) + sum(absent)``.
    ``presence`` counts the panes that track each entry (what a later subtraction needs).
    """
    total_absent = sum(p[3] for p in parts)  # every part counts, listed entries or not
    parts = [p for p in parts if p[0].shape[0]]
    if not parts:
        return LevelCounts.empty(size), np.zeros(0, dtype=np.int64)
    if len(parts) == 1:  # one part: already sorted and unique
        items, low, high, absent, presence = parts[0]
        count, upper = low.copy(), high + (total_absent - absent)
    else:
        rows = np.concatenate([p[0] for p in parts])
        low_all = np.concatenate([p[1] for p in parts])
        extra = np.concatenate([p[2] - p[3] for p in parts])
        pres_all = np.concatenate([p[4] for p in parts])
        _, first, (count, upper_extra, presence) = unique_with_sum(
            pack(rows, radix), low_all, extra, pres_all
        )
        items = rows[first]
        upper = upper_extra + total_absent
    for arr in (items, count, upper):
        arr.setflags(write=False)
    return LevelCounts(size, items, count, upper), presence


@dataclass(frozen=True, slots=True)
class PaneSum:
    """A window snapshot with what it was summed from, so that panes can later be subtracted
    from it exactly: the panes (with their transaction counts at the time) and, per level,
    how many of them track each entry."""

    snapshot: WindowSnapshot
    presence: tuple[np.ndarray, ...]
    panes: tuple[tuple[Pane, int], ...]


def _snapshot_of(
    panes: Sequence[Pane],
    levels: Sequence[LevelCounts],
    *,
    item_names: Sequence[str],
    epsilon: float,
    pane_size: int | None,
) -> WindowSnapshot:
    ts_min = [p.min_ts for p in panes if p.min_ts is not None]
    ts_max = [p.max_ts for p in panes if p.max_ts is not None]
    return WindowSnapshot(
        first_seq=min((p.first_seq for p in panes), default=0),
        last_seq=max((p.last_seq for p in panes), default=0),
        transactions=sum(p.counted for p in panes),
        max_error=sum(p.absent_bound for p in panes),
        epsilon=epsilon,
        pane_size=pane_size,
        panes=len(panes),
        levels=tuple(levels),
        item_names=item_names,
        first_ts=min(ts_min) if ts_min else None,
        last_ts=max(ts_max) if ts_max else None,
    )


def sum_panes(
    panes: Sequence[Pane],
    *,
    item_names: Sequence[str],
    epsilon: float,
    max_itemset_size: int,
    pane_size: int | None,
) -> PaneSum:
    """Sum pane summaries (the pane scheme above) into a :class:`PaneSum`.

    Cost: one concatenation and one stable sort (a merge of the panes' sorted runs) per
    itemset size over all panes' tracked entries; nothing to merge for a single pane.
    """
    live = [p for p in panes if p.counted > 0]
    radix = max(len(item_names), 1)
    levels, presence = [], []
    for k in range(1, max_itemset_size + 1):
        parts = []
        for p in live:
            lv = p.summary.levels[k - 1]
            ones = np.ones(len(lv), dtype=np.int64)
            parts.append((lv.items, lv.f, lv.f + lv.delta, p.absent_bound, ones))
        level, pres = _sum_parts(k, parts, radix)
        levels.append(level)
        presence.append(pres)
    snap = _snapshot_of(live, levels, item_names=item_names, epsilon=epsilon, pane_size=pane_size)
    return PaneSum(snap, tuple(presence), tuple((p, p.counted) for p in live))


def combine_panes(
    panes: Sequence[Pane],
    *,
    item_names: Sequence[str],
    epsilon: float,
    max_itemset_size: int,
    pane_size: int | None,
) -> WindowSnapshot:
    """Sum pane summaries into a frozen :class:`WindowSnapshot` (see :func:`sum_panes`)."""
    return sum_panes(
        panes,
        item_names=item_names,
        epsilon=epsilon,
        max_itemset_size=max_itemset_size,
        pane_size=pane_size,
    ).snapshot


def merge_sums(a: PaneSum, b: PaneSum) -> PaneSum:
    """The sum over the panes of ``a`` and ``b`` (disjoint), from the two sums: the same
    pane-sum rule, a missing itemset counting 0 below and the part's ``max_error`` above.

    Cost: a merge of two sorted runs per itemset size.
    """
    sa, sb = a.snapshot, b.snapshot
    if sa.transactions == 0:
        return b
    if sb.transactions == 0:
        return a
    names = sa.item_names if len(sa.item_names) >= len(sb.item_names) else sb.item_names
    radix = max(len(names), 1)
    levels, presence = [], []
    for la, pa, lb, pb in zip(sa.levels, a.presence, sb.levels, b.presence, strict=True):
        if len(la) < len(lb):  # insert the smaller side into the larger
            la, pa, lb, pb = lb, pb, la, pa
            ea, eb = sb.max_error, sa.max_error
        else:
            ea, eb = sa.max_error, sb.max_error
        level, pres = _merge_two(la, pa, ea, lb, pb, eb, radix)
        levels.append(level)
        presence.append(pres)
    panes = a.panes + b.panes
    snap = _snapshot_of(
        [p for p, _ in panes],
        levels,
        item_names=names,
        epsilon=sa.epsilon,
        pane_size=sa.pane_size,
    )
    return PaneSum(snap, tuple(presence), panes)


def _merge_two(
    a: LevelCounts,
    pres_a: np.ndarray,
    absent_a: int,
    b: LevelCounts,
    pres_b: np.ndarray,
    absent_b: int,
    radix: int,
) -> tuple[LevelCounts, np.ndarray]:
    """Sum two sorted levels by inserting ``b`` into ``a`` (``a`` the larger one).

    Same rule as :func:`_sum_parts`, in O(len(a) + len(b) log len(a)): a binary search of
    ``b``'s keys in ``a``'s, additions where found, one ordered insertion of the rest.
    """
    extra_a = a.upper - absent_a
    if not len(b):
        count, extra, pres, items = a.count.copy(), extra_a, pres_a.copy(), a.items
    else:
        keys_a = pack(a.items, radix)
        keys_b = pack(b.items, radix)
        pos = np.searchsorted(keys_a, keys_b)
        found = np.zeros(len(b), dtype=bool)
        inside = pos < len(a)
        found[inside] = keys_a[pos[inside]] == keys_b[inside]
        extra_b = b.upper - absent_b
        count, extra, pres = a.count.copy(), extra_a.copy(), pres_a.copy()
        hit = pos[found]
        count[hit] += b.count[found]
        extra[hit] += extra_b[found]
        pres[hit] += pres_b[found]
        new = ~found
        at = pos[new]
        items = np.insert(a.items, at, b.items[new], axis=0)
        count = np.insert(count, at, b.count[new])
        extra = np.insert(extra, at, extra_b[new])
        pres = np.insert(pres, at, pres_b[new])
    upper = extra + absent_a + absent_b
    for arr in (items, count, upper):
        arr.setflags(write=False)
    return LevelCounts(a.size, items, count, upper), pres


def subtract_panes(total: PaneSum, gone: Sequence[Pane]) -> PaneSum:
    """``total`` without the panes ``gone`` (each must be one of its panes, unchanged since):
    their counts are subtracted exactly and entries no remaining pane tracks are dropped.

    Worked example (``w = 4``): an itemset tracked in two panes of 10 as ``(5, 1)`` and
    ``(7, 0)`` has ``count 12``, ``upper 6 + 7 = 13`` and presence 2; subtracting the first
    pane leaves ``count 7``, ``upper 13 - 3 - (6 - 3) = 7`` and presence 1.

    Cost: one binary search per entry of the panes removed, and one pass over the total.
    """
    gone_ids = {id(p) for p in gone}
    keep_panes = tuple((p, n) for p, n in total.panes if id(p) not in gone_ids)
    snap = total.snapshot
    names = snap.item_names
    radix = max(len(names), 1)
    removed_absent = sum(p.absent_bound for p in gone)
    levels, presence = [], []
    for level, pres in zip(snap.levels, total.presence, strict=True):
        count = level.count.copy()
        upper = level.upper - removed_absent
        pres = pres.copy()
        keys = pack(level.items, radix) if len(level) else None
        for p in gone:
            lv = p.summary.levels[level.size - 1]
            if not len(lv):
                continue
            assert keys is not None
            pos, found = lookup(keys, pack(lv.items, radix))
            if not found.all():
                raise ValueError("subtract_panes: a removed pane has entries the total lacks")
            count[pos] -= lv.f
            upper[pos] -= lv.f + lv.delta - p.absent_bound
            pres[pos] -= 1
        keep = pres > 0
        items, count, upper, pres = level.items[keep], count[keep], upper[keep], pres[keep]
        for arr in (items, count, upper):
            arr.setflags(write=False)
        levels.append(LevelCounts(level.size, items, count, upper))
        presence.append(pres)
    new = _snapshot_of(
        [p for p, _ in keep_panes],
        levels,
        item_names=names,
        epsilon=snap.epsilon,
        pane_size=snap.pane_size,
    )
    return PaneSum(new, tuple(presence), keep_panes)
