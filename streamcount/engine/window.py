"""The sliding window: a run of consecutive panes, in pane order, with expiry and warm-up.

:class:`SlidingWindow` owns the panes (kept by index in a ``SortedDict``), decides which of
them make up the window, drops the ones that left it, says when the first window is full
(the end of warm-up) and sums the live panes into frozen snapshots (:mod:`.panesum`). It
knows nothing of how transactions reach a pane: the engine routes and batches them.

Pane indices: count-based windows number panes ``(seq - 1) // pane_size``; time-based ones
``floor(ts / pane_seconds)``. The window ends at the newest pane that has counted
transactions (``newest_index``) and holds ``window_panes`` panes back from it. A pane leaves
only once it is closed (so rules and alerts have seen it whole).

At every pane close :meth:`SlidingWindow.split_snapshot` gives the whole window, its newest
panes (the *recent* part) and the rest (the *baseline*); the previous window's sum is cached
and the expired panes are subtracted from it exactly, so a close never re-sums every pane.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from itertools import pairwise
from typing import Any

import numpy as np
from sortedcontainers import SortedDict

from streamcount.engine.keys import PairSet
from streamcount.engine.pane import Pane
from streamcount.engine.panesum import PaneSum, merge_sums, subtract_panes, sum_panes
from streamcount.engine.snapshot import WindowSnapshot

__all__ = ["SlidingWindow"]


class SlidingWindow:
    """The panes of a sliding window of ``window_panes`` panes.

    Parameters
    ----------
    window_panes:
        Panes in a full window.
    epsilon, max_itemset_size:
        The settings of every pane's summary.
    pane_size:
        Transactions per pane for a count-based window (``None`` for a time-based one);
        written into snapshots.
    excluded_pairs:
        Item pairs no pane counts (an item with its own catalogue ancestor), shared with the
        engine; ``None``: none.

    Notes
    -----
    Memory: the live panes' summaries and buffers, plus one cached window sum (shared arrays
    with the last snapshot handed out).
    """

    __slots__ = (
        "_sum_cache",
        "closed_through",
        "epsilon",
        "excluded_pairs",
        "first_index",
        "max_itemset_size",
        "newest_index",
        "pane_size",
        "panes",
        "window_panes",
    )

    def __init__(
        self,
        window_panes: int,
        *,
        epsilon: float,
        max_itemset_size: int,
        pane_size: int | None,
        excluded_pairs: PairSet | None = None,
    ) -> None:
        self.excluded_pairs = excluded_pairs
        self.window_panes = int(window_panes)
        self.epsilon = float(epsilon)
        self.max_itemset_size = int(max_itemset_size)
        self.pane_size = pane_size
        #: live panes by index, kept in index order
        self.panes: SortedDict[int, Pane] = SortedDict()
        #: highest pane index that has counted transactions (the window's end)
        self.newest_index = -1
        #: lowest pane index ever opened (for the warm-up test of time-based windows)
        self.first_index: int | None = None
        #: every pane index <= this is closed
        self.closed_through = -1
        #: the window summed at the last split_snapshot(), to subtract expired panes from
        self._sum_cache: PaneSum | None = None

    # -- panes --------------------------------------------------------------------------------

    def pane(self, index: int) -> Pane:
        """The pane ``index``, opened if needed."""
        pane = self.panes.get(index)
        if pane is None:
            pane = Pane(index, self.epsilon, self.max_itemset_size, self.excluded_pairs)
            self.panes[index] = pane
            if self.first_index is None or index < self.first_index:
                self.first_index = index
        return pane

    def open_panes(self) -> Iterator[Pane]:
        """Panes not closed yet, in index order."""
        return (p for p in self.panes.values() if not p.closed)

    def count(self, pane: Pane, limit: int | None) -> None:
        """Count up to ``limit`` buffered transactions of ``pane`` (all when ``None``) as one
        batch; the window moves on when a newer pane gets counted transactions."""
        if pane.count_buffer(limit) and pane.index > self.newest_index:
            self.newest_index = pane.index
            self._expire()

    def _expire(self) -> None:
        oldest = self.newest_index - self.window_panes + 1
        # only closed panes leave: an open one is closed (and evaluated) first
        for idx in [i for i, p in self.panes.items() if i < oldest and p.closed]:
            del self.panes[idx]

    def close(self, pane: Pane) -> None:
        """Count what the pane still buffers and close it (panes close in index order)."""
        self.count(pane, None)
        pane.closed = True
        self.closed_through = max(self.closed_through, pane.index)

    def close_counted(self, pane: Pane) -> None:
        """Close a pane whose summary was counted elsewhere and set on it whole (nothing
        buffered); the window moves on to it as if it had been counted here."""
        if pane.buffered:
            raise ValueError(f"pane {pane.index} has buffered transactions")
        if pane.counted and pane.index > self.newest_index:
            self.newest_index = pane.index
            self._expire()
        pane.closed = True
        self.closed_through = max(self.closed_through, pane.index)

    def advance_to(self, index: int) -> None:
        """Move the window's end to pane ``index`` although nothing was counted there (time
        passed on a quiet feed): panes that left the window are dropped (closed ones only)."""
        if index > self.newest_index:
            self.newest_index = index
            self._expire()

    def flush(self) -> None:
        """Count every buffered transaction now (partial batches); open panes stay open."""
        for pane in list(self.panes.values()):
            if pane.buffered:
                self.count(pane, None)

    @property
    def window_full(self) -> bool:
        """True once a whole window of panes has closed (the end of warm-up)."""
        if self.first_index is None:
            return False
        return self.closed_through - self.first_index + 1 >= self.window_panes

    def live(self, newest: int | None = None, skip_newest: int = 0) -> list[Pane]:
        """Panes of the window that have counted transactions, oldest first.

        ``newest=r`` keeps only the ``r`` most recent panes; ``skip_newest=r`` leaves them out.
        """
        top = self.newest_index - skip_newest
        bottom = self.newest_index - self.window_panes + 1
        if newest is not None:
            bottom = max(bottom, top - newest + 1)
        return [self.panes[i] for i in self.panes.irange(bottom, top) if self.panes[i].counted]

    # -- snapshots ----------------------------------------------------------------------------

    def _shape(self, item_names: Any) -> dict[str, Any]:
        return {
            "item_names": item_names,
            "epsilon": self.epsilon,
            "max_itemset_size": self.max_itemset_size,
            "pane_size": self.pane_size,
        }

    def snapshot(
        self, item_names: Any, *, newest: int | None = None, skip_newest: int = 0
    ) -> WindowSnapshot:
        """Frozen counts over the window's counted transactions (see :meth:`live`).

        Cost: one merge of the panes' sorted entries per itemset size.
        """
        return sum_panes(self.live(newest, skip_newest), **self._shape(item_names)).snapshot

    def fresh_parts(self) -> list[Pane]:
        """The window as if every buffered transaction were counted: the counted panes of the
        window that ends at the newest pane holding anything, plus each pane's buffer counted
        exactly (:meth:`Pane.exact_buffer`). The counting state is not touched."""
        held = [i for i, p in self.panes.items() if p.counted or p.buffered]
        if not held:
            return []
        newest = max(held)
        out: list[Pane] = []
        for i in self.panes.irange(newest - self.window_panes + 1, newest):
            pane = self.panes[i]
            if pane.counted:
                out.append(pane)
            exact = pane.exact_buffer()
            if exact is not None:
                out.append(exact)
        return out

    def fresh_snapshot(self, item_names: Any) -> WindowSnapshot:
        """:meth:`snapshot` with the transactions still buffered added as an overlay, so a
        quiet feed's latest orders show at once. The overlay is exact (``max_error``
        unchanged) unless the buffer expands to more than
        :data:`~streamcount.engine.pane.OVERLAY_EXACT_MAX` candidates; then it is counted with
        epsilon and its bound joins ``max_error`` (:meth:`Pane.exact_buffer`). The window is
        exactly the transactions a flush would leave in it."""
        if not self.buffered:
            return self.snapshot(item_names)
        return sum_panes(self.fresh_parts(), **self._shape(item_names)).snapshot

    def pane_snapshot(self, item_names: Any, pane: Pane) -> WindowSnapshot:
        """Frozen counts of one pane alone."""
        return sum_panes([pane] if pane.counted else [], **self._shape(item_names)).snapshot

    def split_snapshot(
        self, item_names: Any, recent_panes: int
    ) -> tuple[WindowSnapshot, WindowSnapshot, WindowSnapshot]:
        """``(window, recent, baseline)``: the whole window, its ``recent_panes`` newest panes
        and the rest of it.

        The baseline is the previous call's window with the panes that left it subtracted
        exactly (when none of its panes changed since), and the window is the baseline merged
        with the recent part. Cost: one binary search per entry of the expired panes plus two
        two-run merges.
        """
        live = self.live()
        cut = max(len(live) - recent_panes, 0)
        base_panes, recent_part = live[:cut], live[cut:]
        shape = self._shape(item_names)
        baseline: PaneSum | None = None
        cache = self._sum_cache
        if cache is not None:
            then = {id(p): n for p, n in cache.panes}
            unchanged = all(p.counted == n for p, n in cache.panes)
            if unchanged and all(then.get(id(p)) == p.counted for p in base_panes):
                wanted = {id(p) for p in base_panes}
                gone = [p for p, _ in cache.panes if id(p) not in wanted]
                baseline = subtract_panes(cache, gone)
        if baseline is None:
            baseline = sum_panes(base_panes, **shape)
        recent = sum_panes(recent_part, **shape)
        window = merge_sums(baseline, recent)
        self._sum_cache = window
        return window.snapshot, recent.snapshot, baseline.snapshot

    def ids_in_use(self, vocabulary_size: int) -> np.ndarray:
        """Which item ids any held pane still uses (its summary or its buffer)."""
        used = np.zeros(vocabulary_size, dtype=bool)
        for pane in self.panes.values():
            pane.ids_in_use(used)
        return used

    def remap(self, mapping: np.ndarray) -> None:
        """Renumber item ids in every pane; the cached window sum (old ids) is dropped."""
        for pane in self.panes.values():
            pane.remap(mapping)
        self._sum_cache = None

    # -- statistics, checks, persistence ------------------------------------------------------

    @property
    def buffered(self) -> int:
        """Transactions received by the panes and not yet counted."""
        return sum(p.buffered for p in self.panes.values())

    @property
    def nbytes(self) -> int:
        """Bytes held by the panes' arrays and buffers."""
        return sum(p.nbytes for p in self.panes.values())

    def tracked_itemsets(self) -> tuple[int, ...]:
        """Itemsets tracked per itemset size, over every pane held."""
        tracked = [0] * self.max_itemset_size
        for p in self.panes.values():
            for k, n in enumerate(p.summary.tracked):
                tracked[k] += n
        return tuple(tracked)

    def check_invariants(self, *, vocabulary_size: int) -> None:
        """Assert the window's invariants: pane order, span, the error bound."""
        for p in self.panes.values():
            p.check_invariants()
            if p.counted:
                assert int(p.summary.levels[0].items.max(initial=-1)) < vocabulary_size
        counted = [p for p in self.panes.values() if p.counted]
        assert all(p.index <= self.newest_index for p in counted), "pane beyond newest_index"
        live = self.live()
        assert len(live) <= self.window_panes, "more panes than the window holds"
        if self.pane_size is not None:
            for p in counted:
                assert p.counted + p.buffered <= self.pane_size, "pane over pane_size"
                assert (p.first_seq - 1) // self.pane_size == p.index, "seq outside its pane"
            spans = sorted((p.first_seq, p.last_seq) for p in live)
            for (_, a_hi), (b_lo, _) in pairwise(spans):
                assert a_hi + 1 == b_lo, "count-based window has a gap"
        if self.epsilon > 0:
            error = sum(p.absent_bound for p in live)
            n = sum(p.counted for p in live)
            # a pane merged from several parts may add one per part (engine.merged)
            parts = sum(getattr(p.summary, "parts", 1) for p in live)
            assert error <= math.ceil(self.epsilon * n - 1e-9) + parts, "max_error bound"

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """The panes and positions as a JSON-able manifest plus named arrays."""
        arrays: dict[str, np.ndarray] = {}
        panes_meta = []
        for j, pane in enumerate(self.panes.values()):
            panes_meta.append(pane.meta())
            arrays.update(pane.to_arrays(f"pane{j}."))
        meta = {
            "newest_index": self.newest_index,
            "first_index": self.first_index,
            "closed_through": self.closed_through,
            "panes": panes_meta,
        }
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: dict[str, np.ndarray]) -> None:
        """Restore what :meth:`state` returned (into an empty window)."""
        self.newest_index = int(meta["newest_index"])
        first = meta["first_index"]
        self.first_index = None if first is None else int(first)
        self.closed_through = int(meta["closed_through"])
        self.panes.clear()
        self._sum_cache = None
        for j, pm in enumerate(meta["panes"]):
            pane = Pane.from_state(
                pm, arrays, f"pane{j}.", self.epsilon, self.max_itemset_size, self.excluded_pairs
            )
            self.panes[pane.index] = pane
