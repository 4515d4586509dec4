"""The counting engine: transactions in, a sliding window of Lossy Counting panes out.

Flow of one call to :meth:`Engine.add`::

    baskets (lists of item names)
      -> guard: empty / too many distinct items / missing or too-late timestamp -> rejected
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
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from itertools import pairwise

import numpy as np
from sortedcontainers import SortedDict

from streamcount.config.load import config_from_mapping
from streamcount.config.settings import MAX_TIMESTAMP, EngineConfig
from streamcount.engine.counters import bucket_width
from streamcount.engine.snapshot import EngineStatistics, WindowSnapshot
from streamcount.engine.vocab import ItemVocabulary
from streamcount.engine.window import (
    Pane,
    PaneSum,
    combine_panes,
    merge_sums,
    subtract_panes,
    sum_panes,
)

__all__ = ["STATE_VERSION", "AddResult", "Engine", "Rejection"]

STATE_VERSION = 1


@dataclass(frozen=True, slots=True)
class Rejection:
    """A transaction the engine set aside: its position in the call's input, reason, detail."""

    index: int
    reason: str
    detail: str


@dataclass(frozen=True, slots=True)
class AddResult:
    accepted: int
    rejections: tuple[Rejection, ...] = ()
    panes_closed: int = 0
    #: sequence number of the last accepted transaction after this call
    last_seq: int = 0
    rejected_by_reason: dict[str, int] = field(default_factory=dict)


