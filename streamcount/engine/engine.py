"""The counting engine: transactions in, a sliding window of Lossy Counting panes out.

Flow of one call to :meth:`Engine.add`::

    baskets (lists of item names)
      -> guard: empty / too many distinct items -> rejected
      -> with a catalogue: names -> ids, then each id to the ids it counts as (filters,
         renames, levels: engine/taxonomy); a basket left empty -> rejected (emptied_by_filter)
      -> guard: missing or too-late timestamp -> rejected
      -> vocabulary: names -> int32 ids; sort + de-duplicate within each basket (vectorised)
      -> sequence numbers 1, 2, ... for accepted transactions, in arrival order
      -> route to panes (count-based: ``(seq-1) // pane_size``; time-based:
         ``floor(ts / pane_seconds)``) and buffer
      -> a pane's buffer is counted as one batch when it holds ``batch_size`` transactions
         (whole buckets of ``ceil(1/epsilon)``), and at pane close
      -> panes older than the window are dropped; ``on_pane_closed`` is called after each
         close so rules and alerts see the window exactly at that moment.

The engine never reads the wall clock: time-based panes advance on the transactions' own
timestamps (``max event time - allowed_lateness_seconds`` is the watermark).
"""

from __future__ import annotations

import dataclasses
import math
from collections import Counter
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any

import numpy as np

from streamcount.config.load import config_from_mapping
from streamcount.config.settings import EngineConfig
from streamcount.engine.counters import bucket_width
from streamcount.engine.external import ExternalPanes
from streamcount.engine.guards import AddResult, Rejection, size_guards, time_guards
from streamcount.engine.pane import Pane
from streamcount.engine.reads import EngineReads
from streamcount.engine.rows import select_rows, sort_dedupe, take_rows
from streamcount.engine.taxonomy import ItemResolver, ItemTables
from streamcount.engine.vocab import ItemVocabulary
from streamcount.engine.window import SlidingWindow

__all__ = ["COMPACT_MIN_RELEASED", "STATE_VERSION", "AddResult", "Engine", "Rejection"]

STATE_VERSION = 1

#: the vocabulary is compacted only when at least this many names can be released
COMPACT_MIN_RELEASED = 4096


