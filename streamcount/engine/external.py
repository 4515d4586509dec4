"""Whole panes counted outside this engine, handed to it closed.

A parallel replay counts whole panes of a count-based window in worker processes
(:meth:`ExternalPanes.add_counted_pane`, after :meth:`ExternalPanes.start_at` numbers the
part); a cluster's merger closes time-based panes merged from its workers' summaries
(:meth:`ExternalPanes.add_merged_pane`). Either way the pane is closed as
:meth:`~streamcount.engine.engine.Engine.add` closes one, so rules and alerts see the same
window. :class:`ExternalPanes` is a part of :class:`~streamcount.engine.engine.Engine`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, cast

import numpy as np

from streamcount.engine.counters import Level, LossySummary
from streamcount.engine.guards import AddResult
from streamcount.engine.merged import MergedSummary
from streamcount.engine.rows import renumber

if TYPE_CHECKING:
    from streamcount.engine.engine import Engine
    from streamcount.engine.pane import Pane
    from streamcount.engine.vocab import ItemVocabulary
    from streamcount.engine.window import SlidingWindow

__all__ = ["ExternalPanes"]


class ExternalPanes:
    """The engine's methods for panes counted elsewhere (module notes)."""

    # set by Engine.__init__
    epsilon: float
    max_itemset_size: int
    time_based: bool
    pane_size: int | None
    next_seq: int
    transactions_seen: int
    max_event_ts: float | None
    last_closed: Pane | None
    auto_compact: bool
    vocabulary: ItemVocabulary
    window: SlidingWindow
    on_pane_closed: Callable[[Engine], None] | None

    if TYPE_CHECKING:

        def _close(self, pane: Pane) -> None: ...

        def compact_vocabulary(
            self, *, force: bool = False, used: np.ndarray | None = None
        ) -> np.ndarray | None: ...

    def start_at(self, seq: int) -> None:
        """Number the next accepted transaction ``seq`` (a fresh engine counting a later part
        of a feed whose first ``seq - 1`` transactions are counted elsewhere)."""
        if self.transactions_seen or self.next_seq != 1:
            raise ValueError("start_at: only a fresh engine can start at another sequence number")
        if seq < 1:
            raise ValueError(f"start_at: seq = {seq}; sequence numbers start at 1")
        self.next_seq = int(seq)

    def add_counted_pane(
        self,
        levels: Sequence[Level],
        names: Sequence[str],
        transactions: int,
        *,
        min_ts: float | None = None,
        max_ts: float | None = None,
    ) -> AddResult:
        """Take a whole pane counted elsewhere: the next ``pane_size`` transactions, as the
        Lossy Counting summary of exactly those transactions (``levels``: one per itemset
        size, item ids indexing ``names``), then close it as :meth:`add` would.

        Gives the same window as counting those transactions here (a worker that counted
        them with this engine's settings produced the same summary): the names are interned
        in the given order, rows are renumbered to this engine's ids, and ``on_pane_closed``
        runs. Count-based windows only; the pane must start at the next pane boundary.

        Raises
        ------
        ValueError
            A time-based window, a pane that is not whole or not next, or levels that do not
            fit the settings.
        """
        size = self.pane_size
        if size is None:
            raise ValueError("add_counted_pane: count-based windows only")
        if transactions != size or (self.next_seq - 1) % size:
            raise ValueError(
                f"add_counted_pane: a pane of {transactions} transactions at sequence number "
                f"{self.next_seq}; a counted pane must hold pane_size={size} transactions "
                "and start at a pane boundary"
            )
        if len(levels) != self.max_itemset_size:
            raise ValueError(
                f"add_counted_pane: {len(levels)} levels for max_itemset_size="
                f"{self.max_itemset_size}"
            )
        index = (self.next_seq - 1) // size
        if index in self.window.panes:
            raise ValueError(f"add_counted_pane: pane {index} already holds transactions")
        ids = self.vocabulary.encode_flat(names, len(names))
        pane = self.window.pane(index)
        pane.summary = LossySummary.from_levels(
            self.epsilon, self.max_itemset_size, size, renumber(levels, ids)
        )
        pane.first_seq, pane.last_seq = self.next_seq, self.next_seq + size - 1
        pane.min_ts, pane.max_ts = min_ts, max_ts
        self.next_seq += size
        self.transactions_seen += size
        self.window.close_counted(pane)
        self.last_closed = pane
        if self.on_pane_closed is not None:
            self.on_pane_closed(cast("Engine", self))  # always an Engine
        return AddResult(size, (), 1, self.next_seq - 1, {})

    def add_merged_pane(
        self,
        index: int,
        levels: Sequence[Level],
        names: Sequence[str],
        transactions: int,
        *,
        absent_bound: int,
        parts: int = 1,
        min_ts: float | None = None,
        max_ts: float | None = None,
    ) -> AddResult:
        """Take pane ``index`` of a time-based window, merged from the summaries of ``parts``
        parts of a feed counted elsewhere (:func:`streamcount.engine.merged.merge_parts`:
        ``levels``, one per itemset size, item ids indexing ``names``), and close it as
        :meth:`add` closes a pane: ``on_pane_closed`` runs, then the vocabulary may be
        compacted. The names are interned in the given order and rows renumbered to this
        engine's ids.

        The pane keeps the parts' summed ``absent_bound`` (:class:`MergedSummary`), so the
        window's ``max_error`` is the sum of every part's bound. Its transactions get the next
        sequence numbers, in one run. A pane of no transactions (every part empty) creates
        nothing and is not evaluated, as in one engine, where an index without transactions
        never becomes a pane: the panes up to ``index`` count as closed, and the window's end
        stays at the newest pane with transactions until :meth:`advance_watermark` moves it (a
        quiet feed).
        ``min_ts`` and ``max_ts`` are the earliest and latest event times the parts counted.
        Panes must come in index order.

        Raises
        ------
        ValueError
            A count-based window, a pane at or below the last closed one, or levels that do
            not fit the settings.
        """
        if not self.time_based:
            raise ValueError("add_merged_pane: time-based windows only (count-based: see add)")
        if index <= self.window.closed_through:
            raise ValueError(
                f"add_merged_pane: pane {index} is at or below the last closed pane "
                f"({self.window.closed_through}); merged panes come in index order"
            )
        if len(levels) != self.max_itemset_size:
            raise ValueError(
                f"add_merged_pane: {len(levels)} levels for max_itemset_size="
                f"{self.max_itemset_size}"
            )
        n = int(transactions)
        if n == 0:
            self.window.closed_through = index
            return AddResult(0, last_seq=self.next_seq - 1)
        ids = self.vocabulary.encode_flat(names, len(names)).astype(np.int64)
        pane = self.window.pane(index)
        pane.summary = MergedSummary(
            self.epsilon,
            self.max_itemset_size,
            n,
            renumber(levels, ids),
            absent=absent_bound,
            parts=parts,
        )
        pane.first_seq, pane.last_seq = self.next_seq, self.next_seq + n - 1
        pane.min_ts, pane.max_ts = min_ts, max_ts
        self.next_seq += n
        self.transactions_seen += n
        if max_ts is not None:
            prev = self.max_event_ts
            self.max_event_ts = max_ts if prev is None else max(prev, max_ts)
        if index > self.window.newest_index:
            self.window.advance_to(index)
        self._close(pane)
        if self.auto_compact:
            self.compact_vocabulary()
        return AddResult(n, (), 1, self.next_seq - 1, {})
