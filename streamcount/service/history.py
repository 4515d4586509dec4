"""A bounded history of support per pane close, for the itemsets people are watching.

At every evaluated pane close the service records, for each *followed* itemset, its count
bounds on the window of that close. Followed are the itemsets of the active rules and every
itemset alerted on in the last ``history.alerted_closes`` pane closes. ``GET /v1/history`` and
the page's chart read it.

Bound and eviction
------------------
A *point* is one itemset at one pane close. At most ``history.max_points`` points are held,
and at most that many pane closes: when a close is added and the total is over, the oldest
pane close goes first, with every point it has, until it fits (so every itemset's series covers
the same recent pane closes, and the chart of any itemset spans the same stretch of time). An
itemset whose points have all gone and that is no longer followed is forgotten. When a single
pane close has more followed itemsets than ``max_points``, the alerted ones and the best rules
(the listing's order) are kept and the rest of that close is not recorded. Memory: 24 bytes per
point (pane close, low and high count as 64-bit integers) in buffers that grow by doubling, plus
56 bytes per pane close and the item names of each itemset held.

Each point's support interval is ``[low / N, high / N]``: ``low`` is the window's count (a lower
bound) and ``high`` the itemset's upper bound tightened by the upper bound of every proper
subset and by ``N`` (an itemset is in no more baskets than any of its parts), so it is never
wider than the support interval of any rule over the same itemset, and the point value
``low / N`` equals that rule's support value.

Readers on HTTP threads get an immutable :class:`HistoryView` (numpy slices that later appends
never write to), so a request never holds a lock on the counting loop.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import CheckpointError

__all__ = ["HISTORY_STATE_VERSION", "HistoryStore", "HistoryView", "Itemset"]

#: version of the history's part of the checkpoint
HISTORY_STATE_VERSION = 1

Itemset = tuple[str, ...]

_META_COLUMNS = ("close", "pane", "first_seq", "last_seq", "transactions", "max_error")


class _Column:
    """An append-only int64 (or float64) buffer that grows by doubling and drops from the front
    by moving ``start``; slices handed out are never written again."""

    __slots__ = ("buf", "start", "stop")

    def __init__(self, dtype: type, capacity: int = 8) -> None:
        self.buf: np.ndarray = np.zeros(capacity, dtype=dtype)
        self.start = 0
        self.stop = 0

    def __len__(self) -> int:
        return self.stop - self.start

    def append(self, value: float) -> None:
        if self.stop == self.buf.shape[0]:
            live = self.buf[self.start : self.stop]
            # a fresh buffer: the old one stays as it is for the readers that hold slices of it
            grown = np.zeros(max(8, 2 * len(live)), dtype=self.buf.dtype)
            grown[: len(live)] = live
            self.buf, self.start, self.stop = grown, 0, len(live)
        self.buf[self.stop] = value
        self.stop += 1

    def drop_front(self, n: int) -> None:
        self.start = min(self.stop, self.start + n)

    def view(self) -> np.ndarray:
        out = self.buf[self.start : self.stop]
        out.flags.writeable = False
        return out

    @classmethod
    def of(cls, values: np.ndarray, dtype: type) -> _Column:
        col = cls(dtype, max(8, int(values.shape[0])))
        col.buf[: values.shape[0]] = values
        col.stop = int(values.shape[0])
        return col


@dataclass(slots=True)
class _Series:
    close: _Column = field(default_factory=lambda: _Column(np.int64))
    low: _Column = field(default_factory=lambda: _Column(np.int64))
    high: _Column = field(default_factory=lambda: _Column(np.int64))

    def __len__(self) -> int:
        return len(self.close)

    def drop_before(self, first_close: int) -> None:
        closes = self.close.view()
        n = int(np.searchsorted(closes, first_close, side="left"))
        for col in (self.close, self.low, self.high):
            col.drop_front(n)


@dataclass(frozen=True, slots=True)
class HistoryView:
    """What readers see of the history at one moment; never changes.

    Attributes
    ----------
    series:
        Each itemset held: ``(close, low, high)`` arrays, oldest pane close first.
    meta:
        Per pane close held (``close``, ``pane``, ``first_seq``, ``last_seq``,
        ``transactions``, ``max_error`` as int64 arrays, and ``event_time`` float64 with NaN
        for none), oldest first; pane closes are consecutive numbers.
    followed:
        The itemsets that get a point at the next pane close.
    max_points:
        The cap (``history.max_points``).
    """

    series: Mapping[Itemset, tuple[np.ndarray, np.ndarray, np.ndarray]]
    meta: Mapping[str, np.ndarray]
    followed: frozenset[Itemset]
    max_points: int
    #: points held
    points: int = 0

    @property
    def first_close(self) -> int | None:
        closes = self.meta["close"]
        return int(closes[0]) if closes.shape[0] else None

    @property
    def last_close(self) -> int | None:
        closes = self.meta["close"]
        return int(closes[-1]) if closes.shape[0] else None

    def summary(self) -> dict[str, object]:
        """``{points, max_points, itemsets, followed, first_close, last_close}``."""
        return {
            "points": self.points,
            "max_points": self.max_points,
            "itemsets": len(self.series),
            "followed": len(self.followed),
            "first_close": self.first_close,
            "last_close": self.last_close,
        }

    def points_of(self, items: Iterable[str], since: int | None = None) -> list[dict[str, Any]]:
        """The points of one itemset after pane close ``since`` (all when ``None``), oldest
        first; ``[]`` for an itemset with no history."""
        key = tuple(sorted(set(items)))
        found = self.series.get(key)
        if found is None:
            return []
        close, low, high = found
        start = 0 if since is None else int(np.searchsorted(close, since, side="right"))
        meta = self.meta
        base = self.first_close
        out = []
        for i in range(start, int(close.shape[0])):
            c = int(close[i])
            assert base is not None
            row = c - base
            n = int(meta["transactions"][row])
            lo, hi = int(low[i]), int(high[i])
            ts = float(meta["event_time"][row])
            out.append(
                {
                    "pane_close": c,
                    "pane": int(meta["pane"][row]),
                    "first_seq": int(meta["first_seq"][row]),
                    "last_seq": int(meta["last_seq"][row]),
                    "event_time": None if math.isnan(ts) else ts,
                    "transactions": n,
                    "max_error": int(meta["max_error"][row]),
                    "count": {"low": lo, "high": hi},
                    "support": {
                        "value": lo / n if n else 0.0,
                        "low": lo / n if n else 0.0,
                        "high": hi / n if n else 0.0,
                    },
                }
            )
        return out

    def last_seq_of(self, close: int) -> int | None:
        """The window's last sequence number at pane close ``close`` (if still held)."""
        base = self.first_close
        if base is None or not base <= close <= base + self.meta["close"].shape[0] - 1:
            return None
        return int(self.meta["last_seq"][close - base])