class Engine:
    """Itemset counts over a sliding window with a guaranteed error bound.

        Parameters
        ----------
        config:
            Counting and window settings (``epsilon``, ``max_itemset_size``, ``window_size`` /
            ``pane_size`` or ``window_seconds`` / ``pane_seconds``, ...).
        on_pane_closed:
            Called with the engine right after a pane is closed and counted.

        Guarantee (for every itemset of size ``1..max_itemset_size`` and the window's
        transactions ``first_seq..last_seq``): ``count <= true <= upper`` and
        ``upper - count <= max_error <= ceil(epsilon * N) + panes``.

        Memory: the live panes' summaries (for single items at most ``w * H_B`` entries per pane,
        Manku & Motwani 2002) plus at most one batch of buffered transactions per open pane.

        Examples
        --------
        >>> from streamcount.config import EngineConfig
    from streamcount.config.load import config_from_mapping
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
    ) -> None:
        # the same rules as a config file (a ConfigError names the engine.* key)
        config_from_mapping({"engine": dataclasses.asdict(config)}, source="EngineConfig")
        self.config = config
        self.on_pane_closed = on_pane_closed
        self.epsilon = float(config.epsilon)
        self.width = bucket_width(self.epsilon)
        self.max_itemset_size = int(config.max_itemset_size)
        self.time_based = config.window_seconds is not None
        if self.time_based:
            assert config.pane_seconds is not None  # checked with the config rules above
            self.pane_seconds = float(config.pane_seconds)
            window_seconds = float(config.window_seconds)  # type: ignore[arg-type]
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
        #: live panes by index, kept in index order
        self.panes: SortedDict = SortedDict()
        self.next_seq = 1
        self.transactions_seen = 0
        self.rejected: Counter[str] = Counter()
        self.max_event_ts: float | None = None
        #: highest pane index that has counted transactions (window end)
        self.newest_index = -1
        #: lowest pane index ever opened (for the warm-up test of time-based windows)
        self.first_index: int | None = None
        self.closed_through = -1  # every pane index <= this is closed
        #: the window summed at the last split_snapshot(), kept to subtract expired panes from
        self._window_sum: PaneSum | None = None

    # -- intake -------------------------------------------------------------------------------

    def add(
        self,
        baskets: Sequence[Sequence[str]],
        timestamps: Sequence[float | None] | None = None,
    ) -> AddResult:
        """Take a chunk of transactions (lists of item names, with event timestamps).

        Rejected (and reported in the result, with the index into ``baskets``): empty
        baskets (``empty``), more distinct items than ``max_basket_items``
        (``too_many_items``), and for a time-based window a missing timestamp
        (``missing_field``) or one whose pane already closed (``too_late``).
        Cost: O(items log items) vectorised, plus counting when a batch fills.
        """
        t = len(baskets)
        if t == 0:
            return AddResult(0, last_seq=self.next_seq - 1)
        lengths_raw = np.fromiter(map(len, baskets), dtype=np.int64, count=t)
        rejections: list[Rejection] = []
        ok = lengths_raw > 0
        for i in np.flatnonzero(~ok).tolist():
            rejections.append(Rejection(i, "empty", "transaction has no items"))
        cap = int(self.config.max_basket_items)
        for i in np.flatnonzero(lengths_raw > cap).tolist():
            distinct = len(set(baskets[i]))
            if distinct > cap:
                ok[i] = False
                rejections.append(
                    Rejection(
                        i,
                        "too_many_items",
                        f"{distinct} distinct items > max_basket_items={cap}; "
                        "raise max_basket_items to count such baskets",
                    )
                )
        ts = np.full(t, np.nan)
        if timestamps is not None:
            ts = np.array(timestamps, dtype=np.float64)  # None becomes NaN
        pane_idx: np.ndarray | None = None
        if self.time_based:
            missing = ok & np.isnan(ts)
            for i in np.flatnonzero(missing).tolist():
                rejections.append(
                    Rejection(i, "missing_field", "a time-based window needs a timestamp")
                )
            ok &= ~missing
            with np.errstate(invalid="ignore"):
                odd = ok & ~(np.abs(ts) < MAX_TIMESTAMP)
            for i in np.flatnonzero(odd).tolist():
                rejections.append(
                    Rejection(
                        i,
                        "wrong_type",
                        f"event time {float(ts[i])!r} is not epoch seconds below "
                        f"{MAX_TIMESTAMP:.0e} (milliseconds?)",
                    )
                )
            ok &= ~odd
            pane_idx = np.zeros(t, dtype=np.int64)
            pane_idx[ok] = np.floor(ts[ok] / self.pane_seconds).astype(np.int64)
            # watermark seen by each transaction = running max of earlier event times
            prev = -np.inf if self.max_event_ts is None else self.max_event_ts
            filled = np.where(ok, ts, -np.inf)
            running = np.maximum.accumulate(np.concatenate(([prev], filled)))[:-1]
            closed_limit = (
                np.floor((running - self.config.allowed_lateness_seconds) / self.pane_seconds) - 1
            )
            late = ok & (
                (pane_idx <= np.maximum(closed_limit, self.closed_through))
                | (pane_idx <= self.newest_index - self.window_panes)
            )
            for i in np.flatnonzero(late).tolist():
                rejections.append(
                    Rejection(
                        i,
                        "too_late",
                        f"event time {float(ts[i])!r} falls in pane {int(pane_idx[i])}, "
                        "already closed (allowed_lateness_seconds="
                        f"{self.config.allowed_lateness_seconds})",
                    )
                )
            ok &= ~late
        keep = np.flatnonzero(ok)
        kept = [baskets[i] for i in keep.tolist()] if keep.shape[0] != t else baskets
        flat, lengths = self.vocabulary.encode_baskets(kept)
        flat, lengths = _sort_dedupe(flat, lengths, len(self.vocabulary))
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
        by_reason = Counter(r.reason for r in rejections)
        self.rejected.update(by_reason)
        rejections.sort(key=lambda r: r.index)
        return AddResult(n_ok, tuple(rejections), closes, self.next_seq - 1, dict(by_reason))

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
            for idx in [i for i, p in self.panes.items() if not p.closed and i <= limit]:
                self._close(self.panes[idx])
                closes += 1
            self.closed_through = max(self.closed_through, limit)
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
        pane = self.panes.get(idx)
        if pane is None:
            pane = Pane(idx, self.epsilon, self.max_itemset_size)
            self.panes[idx] = pane
            if self.first_index is None or idx < self.first_index:
                self.first_index = idx
        return pane

    def _count_full_batches(self, pane: Pane) -> None:
        while pane.buffered >= self.batch_size:
            self._count(pane, self.batch_size)

    def _count(self, pane: Pane, limit: int | None) -> None:
        if pane.count_buffer(limit) and pane.index > self.newest_index:
            self.newest_index = pane.index
            self._expire()

    def _expire(self) -> None:
        oldest = self.newest_index - self.window_panes + 1
        # only closed panes leave: an open one is closed (and evaluated) first
        for idx in [i for i, p in self.panes.items() if i < oldest and p.closed]:
            del self.panes[idx]

    def _close(self, pane: Pane) -> None:
        self._count(pane, None)
        pane.closed = True
        # panes close in index order, so every index up to this one is now closed (set
        # before the callback: it asks window_full)
        self.closed_through = max(self.closed_through, pane.index)
        if self.on_pane_closed is not None:
            self.on_pane_closed(self)

    def flush(self) -> None:
        """Count every buffered transaction now (partial batches), e.g. at the end of a replay.

        Open panes stay open. Partial batches keep every guarantee; the untracked bound of
        such a pane becomes ``ceil(n/w)`` instead of ``n/w``.
        """
        for pane in list(self.panes.values()):
            if pane.buffered:
                self._count(pane, None)

    # -- queries ------------------------------------------------------------------------------

    def _window_panes(self, newest: int | None, skip_newest: int) -> list[Pane]:
        top = self.newest_index - skip_newest
        bottom = self.newest_index - self.window_panes + 1
        if newest is not None:
            bottom = max(bottom, top - newest + 1)
        return [self.panes[i] for i in self.panes.irange(bottom, top) if self.panes[i].counted]

    def snapshot(self, *, newest: int | None = None, skip_newest: int = 0) -> WindowSnapshot:
        """Frozen counts over the window (counted transactions only).

        ``newest=r`` restricts to the ``r`` most recent panes (a recent window);
        ``skip_newest=r`` leaves them out (a baseline that excludes the recent window).
        Cost: one sort over the panes' tracked entries per itemset size.
        """
        return combine_panes(
            self._window_panes(newest, skip_newest),
            item_names=self.vocabulary.names,
            epsilon=self.epsilon,
            max_itemset_size=self.max_itemset_size,
            pane_size=self.pane_size,
        )

    def split_snapshot(
        self, recent_panes: int
    ) -> tuple[WindowSnapshot, WindowSnapshot, WindowSnapshot]:
        """``(window, recent, baseline)``: the ``recent_panes`` newest panes of the window,
        the rest of it, and the whole window (equal to :meth:`snapshot`).

        Called at every pane close. The baseline is the previous call's window with the panes
        that left it subtracted exactly (when none of its panes changed since), and the window
        is the baseline merged with the recent part, so no call re-merges every pane.
        Cost: one binary search per entry of the expired panes plus two two-run merges.
        """
        live = self._window_panes(None, 0)
        cut = max(len(live) - recent_panes, 0)
        base_panes, recent_part = live[:cut], live[cut:]
        shape = {
            "item_names": self.vocabulary.names,
            "epsilon": self.epsilon,
            "max_itemset_size": self.max_itemset_size,
            "pane_size": self.pane_size,
        }
        baseline: PaneSum | None = None
        cache = self._window_sum
        if cache is not None:
            then = {id(p): n for p, n in cache.panes}
            unchanged = all(p.counted == n for p, n in cache.panes)
            if unchanged and all(then.get(id(p)) == p.counted for p in base_panes):
                wanted = {id(p) for p in base_panes}
                gone = [p for p, _ in cache.panes if id(p) not in wanted]
                baseline = subtract_panes(cache, gone)
        if baseline is None:
            baseline = sum_panes(base_panes, **shape)  # type: ignore[arg-type]
        recent = sum_panes(recent_part, **shape)  # type: ignore[arg-type]
        window = merge_sums(baseline, recent)
        self._window_sum = window
        return window.snapshot, recent.snapshot, baseline.snapshot

    @property
    def window_full(self) -> bool:
        """True once a whole window of panes has closed (the end of warm-up)."""
        if self.first_index is None:
            return False
        return self.closed_through - self.first_index + 1 >= self.window_panes

    def statistics(self) -> EngineStatistics:
        live = self._window_panes(None, 0)
        tracked = [0] * self.max_itemset_size
        for p in self.panes.values():
            for k, n in enumerate(p.summary.tracked):
                tracked[k] += n
        return EngineStatistics(
            transactions_seen=self.transactions_seen,
            rejected=dict(self.rejected),
            window_transactions=sum(p.counted for p in live),
            window_max_error=sum(p.absent_bound for p in live),
            tracked_entries=tuple(tracked),
            bytes_held=sum(p.nbytes for p in self.panes.values()),
            panes=len(self.panes),
            buffered_transactions=sum(p.buffered for p in self.panes.values()),
            max_event_ts=self.max_event_ts,
            vocabulary_size=len(self.vocabulary),
        )

    def check_invariants(self) -> None:
        """Assert the engine's invariants (panes, sequence numbers, window span)."""
        for p in self.panes.values():
            p.check_invariants()
            if p.counted:
                assert int(p.summary.levels[0].items.max(initial=-1)) < len(self.vocabulary)
        counted = [p for p in self.panes.values() if p.counted]
        assert all(p.index <= self.newest_index for p in counted), "pane beyond newest_index"
        live = self._window_panes(None, 0)
        assert len(live) <= self.window_panes, "more panes than the window holds"
        total = sum(p.counted + p.buffered for p in self.panes.values())
        assert total <= self.transactions_seen, "more transactions held than seen"
        if not self.time_based:
            assert self.pane_size is not None
            for p in counted:
                assert p.counted + p.buffered <= self.pane_size, "pane over pane_size"
                assert (p.first_seq - 1) // self.pane_size == p.index, "seq outside its pane"
            spans = sorted((p.first_seq, p.last_seq) for p in live)
            for (_, a_hi), (b_lo, _) in pairwise(spans):
                assert a_hi + 1 == b_lo, "count-based window has a gap"
        if self.width:
            snap_error = sum(p.absent_bound for p in live)
            n = sum(p.counted for p in live)
            assert snap_error <= math.ceil(self.epsilon * n - 1e-9) + len(live), "max_error bound"

    # -- persistence --------------------------------------------------------------------------

    def state(self) -> tuple[dict[str, object], dict[str, np.ndarray]]:
        """Everything needed to resume: a JSON-able manifest and named numpy arrays."""
        arrays = self.vocabulary.to_arrays()
        panes_meta = []
        for j, pane in enumerate(self.panes.values()):
            panes_meta.append(pane.meta())
            arrays.update(pane.to_arrays(f"pane{j}."))
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
            "newest_index": self.newest_index,
            "first_index": self.first_index,
            "closed_through": self.closed_through,
            "panes": panes_meta,
        }
        return meta, arrays

    @classmethod
    def from_state(
        cls,
        config: EngineConfig,
        meta: dict[str, object],
        arrays: dict[str, np.ndarray],
        *,
        on_pane_closed: Callable[[Engine], None] | None = None,
    ) -> Engine:
        """Rebuild an engine saved by :meth:`state`; every estimate is identical afterwards."""
        eng = cls(config, on_pane_closed=on_pane_closed)
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
        eng.next_seq = int(meta["next_seq"])  # type: ignore[call-overload]
        eng.transactions_seen = int(meta["transactions_seen"])  # type: ignore[call-overload]
        eng.rejected = Counter(meta["rejected"])  # type: ignore[arg-type]
        eng.max_event_ts = meta["max_event_ts"]  # type: ignore[assignment]
        eng.newest_index = int(meta["newest_index"])  # type: ignore[call-overload]
        eng.first_index = meta["first_index"]  # type: ignore[assignment]
        eng.closed_through = int(meta["closed_through"])  # type: ignore[call-overload]
        for j, pm in enumerate(meta["panes"]):  # type: ignore[arg-type]
            pane = Pane.from_state(pm, arrays, f"pane{j}.", eng.epsilon, eng.max_itemset_size)
            eng.panes[pane.index] = pane
        return eng


def _sort_dedupe(
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
