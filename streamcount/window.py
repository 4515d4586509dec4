"""Panes and the sliding window made of them.

A window is a run of consecutive panes; each :class:`Pane` keeps its own Lossy Counting
summary with the same epsilon (so the same bucket width ``w``) plus a buffer of transactions
received but not yet counted. The window's estimate of an itemset is the sum over its panes
(ALGORITHMS.md section 2, "pane scheme"): with ``B_j = ceil(n_j / w)`` the bound on anything a
pane does not track::

    count(X) = sum_j f_j(X)                      (0 where pane j does not track X)
    upper(X) = sum_j (f_j + delta_j  if tracked else  B_j)
    max_error = sum_j B_j  <=  epsilon * N + (panes whose length is not a multiple of w)

Splitting the window into panes costs memory, not accuracy. A pane that leaves the window is
dropped whole, so its transactions are subtracted exactly; nothing is ever decremented.

Worked example (``w = 4``): panes of 10, 10 and 6 transactions give ``B = 3, 3, 2`` and
``max_error = 8``; an itemset tracked in the first two panes as ``(f, delta) = (5, 1), (7, 0)``
and absent from the third has ``count = 12`` and ``upper = 6 + 7 + 2 = 15``.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from streamcount.counters import LossySummary
from streamcount.keys import pack, unique_with_sum
from streamcount.snapshot import LevelCounts, WindowSnapshot

__all__ = ["Pane", "combine_panes", "merge_snapshots"]


class Pane:
    """One pane: a Lossy Counting summary plus the buffer of not-yet-counted transactions.

    Attributes
    ----------
    index:
        Pane number: ``(seq - 1) // pane_size`` for a count-based window,
        ``floor(ts / pane_seconds)`` for a time-based one.
    summary:
        Counts of the transactions counted so far (``summary.n`` of them).
    closed:
        No transaction will be added any more.
    """

    __slots__ = (
        "_buf_flat",
        "_buf_len",
        "_buf_seq",
        "_buf_ts",
        "buffered",
        "closed",
        "first_seq",
        "index",
        "last_seq",
        "max_ts",
        "min_ts",
        "summary",
    )

    def __init__(self, index: int, epsilon: float, max_itemset_size: int) -> None:
        self.index = int(index)
        self.summary = LossySummary(epsilon, max_itemset_size)
        self.closed = False
        self.first_seq = 0  # of counted transactions; 0 while none
        self.last_seq = 0
        self.min_ts: float | None = None
        self.max_ts: float | None = None
        self.buffered = 0
        self._buf_flat: list[np.ndarray] = []
        self._buf_len: list[np.ndarray] = []
        self._buf_seq: list[np.ndarray] = []
        self._buf_ts: list[np.ndarray] = []

    @property
    def counted(self) -> int:
        return self.summary.n

    @property
    def absent_bound(self) -> int:
        return self.summary.b_current

    @property
    def nbytes(self) -> int:
        parts = self._buf_flat + self._buf_len + self._buf_seq + self._buf_ts
        return self.summary.nbytes + sum(int(a.nbytes) for a in parts)

    def append(
        self, flat: np.ndarray, lengths: np.ndarray, seq: np.ndarray, ts: np.ndarray
    ) -> None:
        """Buffer transactions (CSR pieces: ascending distinct ids per transaction)."""
        if lengths.shape[0] == 0:
            return
        self._buf_flat.append(flat)
        self._buf_len.append(lengths)
        self._buf_seq.append(seq)
        self._buf_ts.append(ts)
        self.buffered += int(lengths.shape[0])

    def count_buffer(self, limit: int | None = None) -> int:
        """Count the first ``limit`` buffered transactions (all when ``None``) as one batch."""
        if self.buffered == 0:
            return 0
        flat = np.concatenate(self._buf_flat)
        lengths = np.concatenate(self._buf_len)
        seq = np.concatenate(self._buf_seq)
        ts = np.concatenate(self._buf_ts)
        take = self.buffered if limit is None else min(limit, self.buffered)
        cut = int(lengths[:take].sum())
        indptr = np.zeros(take + 1, dtype=np.int64)
        np.cumsum(lengths[:take], out=indptr[1:])
        self.summary.add_batch(indptr, flat[:cut])
        s = seq[:take]
        lo, hi = int(s.min()), int(s.max())
        self.first_seq = lo if self.first_seq == 0 else min(self.first_seq, lo)
        self.last_seq = max(self.last_seq, hi)
        t = ts[:take]
        t = t[~np.isnan(t)]
        if t.size:
            tmin, tmax = float(t.min()), float(t.max())
            self.min_ts = tmin if self.min_ts is None else min(self.min_ts, tmin)
            self.max_ts = tmax if self.max_ts is None else max(self.max_ts, tmax)
        rest = self.buffered - take
        if rest:
            self._buf_flat = [flat[cut:]]
            self._buf_len = [lengths[take:]]
            self._buf_seq = [seq[take:]]
            self._buf_ts = [ts[take:]]
        else:
            self._buf_flat, self._buf_len, self._buf_seq, self._buf_ts = [], [], [], []
        self.buffered = rest
        return take

    # -- persistence ------------------------------------------------------------------------

    def meta(self) -> dict[str, object]:
        return {
            "index": self.index,
            "n": self.summary.n,
            "closed": self.closed,
            "first_seq": self.first_seq,
            "last_seq": self.last_seq,
            "min_ts": self.min_ts,
            "max_ts": self.max_ts,
        }

    def to_arrays(self, prefix: str) -> dict[str, np.ndarray]:
        out = self.summary.to_arrays(prefix)

        def cat(parts: list[np.ndarray], dtype: type) -> np.ndarray:
            return np.concatenate(parts).astype(dtype) if parts else np.zeros(0, dtype=dtype)

        out[f"{prefix}buf.flat"] = cat(self._buf_flat, np.int32)
        out[f"{prefix}buf.len"] = cat(self._buf_len, np.int64)
        out[f"{prefix}buf.seq"] = cat(self._buf_seq, np.int64)
        out[f"{prefix}buf.ts"] = cat(self._buf_ts, np.float64)
        return out

    @classmethod
    def from_state(
        cls,
        meta: dict[str, object],
        arrays: dict[str, np.ndarray],
        prefix: str,
        epsilon: float,
        max_itemset_size: int,
    ) -> Pane:
        pane = cls(int(meta["index"]), epsilon, max_itemset_size)  # type: ignore[call-overload]
        pane.summary = LossySummary.from_arrays(
            epsilon,
            max_itemset_size,
            int(meta["n"]),
            arrays,
            prefix,  # type: ignore[call-overload]
        )
        pane.closed = bool(meta["closed"])
        pane.first_seq = int(meta["first_seq"])  # type: ignore[call-overload]
        pane.last_seq = int(meta["last_seq"])  # type: ignore[call-overload]
        pane.min_ts = meta["min_ts"]  # type: ignore[assignment]
        pane.max_ts = meta["max_ts"]  # type: ignore[assignment]
        pane.append(
            np.asarray(arrays[f"{prefix}buf.flat"], dtype=np.int32),
            np.asarray(arrays[f"{prefix}buf.len"], dtype=np.int64),
            np.asarray(arrays[f"{prefix}buf.seq"], dtype=np.int64),
            np.asarray(arrays[f"{prefix}buf.ts"], dtype=np.float64),
        )
        return pane

    def check_invariants(self) -> None:
        self.summary.check_invariants()
        assert self.buffered == sum(int(a.shape[0]) for a in self._buf_len), "buffer count"
        if self.summary.n:
            assert 1 <= self.first_seq <= self.last_seq, "pane seq range"
            assert self.last_seq - self.first_seq + 1 >= self.summary.n, "seq span below n"
        else:
            assert self.first_seq == self.last_seq == 0, "empty pane with a seq range"


def _sum_parts(
    size: int, parts: Sequence[tuple[np.ndarray, np.ndarray, np.ndarray, int]], radix: int
) -> LevelCounts:
    """Sum ``(items, lower, upper, absent bound)`` parts of one itemset size.

    The upper bound of an itemset is its own upper bound in each part that lists it plus the
    part's absent bound where it is missing: summed as ``sum(upper - absent) + sum(absent)``.
    """
    total_absent = sum(p[3] for p in parts)  # every part counts, listed entries or not
    parts = [p for p in parts if p[0].shape[0]]
    if not parts:
        return LevelCounts.empty(size)
    if len(parts) == 1:  # one part: already sorted and unique
        items, low, high, absent = parts[0]
        count, upper = low.copy(), high + (total_absent - absent)
    else:
        rows = np.concatenate([p[0] for p in parts])
        low_all = np.concatenate([p[1] for p in parts])
        extra = np.concatenate([p[2] - p[3] for p in parts])
        _, first, (count, upper_extra) = unique_with_sum(pack(rows, radix), low_all, extra)
        items = rows[first]
        upper = upper_extra + total_absent
    for arr in (items, count, upper):
        arr.setflags(write=False)
    return LevelCounts(size, items, count, upper)


def combine_panes(
    panes: Sequence[Pane],
    *,
    item_names: Sequence[str],
    epsilon: float,
    max_itemset_size: int,
    pane_size: int | None,
) -> WindowSnapshot:
    """Sum pane summaries into a frozen :class:`WindowSnapshot` (the pane scheme above).

    Cost: one concatenation and one stable sort (a merge of the panes' sorted runs) per
    itemset size over all panes' tracked entries; nothing to merge for a single pane.
    """
    live = [p for p in panes if p.counted > 0]
    radix = max(len(item_names), 1)
    levels = []
    for k in range(1, max_itemset_size + 1):
        parts = []
        for p in live:
            lv = p.summary.levels[k - 1]
            parts.append((lv.items, lv.f, lv.f + lv.delta, p.absent_bound))
        levels.append(_sum_parts(k, parts, radix))
    ts_min = [p.min_ts for p in live if p.min_ts is not None]
    ts_max = [p.max_ts for p in live if p.max_ts is not None]
    return WindowSnapshot(
        first_seq=min((p.first_seq for p in live), default=0),
        last_seq=max((p.last_seq for p in live), default=0),
        transactions=sum(p.counted for p in live),
        max_error=sum(p.absent_bound for p in live),
        epsilon=epsilon,
        pane_size=pane_size,
        panes=len(live),
        levels=tuple(levels),
        item_names=item_names,
        first_ts=min(ts_min) if ts_min else None,
        last_ts=max(ts_max) if ts_max else None,
    )


def merge_snapshots(a: WindowSnapshot, b: WindowSnapshot) -> WindowSnapshot:
    """The snapshot of two disjoint spans of panes, from theirs (the same pane-sum rule: a
    missing itemset counts 0 below and the span's ``max_error`` above).

    Used to build the window from its baseline and recent parts without re-merging every pane.
    """
    if a.transactions == 0:
        return b
    if b.transactions == 0:
        return a
    names = a.item_names if len(a.item_names) >= len(b.item_names) else b.item_names
    radix = max(len(names), 1)
    levels = tuple(
        _sum_parts(
            la.size,
            [
                (la.items, la.count, la.upper, a.max_error),
                (lb.items, lb.count, lb.upper, b.max_error),
            ],
            radix,
        )
        for la, lb in zip(a.levels, b.levels, strict=True)
    )
    ts_min = [t for t in (a.first_ts, b.first_ts) if t is not None]
    ts_max = [t for t in (a.last_ts, b.last_ts) if t is not None]
    return WindowSnapshot(
        first_seq=min(a.first_seq, b.first_seq),
        last_seq=max(a.last_seq, b.last_seq),
        transactions=a.transactions + b.transactions,
        max_error=a.max_error + b.max_error,
        epsilon=a.epsilon,
        pane_size=a.pane_size,
        panes=a.panes + b.panes,
        levels=levels,
        item_names=names,
        first_ts=min(ts_min) if ts_min else None,
        last_ts=max(ts_max) if ts_max else None,
    )