def _empty_meta() -> dict[str, _Column]:
    cols = {name: _Column(np.int64) for name in _META_COLUMNS}
    cols["event_time"] = _Column(np.float64)
    return cols


def _tightened_high(window: WindowSnapshot, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Count bounds of ``rows`` (``(n, k)`` ascending item ids): the window's lower bound, and
    the upper bound tightened by every proper subset's upper bound and by ``N``."""
    low, high = window.bounds_many(rows)
    high = np.minimum(high, window.transactions)
    k = rows.shape[1]
    for r in range(1, k):
        for cols in itertools.combinations(range(k), r):
            _, sub_high = window.bounds_many(rows[:, list(cols)])
            high = np.minimum(high, sub_high)
    return low, np.maximum(high, low)


class HistoryStore:
    """The history, updated by the counting loop at each pane close.

    Parameters
    ----------
    max_points:
        ``history.max_points``: points (itemset x pane close) held at most.
    alerted_closes:
        ``history.alerted_closes``: pane closes an alerted itemset stays followed after its
        last alert (on top of the active rules, which are always followed).
    """

    def __init__(self, max_points: int, alerted_closes: int) -> None:
        if max_points < 1:
            raise ValueError(f"max_points = {max_points}: must be at least 1")
        self.max_points = int(max_points)
        self.alerted_closes = int(alerted_closes)
        self._series: dict[Itemset, _Series] = {}
        self._meta = _empty_meta()
        self._alerted: dict[Itemset, int] = {}
        self._points = 0
        self._followed: frozenset[Itemset] = frozenset()
        self._view = self._make_view()

    # -- the loop's side --------------------------------------------------------------------

    @property
    def view(self) -> HistoryView:
        """The latest immutable view (replaced at each pane close)."""
        return self._view

    @property
    def points(self) -> int:
        return self._points

    def record(
        self,
        close: int,
        window: WindowSnapshot,
        *,
        active: Sequence[Itemset],
        alerted: Sequence[Itemset] = (),
        pane: int = -1,
    ) -> HistoryView:
        """Add pane close number ``close`` (the window evaluated there): one point per
        followed itemset, then evict down to the cap. Returns the new view.

        Parameters
        ----------
        close:
            The pipeline's pane-close number (one more than the last one recorded, or any
            larger number after a gap: the history then starts again).
        window:
            The window at that close.
        active:
            The itemsets of the active rules, best first (kept first when one close alone is
            over the cap).
        alerted:
            The itemsets alerted on at this close.
        pane:
            The index of the pane that closed.
        """
        last = self._view.last_close
        if last is not None and close != last + 1:
            # a gap (a restart that lost the history, or a foreign checkpoint): start over
            self._series.clear()
            self._meta = _empty_meta()
            self._points = 0
        for items in alerted:
            self._alerted[tuple(sorted(items))] = close
        self._alerted = {k: c for k, c in self._alerted.items() if close - c <= self.alerted_closes}
        wanted: list[Itemset] = []
        seen: set[Itemset] = set()
        # alerted first, then the active rules in the listing's order: the order kept when one
        # pane close alone is over the cap
        by_recency = sorted(self._alerted.items(), key=lambda kv: (-kv[1], kv[0]))
        for items in [k for k, _ in by_recency] + [tuple(sorted(a)) for a in active]:
            if len(items) >= 1 and items not in seen:
                seen.add(items)
                wanted.append(items)
        self._followed = frozenset(wanted)
        recorded = self._measure(window, wanted[: self.max_points])
        meta = self._meta
        for name, value in (
            ("close", close),
            ("pane", pane),
            ("first_seq", int(window.first_seq)),
            ("last_seq", int(window.last_seq)),
            ("transactions", int(window.transactions)),
            ("max_error", int(window.max_error)),
        ):
            meta[name].append(value)
        meta["event_time"].append(math.nan if window.last_ts is None else float(window.last_ts))
        for items, lo, hi in recorded:
            series = self._series.get(items)
            if series is None:
                series = self._series[items] = _Series()
            series.close.append(close)
            series.low.append(lo)
            series.high.append(hi)
        self._points += len(recorded)
        self._evict()
        self._view = self._make_view()
        return self._view

    def _measure(
        self, window: WindowSnapshot, itemsets: Sequence[Itemset]
    ) -> list[tuple[Itemset, int, int]]:
        """Count bounds of each itemset on ``window``, vectorised per size. A name the
        vocabulary has never seen is in no basket: ``(0, 0)``. An itemset larger than the
        window counts is left out (rules and alerts never name one)."""
        index = {name: i for i, name in enumerate(window.item_names)}
        by_size: dict[int, list[tuple[Itemset, list[int]]]] = {}
        out: list[tuple[Itemset, int, int]] = []
        for items in itemsets:
            if len(items) > window.max_itemset_size:
                continue
            ids = [index.get(name) for name in items]
            known = [i for i in ids if i is not None]
            if len(known) < len(ids):
                out.append((items, 0, 0))
                continue
            by_size.setdefault(len(items), []).append((items, sorted(known)))
        for group in by_size.values():
            rows = np.array([ids for _, ids in group], dtype=np.int32)
            low, high = _tightened_high(window, rows)
            for (items, _), lo, hi in zip(group, low.tolist(), high.tolist(), strict=True):
                out.append((items, int(lo), int(hi)))
        return out

    def _evict(self) -> None:
        meta = self._meta
        closes = meta["close"]
        dropped_any = False
        while len(closes) > 1 and (self._points > self.max_points or len(closes) > self.max_points):
            oldest = int(closes.view()[0])
            for col in meta.values():
                col.drop_front(1)
            for series in self._series.values():
                if len(series) and int(series.close.view()[0]) == oldest:
                    for col in (series.close, series.low, series.high):
                        col.drop_front(1)
                    self._points -= 1
            dropped_any = True
        if dropped_any:
            gone = [k for k, s in self._series.items() if not len(s) and k not in self._followed]
            for k in gone:
                del self._series[k]

    def _make_view(self) -> HistoryView:
        series = {
            k: (s.close.view(), s.low.view(), s.high.view())
            for k, s in self._series.items()
            if len(s)
        }
        meta = {name: col.view() for name, col in self._meta.items()}
        return HistoryView(series, meta, self._followed, self.max_points, self._points)

    # -- persistence --------------------------------------------------------------------------

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able part and arrays (``history.*``) for the checkpoint."""
        names = sorted(self._series)
        lengths = [len(self._series[k]) for k in names]

        def cat(get: str) -> np.ndarray:
            parts = [getattr(self._series[k], get).view() for k in names]
            return np.concatenate(parts) if parts else np.zeros(0, dtype=np.int64)

        arrays = {
            "history.close": cat("close"),
            "history.low": cat("low"),
            "history.high": cat("high"),
            "history.lengths": np.array(lengths, dtype=np.int64),
        }
        for name, col in self._meta.items():
            arrays[f"history.meta.{name}"] = col.view().copy()
        meta = {
            "version": HISTORY_STATE_VERSION,
            "itemsets": [list(k) for k in names],
            "alerted": [[list(k), c] for k, c in sorted(self._alerted.items())],
            "followed": sorted(list(k) for k in self._followed),
        }
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        """Restore :meth:`state`; over a smaller ``max_points`` the oldest pane closes go.

        Raises
        ------
        CheckpointError
            When the state does not fit together.
        """
        if not isinstance(meta, Mapping) or meta.get("version") != HISTORY_STATE_VERSION:
            found = meta.get("version") if isinstance(meta, Mapping) else type(meta).__name__
            raise CheckpointError(
                f"history state: version {found!r} is not {HISTORY_STATE_VERSION}; start with "
                "--fresh or use the streamcount version that wrote it"
            )
        try:
            names = [tuple(str(x) for x in k) for k in meta["itemsets"]]
            lengths = np.asarray(arrays["history.lengths"], dtype=np.int64)
            close = np.asarray(arrays["history.close"], dtype=np.int64)
            low = np.asarray(arrays["history.low"], dtype=np.int64)
            high = np.asarray(arrays["history.high"], dtype=np.int64)
            if len(names) != lengths.shape[0] or int(lengths.sum()) != close.shape[0]:
                raise ValueError("itemsets and points do not match")
            if not close.shape == low.shape == high.shape:
                raise ValueError("point columns differ in length")
            cols = {}
            for name in (*_META_COLUMNS, "event_time"):
                dtype = np.float64 if name == "event_time" else np.int64
                cols[name] = _Column.of(np.asarray(arrays[f"history.meta.{name}"], dtype), dtype)
            if len({len(c) for c in cols.values()}) > 1:
                raise ValueError("pane-close columns differ in length")
            series: dict[Itemset, _Series] = {}
            offset = 0
            for key, n in zip(names, lengths.tolist(), strict=True):
                part = slice(offset, offset + n)
                series[key] = _Series(
                    _Column.of(close[part], np.int64),
                    _Column.of(low[part], np.int64),
                    _Column.of(high[part], np.int64),
                )
                offset += n
            alerted = {tuple(str(x) for x in k): int(c) for k, c in meta["alerted"]}
            followed = frozenset(tuple(str(x) for x in k) for k in meta["followed"])
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"history state is malformed: {exc!r}") from exc
        self._series, self._meta, self._alerted = series, cols, alerted
        self._followed = followed
        self._points = int(close.shape[0])
        self._evict()
        self._view = self._make_view()

    def check_invariants(self) -> None:
        """Assert the documented bounds (tests call this)."""
        view = self._view
        assert view.points == sum(int(c.shape[0]) for c, _, _ in view.series.values()), "count"
        assert view.points <= self.max_points, "points cap"
        assert view.meta["close"].shape[0] <= self.max_points, "closes cap"
        closes = view.meta["close"]
        if closes.shape[0]:
            assert (np.diff(closes) == 1).all(), "pane closes are consecutive"
        for key, (c, lo, hi) in view.series.items():
            assert c.shape == lo.shape == hi.shape, key
            assert (np.diff(c) > 0).all(), f"{key}: closes increase"
            assert closes.shape[0] and c[0] >= closes[0] and c[-1] <= closes[-1], key
            assert (lo <= hi).all(), f"{key}: low <= high"