class Engine(ExternalPanes, EngineReads):
    """Itemset counts over a sliding window with a guaranteed error bound.

    Parameters
    ----------
    config:
        Counting and window settings (``epsilon``, ``max_itemset_size``, ``window_size`` /
        ``pane_size`` or ``window_seconds`` / ``pane_seconds``, ...).
    on_pane_closed:
        Called with the engine right after a pane is closed and counted.
    items:
        The catalogue (filters, renames, levels; :mod:`streamcount.catalogue`), or ``None``
        to count every item as read. With several levels each transaction is extended with
        the ancestors of its items and no itemset holding an item with its own ancestor is
        counted (generalised itemsets, Srikant & Agrawal 1995); the guarantee below holds for
        every other itemset of the extended transactions. ``max_basket_items`` applies to
        the basket as read, before the ancestors are added.

    Guarantee (for every itemset of size ``1..max_itemset_size`` and the window's
    transactions ``first_seq..last_seq``): ``count <= true <= upper`` and
    ``upper - count <= max_error <= ceil(epsilon * N) + panes``.

    Memory: the live panes' summaries (for single items at most ``w * H_B`` entries per pane,
    Manku & Motwani 2002) plus at most one batch of buffered transactions per open pane.

    Examples
    --------
    >>> from streamcount.config.settings import EngineConfig
    >>> eng = Engine(EngineConfig(epsilon=0.0, window_size=4, pane_size=2, max_itemset_size=2))
    >>> _ = eng.add([["tea", "honey"], ["tea"], ["tea", "honey"], ["jam"], ["tea", "jam"]])
    >>> eng.flush()
    >>> snap = eng.snapshot()
    >>> snap.first_seq, snap.last_seq, snap.transactions
    (3, 5, 3)
    >>> [(s.items, s.count) for s in snap.frequent(0.5)]
    [(('jam',), 2), (('tea',), 2)]
    """

    def __init__(
        self,
        config: EngineConfig,
        *,
        on_pane_closed: Callable[[Engine], None] | None = None,
        items: ItemResolver | None = None,
    ) -> None:
        # the same rules as a config file (a ConfigError names the engine.* key)
        config_from_mapping({"engine": dataclasses.asdict(config)}, source="EngineConfig")
        self.config = config
        self.on_pane_closed = on_pane_closed
        self.epsilon = float(config.epsilon)
        self.width = bucket_width(self.epsilon)
        self.max_itemset_size = int(config.max_itemset_size)
        self.time_based = config.window_seconds is not None
        if config.window_seconds is not None:
            assert config.pane_seconds is not None  # checked with the config rules above
            self.pane_seconds = float(config.pane_seconds)
            window_seconds = float(config.window_seconds)
            self.window_panes = round(window_seconds / self.pane_seconds)
            self.pane_size: int | None = None
        else:
            self.pane_seconds = 0.0
            self.pane_size = int(config.pane_size)
            self.window_panes = int(config.window_size) // self.pane_size
        if self.window_panes < 1:
            raise ValueError("the window must hold at least one pane")
        w = self.width
        self.batch_size = max(w, (int(config.batch_size) // w) * w) if w else int(config.batch_size)
        self.vocabulary = ItemVocabulary()
        #: the catalogue's answers per item id (``None``: items are counted as read)
        self.items = ItemTables(items) if items is not None else None
        self.window = SlidingWindow(
            self.window_panes,
            epsilon=self.epsilon,
            max_itemset_size=self.max_itemset_size,
            pane_size=self.pane_size,
            excluded_pairs=self.items.excluded if self.items is not None else None,
        )
        self.next_seq = 1
        self.transactions_seen = 0
        self.rejected: Counter[str] = Counter()
        self.max_event_ts: float | None = None
        #: the pane closed most recently (what ``on_pane_closed`` is called about)
        self.last_closed: Pane | None = None
        #: called with the old-to-new id map when the vocabulary is compacted (followers of
        #: item ids, e.g. the change tests, renumber theirs)
        self.on_remap: Callable[[np.ndarray], None] | None = None
        #: compact the vocabulary at the end of an add that closed a pane (see
        #: compact_vocabulary); off in the processes of a parallel replay, which decide it
        self.auto_compact = True
        #: names that must keep their ids whatever the panes hold (e.g. catalogue ancestors)
        self.pinned: Callable[[], Iterable[str]] | None = None

    # -- intake -------------------------------------------------------------------------------

    def add(
        self,
        baskets: Sequence[Sequence[str]],
        timestamps: Sequence[float | None] | None = None,
    ) -> AddResult:
        """Take a chunk of transactions (lists of item names, with event timestamps).

        Rejected (and reported in the result, with the index into ``baskets``): empty
        baskets (``empty``), more distinct items than ``max_basket_items``
        (``too_many_items``), baskets whose every item a filter removes
        (``emptied_by_filter``), and for a time-based window a missing timestamp
        (``missing_field``) or one whose pane already closed (``too_late``).
        Cost: O(items log items) vectorised, plus counting when a batch fills.
        """
        t = len(baskets)
        if t == 0:
            return AddResult(0, last_seq=self.next_seq - 1)
        ok, rejections = self._size_guards(baskets)
        # the catalogue maps before the time guards: a basket its filters empty is not late
        mapped = self._map_items(baskets, ok, rejections) if self.items is not None else None
        ts, pane_idx = self._time_guards(t, timestamps, ok, rejections)
        keep = np.flatnonzero(ok)
        if mapped is not None:
            flat, lengths = take_rows(*mapped, keep)
        else:
            kept = [baskets[i] for i in keep.tolist()] if keep.shape[0] != t else baskets
            # items of rejected baskets are never interned
            flat, lengths = self.vocabulary.encode_baskets(kept)
        flat, lengths = sort_dedupe(flat, lengths, len(self.vocabulary))
        return self._admit(flat, lengths, keep, ts, pane_idx, rejections)

    def screen(
        self,
        baskets: Sequence[Sequence[str]],
        timestamps: Sequence[float | None] | None = None,
    ) -> tuple[np.ndarray, list[Rejection]]:
        """What :meth:`add` would do with ``baskets`` now, without counting or interning:
        the indices it would accept and the rejections it would report (in index order).

        A worker that decodes part of a feed uses it to know how many transactions the part
        holds before the part's first sequence number is known.
        """
        if not len(baskets):
            return np.zeros(0, dtype=np.int64), []
        ok, rejections, _, _ = self._guards(baskets, timestamps)
        rejections.sort(key=lambda r: r.index)
        return np.flatnonzero(ok), rejections

    def screen_distinct(
        self,
        lengths: np.ndarray,
        timestamps: Sequence[float | None] | np.ndarray | None = None,
    ) -> tuple[np.ndarray, list[Rejection]]:
        """:meth:`screen` for transactions given by their numbers of items, each
        transaction's items distinct (e.g. decoded :class:`~streamcount.intake.records.Tokens`).
        """
        if self.items is not None:
            raise ValueError("screen: an engine with a catalogue maps items as it counts them")
        lengths = np.asarray(lengths, dtype=np.int64)
        t = int(lengths.shape[0])
        if not t:
            return np.zeros(0, dtype=np.int64), []
        rejections: list[Rejection] = []
        ok = size_guards(lengths, lengths, int(self.config.max_basket_items), rejections)
        self._time_guards(t, timestamps, ok, rejections)
        rejections.sort(key=lambda r: r.index)
        return np.flatnonzero(ok), rejections

    def _guards(
        self,
        baskets: Sequence[Sequence[str]],
        timestamps: Sequence[float | None] | None,
    ) -> tuple[np.ndarray, list[Rejection], np.ndarray, np.ndarray | None]:
        """Every rejection rule of :meth:`add` (no state changes): ``(accepted mask,
        rejections, event times, pane of each row for a time-based window)``."""
        if self.items is not None:
            raise ValueError("screen: an engine with a catalogue maps items as it counts them")
        ok, rejections = self._size_guards(baskets)
        ts, pane_idx = self._time_guards(len(baskets), timestamps, ok, rejections)
        return ok, rejections, ts, pane_idx

    def _size_guards(self, baskets: Sequence[Sequence[str]]) -> tuple[np.ndarray, list[Rejection]]:
        lengths_raw = np.fromiter(map(len, baskets), dtype=np.int64, count=len(baskets))
        rejections: list[Rejection] = []
        distinct = lengths_raw.copy()  # exact where it matters: above the cap
        for i in np.flatnonzero(lengths_raw > int(self.config.max_basket_items)).tolist():
            distinct[i] = len(set(baskets[i]))
        ok = size_guards(lengths_raw, distinct, int(self.config.max_basket_items), rejections)
        return ok, rejections

    def add_ids(
        self,
        flat: np.ndarray,
        lengths: np.ndarray,
        timestamps: Sequence[float | None] | np.ndarray | None = None,
    ) -> AddResult:
        """Take a chunk of transactions already interned with :attr:`vocabulary`.

        ``flat`` holds the item ids of every transaction one after another (any order within
        a transaction, repeats allowed) and ``lengths`` how many belong to each; the same
        rejections as :meth:`add`, on the distinct ids. For feeds decoded straight to ids.

        Raises
        ------
        ValueError
            An id outside the vocabulary, or lengths that do not add up to ``flat``.
        """
        flat = np.asarray(flat, dtype=np.int32)
        lengths = np.asarray(lengths, dtype=np.int64)
        t = int(lengths.shape[0])
        if int(lengths.sum()) != flat.shape[0] or (t and int(lengths.min()) < 0):
            raise ValueError(f"add_ids: lengths add up to {int(lengths.sum())}, not {flat.size}")
        if flat.size and (int(flat.min()) < 0 or int(flat.max()) >= len(self.vocabulary)):
            raise ValueError(f"add_ids: ids must lie in [0, {len(self.vocabulary)})")
        if t == 0:
            return AddResult(0, last_seq=self.next_seq - 1)
        flat, distinct = sort_dedupe(flat, lengths, len(self.vocabulary))
        rejections: list[Rejection] = []
        ok = size_guards(lengths, distinct, int(self.config.max_basket_items), rejections)
        if self.items is not None:
            flat, distinct = self._map_ids(flat, distinct, ok, rejections)
        ts, pane_idx = self._time_guards(t, timestamps, ok, rejections)
        keep = np.flatnonzero(ok)
        if keep.shape[0] != t:
            flat, distinct = select_rows(flat, distinct, ok)
        return self._admit(flat, distinct, keep, ts, pane_idx, rejections)

    def _time_guards(
        self,
        t: int,
        timestamps: Sequence[float | None] | np.ndarray | None,
        ok: np.ndarray,
        rejections: list[Rejection],
    ) -> tuple[np.ndarray, np.ndarray | None]:
        return time_guards(
            t,
            timestamps,
            ok,
            rejections,
            pane_seconds=self.pane_seconds if self.time_based else None,
            watermark=self.max_event_ts,
            lateness=self.config.allowed_lateness_seconds,
            closed_through=self.window.closed_through,
            expired_through=self.window.newest_index - self.window_panes,
        )

    def _admit(
        self,
        flat: np.ndarray,
        lengths: np.ndarray,
        keep: np.ndarray,
        ts: np.ndarray,
        pane_idx: np.ndarray | None,
        rejections: list[Rejection],
    ) -> AddResult:
        """Number the accepted rows (``keep`` of the chunk, CSR ``flat``/``lengths`` of
        ascending distinct ids) and route them to their panes."""
        n_ok = int(lengths.shape[0])
        seq = np.arange(self.next_seq, self.next_seq + n_ok, dtype=np.int64)
        self.next_seq += n_ok
        self.transactions_seen += n_ok
        ts_ok = ts[keep]
        closes = 0
        if n_ok:
            if self.time_based:
                assert pane_idx is not None
                closes = self._route_time(flat, lengths, seq, ts_ok, pane_idx[keep])
            else:
                closes = self._route_count(flat, lengths, seq, ts_ok)
        if closes and self.auto_compact:
            self.compact_vocabulary()
        by_reason = Counter(r.reason for r in rejections)
        self.rejected.update(by_reason)
        rejections.sort(key=lambda r: r.index)
        return AddResult(n_ok, tuple(rejections), closes, self.next_seq - 1, dict(by_reason))

    def _map_items(
        self, baskets: Sequence[Sequence[str]], ok: np.ndarray, rejections: list[Rejection]
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Map the baskets still ``ok`` through the catalogue; clears ``ok`` for the ones the
        filters empty. Returns ``(rows, flat, lengths)``: the rows mapped and their CSR."""
        rows = np.flatnonzero(ok)
        flat, lengths = self.vocabulary.encode_baskets([baskets[i] for i in rows.tolist()])
        flat, lengths = self._expand(rows, flat, lengths, ok, rejections)
        return rows, flat, lengths

    def _map_ids(
        self, flat: np.ndarray, lengths: np.ndarray, ok: np.ndarray, rejections: list[Rejection]
    ) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`_map_items` for a chunk already interned (CSR over every row of the chunk):
        the mapped chunk, ascending and distinct per row, rows not ``ok`` left empty."""
        rows = np.flatnonzero(ok)
        mapped, mapped_lengths = self._expand(rows, *select_rows(flat, lengths, ok), ok, rejections)
        full = np.zeros(lengths.shape[0], dtype=np.int64)
        full[rows] = mapped_lengths
        return sort_dedupe(mapped, full, len(self.vocabulary))

    def _expand(
        self,
        rows: np.ndarray,
        flat: np.ndarray,
        lengths: np.ndarray,
        ok: np.ndarray,
        rejections: list[Rejection],
    ) -> tuple[np.ndarray, np.ndarray]:
        assert self.items is not None
        self.items.sync(self.vocabulary)
        flat, lengths = self.items.expand(flat, lengths)
        emptied = lengths == 0
        for i in rows[emptied].tolist():
            rejections.append(
                Rejection(
                    i,
                    "emptied_by_filter",
                    "every item of the transaction is removed by items.ignore / items.allow",
                )
            )
        ok[rows[emptied]] = False
        return flat, lengths

    def set_items(self, items: ItemResolver) -> None:
        """Map items with another catalogue version from the next transaction on; what was
        counted stays as it was counted. Needs an engine built with a catalogue."""
        if self.items is None:
            raise ValueError("this engine was built without a catalogue (items=None)")
        self.items.reset(items)
        self.items.sync(self.vocabulary)

    def _route_count(
        self, flat: np.ndarray, lengths: np.ndarray, seq: np.ndarray, ts: np.ndarray
    ) -> int:
        assert self.pane_size is not None
        ends = np.cumsum(lengths)
        starts = ends - lengths
        pos, n = 0, int(lengths.shape[0])
        closes = 0
        while pos < n:
            idx = int((seq[pos] - 1) // self.pane_size)
            pane_end_seq = (idx + 1) * self.pane_size
            stop = min(n, pos + int(pane_end_seq - seq[pos]) + 1)
            pane = self._pane(idx)
            lo, hi = int(starts[pos]), int(ends[stop - 1])
            pane.append(flat[lo:hi], lengths[pos:stop], seq[pos:stop], ts[pos:stop])
            self._count_full_batches(pane)
            if int(seq[stop - 1]) == pane_end_seq:
                self._close(pane)
                closes += 1
            pos = stop
        return closes

    def _route_time(
        self,
        flat: np.ndarray,
        lengths: np.ndarray,
        seq: np.ndarray,
        ts: np.ndarray,
        pane_idx: np.ndarray,
    ) -> int:
        """Route accepted transactions to their panes, closing each pane as soon as the
        watermark (largest event time so far minus ``allowed_lateness_seconds``) passes its
        end: the chunk is cut where the watermark crosses a pane boundary, so a pane is closed
        (and ``on_pane_closed`` sees the window) before later transactions are counted."""
        ends = np.cumsum(lengths)
        prev = -np.inf if self.max_event_ts is None else self.max_event_ts
        running = np.maximum.accumulate(np.concatenate(([prev], ts)))[1:]
        lateness = self.config.allowed_lateness_seconds
        # panes ending at or before the watermark after each transaction
        limit_after = np.floor((running - lateness) / self.pane_seconds) - 1
        limit_before = np.floor((prev - lateness) / self.pane_seconds) - 1
        raised = limit_after > np.concatenate(([limit_before], limit_after[:-1]))
        # a segment ends with the transaction that moves the watermark past a pane's end
        cuts = (np.flatnonzero(raised) + 1).tolist()
        if not cuts or cuts[-1] != ts.shape[0]:
            cuts.append(ts.shape[0])
        closes = 0
        for a, b in zip([0, *cuts[:-1]], cuts, strict=True):
            self._append_by_pane(flat, lengths, ends, seq, ts, pane_idx, a, b)
            self.max_event_ts = float(running[b - 1])
            limit = limit_after[b - 1]
            if not math.isfinite(limit):
                continue
            limit = int(limit)
            for pane in [p for p in self.window.open_panes() if p.index <= limit]:
                self._close(pane)
                closes += 1
            self.window.closed_through = max(self.window.closed_through, limit)
        return closes

    def _append_by_pane(
        self,
        flat: np.ndarray,
        lengths: np.ndarray,
        ends: np.ndarray,
        seq: np.ndarray,
        ts: np.ndarray,
        pane_idx: np.ndarray,
        a: int,
        b: int,
    ) -> None:
        """Append transactions ``a..b-1`` to their panes, in pane order, one gather each."""
        order = a + np.argsort(pane_idx[a:b], kind="stable")
        sorted_idx = pane_idx[order]
        bounds = np.flatnonzero(np.concatenate(([True], sorted_idx[1:] != sorted_idx[:-1])))
        bounds = np.append(bounds, order.shape[0])
        for lo, hi in zip(bounds[:-1].tolist(), bounds[1:].tolist(), strict=True):
            rows = order[lo:hi]
            n_items = lengths[rows]
            # positions of every item of these rows in ``flat``, without a slice per row
            first = ends[rows] - n_items
            take = np.repeat(first - np.cumsum(n_items) + n_items, n_items) + np.arange(
                int(n_items.sum())
            )
            pane = self._pane(int(sorted_idx[lo]))
            pane.append(flat[take], n_items, seq[rows], ts[rows])
            self._count_full_batches(pane)

    def _pane(self, idx: int) -> Pane:
        return self.window.pane(idx)

    def _count_full_batches(self, pane: Pane) -> None:
        while pane.buffered >= self.batch_size:
            self.window.count(pane, self.batch_size)

    def _close(self, pane: Pane) -> None:
        self.window.close(pane)
        self.last_closed = pane
        if self.on_pane_closed is not None:
            self.on_pane_closed(self)

    def compact_vocabulary(
        self, *, force: bool = False, used: np.ndarray | None = None
    ) -> np.ndarray | None:
        """Release the item names no held pane uses any more (and that are not pinned), so the
        name table is bounded by the window, not by the feed's history.

        Done at the end of an :meth:`add` that closed a pane (never in the middle: the rest of
        its transactions are already encoded), when at least half the names (and at least
        :data:`COMPACT_MIN_RELEASED`) can go, or always with ``force``; a function of the input
        alone, so restarts and replays compact at the same points. Ids are renumbered in order
        (an increasing map), every pane and buffer is remapped, ``on_remap`` is called with the
        map, and snapshots built before keep the names they were built with. Returns the map,
        or ``None`` when nothing was released. Cost: O(names + tracked entries).

        ``used`` (bool by id) replaces what the held panes use, for a replay whose panes are
        partly counted in other processes (it knows what one process would hold);
        ``auto_compact = False`` leaves every compaction to such an explicit call.
        """
        size = len(self.vocabulary)
        if used is None:
            used = self.window.ids_in_use(size)
        else:
            used = np.array(used, dtype=bool)
            if used.shape != (size,):
                raise ValueError(f"used has shape {used.shape}, the vocabulary {size} names")
        if self.items is not None:  # ancestors an item maps to are never released
            used |= self.items.pinned_mask(size)
        if self.pinned is not None:
            for name in self.pinned():
                item = self.vocabulary.get(name)
                if item is not None:
                    used[item] = True
        released = size - int(used.sum())
        if released == 0 or (
            not force and (released < COMPACT_MIN_RELEASED or 2 * released < size)
        ):
            return None
        mapping = self.vocabulary.compact(used)
        self.window.remap(mapping)
        if self.items is not None:
            self.items.remap(mapping, self.vocabulary)
        if self.on_remap is not None:
            self.on_remap(mapping)
        return mapping

    def advance_watermark(self, now: float) -> int:
        """Time-based windows on a quiet feed: close the panes that end before ``now`` minus
        ``allowed_lateness_seconds`` as if events up to ``now`` had been seen, and slide the
        window to that point. Only the service calls it, with the wall clock, when its sources
        are caught up and idle (never replay, so a backlog is never sent to ``too_late``).
        Returns how many panes the watermark moved past (0: nothing changed); a count-based
        window does nothing.
        """
        if not self.time_based or not math.isfinite(now):
            return 0
        limit = math.floor((now - self.config.allowed_lateness_seconds) / self.pane_seconds) - 1
        # panes already closed up to ``limit`` (by events, or a merger's empty panes) still
        # leave the window's end behind it until the watermark slides it there
        moved = max(limit - self.window.closed_through, limit - self.window.newest_index)
        if moved <= 0:
            return 0
        for pane in [p for p in self.window.open_panes() if p.index <= limit]:
            self._close(pane)
        self.window.closed_through = max(self.window.closed_through, limit)
        self.window.advance_to(limit)
        self.compact_vocabulary()
        return moved

    def flush(self) -> None:
        """Count every buffered transaction now (partial batches), e.g. at the end of a replay.

        Open panes stay open. Partial batches keep every guarantee; the untracked bound of
        such a pane becomes ``ceil(n/w)`` instead of ``n/w``.
        """
        self.window.flush()

    def check_invariants(self) -> None:
        """Assert the engine's invariants (panes, sequence numbers, window span)."""
        self.window.check_invariants(vocabulary_size=len(self.vocabulary))
        if self.items is not None:
            self.items.check_invariants(len(self.vocabulary))
        total = sum(p.counted + p.buffered for p in self.window.panes.values())
        assert total <= self.transactions_seen, "more transactions held than seen"

    # -- persistence --------------------------------------------------------------------------

    def state(self) -> tuple[dict[str, object], dict[str, np.ndarray]]:
        """Everything needed to resume: a JSON-able manifest and named numpy arrays."""
        window_meta, arrays = self.window.state()
        arrays.update(self.vocabulary.to_arrays())
        meta: dict[str, object] = {
            "state_version": STATE_VERSION,
            "epsilon": self.epsilon,
            "max_itemset_size": self.max_itemset_size,
            "pane_size": self.pane_size,
            "pane_seconds": self.pane_seconds,
            "window_panes": self.window_panes,
            "next_seq": self.next_seq,
            "transactions_seen": self.transactions_seen,
            "rejected": dict(self.rejected),
            "max_event_ts": self.max_event_ts,
            "window": window_meta,
        }
        return meta, arrays

    @classmethod
    def from_state(
        cls,
        config: EngineConfig,
        meta: Mapping[str, Any],
        arrays: dict[str, np.ndarray],
        *,
        on_pane_closed: Callable[[Engine], None] | None = None,
        items: ItemResolver | None = None,
    ) -> Engine:
        """Rebuild an engine saved by :meth:`state`; every estimate is identical afterwards.

        ``items`` is the catalogue to map items with from now on (it may be a newer version
        than the one the saved panes were counted under)."""
        eng = cls(config, on_pane_closed=on_pane_closed, items=items)
        if meta.get("state_version") != STATE_VERSION:
            raise ValueError(
                f"engine state version {meta.get('state_version')!r} is not {STATE_VERSION}"
            )
        for key in ("epsilon", "max_itemset_size", "pane_size", "pane_seconds", "window_panes"):
            if meta[key] != getattr(eng, key):
                raise ValueError(
                    f"engine state has {key}={meta[key]!r} but the settings give "
                    f"{getattr(eng, key)!r}"
                )
        eng.vocabulary = ItemVocabulary.from_arrays(arrays)
        if eng.items is not None:
            eng.items.sync(eng.vocabulary)
        eng.next_seq = int(meta["next_seq"])
        eng.transactions_seen = int(meta["transactions_seen"])
        eng.rejected = Counter(meta["rejected"])
        eng.max_event_ts = meta["max_event_ts"]
        eng.window.load_state(meta["window"], arrays)
        return eng
