"""A pane merged from the summaries of disjoint parts of a feed (one per worker).

Workers count disjoint partitions of one feed with the same settings, each into its own
time-based panes; the panes of one index line up (``floor(ts / pane_seconds)``). Their
Lossy Counting summaries add up by the pane-sum rule of :mod:`streamcount.engine.panesum`:
for parts ``i`` with ``n_i`` transactions and absent bounds ``B_i = ceil(n_i / w)``::

    f(X)      = sum_i f_i(X)                          (0 where part i does not track X)
    upper(X)  = sum_i (f_i + delta_i  if tracked else  B_i)
    absent    = sum_i B_i         (the bound on an itemset no part tracks)

so the merged pane's absent bound is the **sum of the parts' bounds**, not ``ceil(sum n_i /
w)``: a part that did not track ``X`` may have missed up to ``B_i`` of it. Every Lossy Counting
guarantee carries over with that bound (``f <= true <= f + delta``, ``delta <= absent``,
downward closed: a union of downward-closed sets is one), and ``absent <= epsilon * n +
parts``. With epsilon 0 every ``B_i`` is 0 and the merge is the exact count of the union.

:func:`merge_parts` does the sum in name space (each part's ids index its own names, as they
travel in :mod:`streamcount.engine.wire`); :class:`MergedSummary` holds the result with its
explicit absent bound, and :meth:`streamcount.engine.engine.Engine.add_merged_pane` puts it in
a window. Cost: one sort per itemset size over the parts' tracked entries; a Python step per
distinct *name* (never per itemset).

Worked example (``w = 4``): parts of 10 and 6 transactions (``B = 3, 2``); an itemset tracked
in the first as ``(f, delta) = (5, 1)`` and absent from the second merges into ``f = 5``,
``upper = 6 + 2 = 8``, and the merged pane's absent bound is 5 (``ceil(16 / 4)`` would be 4).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from streamcount.engine.counters import Level, LossySummary
from streamcount.engine.keys import PairSet
from streamcount.engine.rows import renumber

__all__ = ["MergedPane", "MergedSummary", "PanePart", "merge_parts"]


class MergedSummary(LossySummary):
    """A closed pane's summary merged from parts: Lossy Counting entries and an explicit
    absent bound (the sum of the parts' bounds) instead of ``ceil(n / w)``.

    Implements the :class:`~streamcount.engine.counters.Summary` protocol; nothing is ever
    added to it (:meth:`add_batch` refuses), it is merged whole.

    Parameters
    ----------
    epsilon, max_itemset_size:
        The settings every part was counted with.
    n:
        Transactions of all parts.
    levels:
        One :class:`~streamcount.engine.counters.Level` per itemset size (rows ascending,
        in lexicographic order; ``delta`` at most ``absent``).
    absent:
        The bound on the true count of an itemset no part tracks.
    parts:
        How many parts were merged (each may add one to the bound beyond ``epsilon * n``).

    Examples
    --------
    >>> lv = Level(np.array([[0]], dtype=np.int32), np.array([5]), np.array([1]))
    >>> s = MergedSummary(0.25, 1, 16, [lv], absent=5, parts=2)
    >>> s.bounds([0]), s.bounds([1]), s.b_current
    ((5, 6), (0, 5), 5)
    """

    __slots__ = ("absent", "parts")

    def __init__(
        self,
        epsilon: float,
        max_itemset_size: int,
        n: int,
        levels: Sequence[Level],
        *,
        absent: int,
        parts: int,
    ) -> None:
        super().__init__(epsilon, max_itemset_size)
        if len(levels) != max_itemset_size:
            raise ValueError(f"{len(levels)} levels for max_itemset_size={max_itemset_size}")
        if absent < 0 or n < 0 or parts < 1:
            raise ValueError(f"n={n}, absent={absent}, parts={parts}: must be >= 0, >= 0, >= 1")
        self.n = int(n)
        self._levels = list(levels)
        self.absent = int(absent)
        self.parts = int(parts)

    @property
    def b_current(self) -> int:
        """The merged absent bound: the sum of the parts' ``ceil(n_i / w)``."""
        return self.absent

    def add_batch(self, indptr: np.ndarray, items: np.ndarray) -> None:
        """A merged pane is closed: counting more into it would break the parts' bounds."""
        raise ValueError("a merged pane summary takes no more transactions")

    @classmethod
    def from_arrays(
        cls,
        epsilon: float,
        max_itemset_size: int,
        n: int,
        arrays: dict[str, np.ndarray],
        prefix: str,
        excluded_pairs: PairSet | None = None,
        *,
        absent: int = 0,
        parts: int = 1,
    ) -> MergedSummary:
        """Read back what :meth:`to_arrays` wrote (with the bound kept beside it);
        ``excluded_pairs`` is not used (a merged pane counts nothing more)."""
        plain = LossySummary.from_arrays(epsilon, max_itemset_size, n, arrays, prefix)
        return cls(epsilon, max_itemset_size, n, plain.levels, absent=absent, parts=parts)

    def check_invariants(self) -> None:
        super().check_invariants()
        if self.width:
            assert self.absent <= self.epsilon * self.n + self.parts + 1e-9 * self.n, (
                f"absent bound {self.absent} above epsilon*n + parts"
            )
        else:
            assert self.absent == 0, "an exact merged pane with an absent bound"


@dataclass(frozen=True, slots=True)
class PanePart:
    """One part of a pane: a worker's summary, its ids indexing ``names``.

    Attributes
    ----------
    levels:
        One level per itemset size (rows ascending, in lexicographic order).
    names:
        Item names by the part's own ids.
    transactions:
        Transactions the part counted.
    absent_bound:
        Its bound on an itemset it does not track (``ceil(n / w)``; 0 when exact).
    """

    levels: tuple[Level, ...]
    names: Sequence[str]
    transactions: int
    absent_bound: int


@dataclass(frozen=True, slots=True)
class MergedPane:
    """The sum of a pane's parts: levels over ``names`` (sorted), with the summed bound."""

    levels: tuple[Level, ...]
    names: tuple[str, ...]
    transactions: int
    absent_bound: int
    parts: int


def merge_parts(parts: Sequence[PanePart], max_itemset_size: int) -> MergedPane:
    """Sum the parts of one pane (the pane-sum rule, module notes); the result's ids index its
    ``names``, the sorted union of the parts' names.

    Raises
    ------
    ValueError
        No part, or a part whose levels do not match ``max_itemset_size``.
    """
    # the pane-sum rule itself (panesum imports the pane, which imports this module)
    from streamcount.engine.panesum import _sum_parts

    if not parts:
        raise ValueError("merge_parts: no part to merge")
    union = sorted({name for part in parts for name in part.names})
    index = {name: i for i, name in enumerate(union)}
    radix = max(len(union), 1)
    mapped = []
    for part in parts:
        if len(part.levels) != max_itemset_size:
            raise ValueError(
                f"a part has {len(part.levels)} levels, max_itemset_size is {max_itemset_size}"
            )
        ids = np.fromiter((index[n] for n in part.names), dtype=np.int64, count=len(part.names))
        mapped.append(renumber(part.levels, ids))
    levels = []
    for k in range(1, max_itemset_size + 1):
        pieces = []
        for part, lv in zip(parts, mapped, strict=True):
            level = lv[k - 1]
            ones = np.ones(len(level), dtype=np.int64)
            pieces.append((level.items, level.f, level.f + level.delta, part.absent_bound, ones))
        summed, _ = _sum_parts(k, pieces, radix)
        count = np.asarray(summed.count, dtype=np.int64)
        levels.append(
            Level(
                np.array(summed.items, dtype=np.int32).reshape(-1, k),
                count.copy(),
                np.asarray(summed.upper, dtype=np.int64) - count,
            )
        )
    return MergedPane(
        tuple(levels),
        tuple(union),
        sum(p.transactions for p in parts),
        sum(p.absent_bound for p in parts),
        len(parts),
    )
