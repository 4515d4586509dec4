"""Reading the engine: frozen snapshots of the window and the engine's statistics.

:class:`EngineReads` is a part of :class:`~streamcount.engine.engine.Engine`: the window (or
its recent part, or one pane) as a :class:`~streamcount.engine.snapshot.WindowSnapshot` with
the catalogue in force attached, and :class:`~streamcount.engine.snapshot.EngineStatistics`.
"""

from __future__ import annotations

import dataclasses
from collections import Counter
from typing import TYPE_CHECKING

from streamcount.engine.snapshot import EngineStatistics, WindowSnapshot

if TYPE_CHECKING:
    from streamcount.engine.pane import Pane
    from streamcount.engine.taxonomy import ItemTables
    from streamcount.engine.vocab import ItemVocabulary
    from streamcount.engine.window import SlidingWindow

__all__ = ["EngineReads"]


class EngineReads:
    """The engine's queries (module notes)."""

    # set by Engine.__init__
    time_based: bool
    pane_seconds: float
    window_panes: int
    transactions_seen: int
    rejected: Counter[str]
    max_event_ts: float | None
    vocabulary: ItemVocabulary
    items: ItemTables | None
    window: SlidingWindow

    def snapshot(self, *, newest: int | None = None, skip_newest: int = 0) -> WindowSnapshot:
        """Frozen counts over the window (counted transactions only).

        ``newest=r`` restricts to the ``r`` most recent panes (a recent window);
        ``skip_newest=r`` leaves them out (a baseline that excludes the recent window).
        Cost: one sort over the panes' tracked entries per itemset size.
        """
        return self._tag(
            self.window.snapshot(self.vocabulary.names, newest=newest, skip_newest=skip_newest)
        )

    def fresh_snapshot(self) -> WindowSnapshot:
        """The window with every buffered transaction added as an overlay (what the
        API and replay report); see :meth:`SlidingWindow.fresh_snapshot`."""
        return self._tag(self.window.fresh_snapshot(self.vocabulary.names))

    def split_snapshot(
        self, recent_panes: int
    ) -> tuple[WindowSnapshot, WindowSnapshot, WindowSnapshot]:
        """``(window, recent, baseline)``; see :meth:`SlidingWindow.split_snapshot`."""
        window, recent, baseline = self.window.split_snapshot(self.vocabulary.names, recent_panes)
        return self._tag(window), self._tag(recent), self._tag(baseline)

    @property
    def window_full(self) -> bool:
        """True once a whole window of panes has closed (the end of warm-up)."""
        return self.window.window_full

    def pane_snapshot(self, pane: Pane) -> WindowSnapshot:
        """Frozen counts of one pane's counted transactions."""
        return self._tag(self.window.pane_snapshot(self.vocabulary.names, pane))

    def _tag(self, snapshot: WindowSnapshot) -> WindowSnapshot:
        """The snapshot with the catalogue in force attached (levels, ancestors, names)."""
        if self.items is None:
            return snapshot
        return dataclasses.replace(snapshot, taxonomy=self.items.view())

    def pane_start_time(self, pane: Pane) -> float | None:
        """When a pane starts: its time span's start (time-based), or its first event time."""
        if self.time_based:
            return pane.index * self.pane_seconds
        return pane.min_ts

    def statistics(self) -> EngineStatistics:
        """The engine's counters as a frozen :class:`EngineStatistics` (cheap: no summing of
        itemsets, one pass over the panes)."""
        win = self.window
        live = win.live()
        return EngineStatistics(
            transactions_seen=self.transactions_seen,
            rejected=dict(self.rejected),
            window_transactions=sum(p.counted for p in live),
            window_max_error=sum(p.absent_bound for p in live),
            tracked_itemsets=win.tracked_itemsets(),
            held_bytes=win.nbytes,
            live_panes=len(win.panes),
            window_panes=self.window_panes,
            buffered_transactions=win.buffered,
            max_event_ts=self.max_event_ts,
            vocabulary_items=len(self.vocabulary),
            items_ignored={} if self.items is None else self.items.ignored_by_label(),
            items_unknown=0 if self.items is None else self.items.unknown,
            items_unknown_distinct=0 if self.items is None else self.items.unknown_distinct,
        )
