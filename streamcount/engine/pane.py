"""One pane of the sliding window: a counting summary plus the buffer of transactions received
but not yet counted.

A pane's transactions are counted in batches (whole buckets of ``ceil(1/epsilon)``
transactions, see :mod:`streamcount.engine.counters`); until a batch is full they wait in the
buffer, as CSR pieces of ascending, distinct item ids. The buffer is part of the checkpoint,
so a restart counts exactly the same batches as an uninterrupted run.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from streamcount.engine.counters import LossySummary, Summary
from streamcount.engine.keys import PairSet
from streamcount.engine.merged import MergedSummary

__all__ = ["OVERLAY_EXACT_MAX", "Pane", "candidate_itemsets"]

#: the most candidate itemsets a buffer may expand to and still be counted exactly as the
#: fresh overlay: about 65 bytes each at the peak (measured on the retail dataset at K = 3),
#: some 70 MB
OVERLAY_EXACT_MAX = 1 << 20


def candidate_itemsets(lengths: np.ndarray, k: int) -> int:
    """How many itemsets of 1 to ``k`` items transactions of ``lengths`` distinct items hold
    (repeats across transactions counted again): an upper bound on what exact counting keeps.

    >>> candidate_itemsets(np.array([3, 4]), 2)  # 3 + 3 and 4 + 6
    16
    """
    n = np.asarray(lengths, dtype=np.float64)
    total, term = 0.0, np.ones_like(n)
    for j in range(1, k + 1):
        term = term * np.maximum(n - (j - 1), 0.0) / j  # C(n, j)
        total += float(term.sum())
    return round(total)


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
        "_exact",
        "buffered",
        "closed",
        "excluded_pairs",
        "first_seq",
        "index",
        "last_seq",
        "max_ts",
        "min_ts",
        "summary",
    )

    def __init__(
        self,
        index: int,
        epsilon: float,
        max_itemset_size: int,
        excluded_pairs: PairSet | None = None,
    ) -> None:
        self.index = int(index)
        #: item pairs never counted (an item with its own catalogue ancestor), or ``None``
        self.excluded_pairs = excluded_pairs
        self.summary: Summary = LossySummary(epsilon, max_itemset_size, excluded_pairs)
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
        self._exact: Pane | None = None  # the buffer counted exactly (cached)

    @property
    def counted(self) -> int:
        return self.summary.n

    @property
    def absent_bound(self) -> int:
        return self.summary.b_current

    def seq_range(self) -> tuple[int, int]:
        """``(first, last)`` sequence numbers of the pane's transactions, counted or still
        buffered; ``(0, 0)`` when it holds none."""
        lo, hi = self.first_seq, self.last_seq
        if self.buffered:
            b_lo = min(int(s.min()) for s in self._buf_seq if s.size)
            b_hi = max(int(s.max()) for s in self._buf_seq if s.size)
            lo = b_lo if lo == 0 else min(lo, b_lo)
            hi = max(hi, b_hi)
        return lo, hi

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

    def exact_buffer(self) -> Pane | None:
        """The buffered transactions counted as a pane of their own, or ``None`` when nothing
        is buffered: the overlay that makes answers fresh. Cached until the buffer changes.

        Counted exactly (epsilon 0) when the buffer expands to at most
        :data:`OVERLAY_EXACT_MAX` candidate itemsets, so adding it to the window keeps every
        bound and ``max_error``; past that (long baskets at K = 3 expand to millions of
        candidates, all of which exact counting would hold at once) counted with the pane's
        own epsilon, in bounded memory, and its untracked bound joins the window's
        ``max_error`` like any pane's. Either way a function of the buffer alone. Cost: one
        count of at most one batch.
        """
        if not self.buffered:
            return None
        if self._exact is None or self._exact.counted != self.buffered:
            lengths = np.concatenate(self._buf_len)
            k = len(self.summary.levels)
            epsilon = 0.0
            if candidate_itemsets(lengths, k) > OVERLAY_EXACT_MAX:
                epsilon = self.summary.epsilon
            exact = Pane(self.index, epsilon, k, self.excluded_pairs)
            exact.append(
                np.concatenate(self._buf_flat),
                lengths,
                np.concatenate(self._buf_seq),
                np.concatenate(self._buf_ts),
            )
            exact.count_buffer()
            exact.closed = True
            self._exact = exact
        return self._exact

    def ids_in_use(self, used: np.ndarray) -> None:
        """Mark in ``used`` (bool, by item id) every id this pane's summary or buffer holds
        (the summary is downward closed, so its single items cover every tracked itemset)."""
        level = self.summary.levels[0]
        if len(level):
            used[level.items[:, 0]] = True
        for part in self._buf_flat:
            used[part] = True

    def remap(self, mapping: np.ndarray) -> None:
        """Renumber item ids (an increasing old-to-new map) in the summary and the buffer."""
        table = np.asarray(mapping, dtype=np.int32)
        self.summary.remap(table)
        self._buf_flat = [table[part] for part in self._buf_flat]
        self._exact = None

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
        out: dict[str, object] = {
            "index": self.index,
            "n": self.summary.n,
            "closed": self.closed,
            "first_seq": self.first_seq,
            "last_seq": self.last_seq,
            "min_ts": self.min_ts,
            "max_ts": self.max_ts,
        }
        summary = self.summary
        if isinstance(summary, MergedSummary):  # its bound is not ceil(n / w): keep it
            out["merged"] = {"absent": summary.absent, "parts": summary.parts}
        return out

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
        meta: Mapping[str, Any],
        arrays: dict[str, np.ndarray],
        prefix: str,
        epsilon: float,
        max_itemset_size: int,
        excluded_pairs: PairSet | None = None,
    ) -> Pane:
        pane = cls(int(meta["index"]), epsilon, max_itemset_size, excluded_pairs)
        merged = meta.get("merged")
        if merged is not None:
            pane.summary = MergedSummary.from_arrays(
                epsilon,
                max_itemset_size,
                int(meta["n"]),
                arrays,
                prefix,
                absent=int(merged["absent"]),
                parts=int(merged["parts"]),
            )
        else:
            pane.summary = LossySummary.from_arrays(
                epsilon, max_itemset_size, int(meta["n"]), arrays, prefix, excluded_pairs
            )
        pane.closed = bool(meta["closed"])
        pane.first_seq = int(meta["first_seq"])
        pane.last_seq = int(meta["last_seq"])
        pane.min_ts = meta["min_ts"]
        pane.max_ts = meta["max_ts"]
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
