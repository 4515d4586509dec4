"""Change tests on the per-pane counts of candidate itemsets, one CUSUM bank per itemset size.

:class:`ChangeTracker` keeps a :class:`~streamcount.alerts.cusum.CusumBank` for each itemset size
``2..max_itemset_size``, keyed by the itemsets' item-id rows packed into int64 keys at the
vocabulary's current size (:func:`streamcount.engine.keys.pack`); when the vocabulary grows
the keys are re-packed. At each pane close it

1. brings the candidates up to date: every itemset whose window count could reach the rule
   floor (upper count at least a quarter of ``min_support`` of the window), plus the ones the
   caller must keep (listed rules, surges being followed); a new candidate starts from its
   untracked upper bound over the window before this pane (Lossy Counting: what an untracked
   itemset may have had), never from a low floor;
2. feeds the closed pane's count bounds to each bank and returns the alarms.

Sizes whose packed keys would not fit in 64 bits (a vocabulary of more than about 2 million
items at size 3) are not followed; the start-up log says so once.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any

import numpy as np

from streamcount.alerts.cusum import DEFAULT_RATIOS, CusumAlarms, CusumBank
from streamcount.engine.keys import fits_int64, lookup, pack, unpack
from streamcount.engine.snapshot import WindowSnapshot

__all__ = ["CANDIDATE_SHARE", "ChangeTracker"]

logger = logging.getLogger(__name__)

#: an itemset becomes a candidate when its window upper count reaches this share of the rule
#: floor (``min_support`` of the window); it leaves below half of that
CANDIDATE_SHARE = 0.25


class ChangeTracker:
    """Per-size CUSUM banks over candidate itemsets (see the module docstring).

    Parameters
    ----------
    max_itemset_size:
        Largest itemset size counted; sizes 2 and up are followed.
    baseline_panes:
        Panes of history in each candidate's reference rate.
    ratios:
        The alternatives, fixed multiples of the reference rate.
    """

    def __init__(
        self,
        max_itemset_size: int,
        *,
        baseline_panes: float,
        ratios: tuple[float, ...] = DEFAULT_RATIOS,
    ) -> None:
        self.ratios = tuple(ratios)
        self.baseline_panes = float(baseline_panes)
        self.banks: dict[int, CusumBank] = {
            k: CusumBank(ratios=self.ratios, baseline_panes=self.baseline_panes)
            for k in range(2, max_itemset_size + 1)
        }
        #: the vocabulary size the keys are packed with
        self.radix = 1
        self._warned: set[int] = set()

    @property
    def n_alternatives(self) -> int:
        return len(self.ratios)

    def candidates(self) -> int:
        """Itemsets followed, all sizes."""
        return sum(len(b) for b in self.banks.values())

    def _sizes(self) -> list[int]:
        out = []
        for k in self.banks:
            if fits_int64(self.radix, k):
                out.append(k)
            elif k not in self._warned:
                self._warned.add(k)
                logger.warning(
                    "itemsets of size %d are not followed for changes: %d items do not pack "
                    "into 64-bit keys at that size",
                    k,
                    self.radix,
                )
        return out

    def keys_of(self, rows: np.ndarray) -> np.ndarray:
        """Packed keys of item-id rows (all of one size) at the current radix."""
        return pack(np.asarray(rows, dtype=np.int32), self.radix)

    def rows_of(self, keys: np.ndarray, size: int) -> np.ndarray:
        """Item-id rows of packed keys."""
        return unpack(np.asarray(keys, dtype=np.int64), self.radix, size)

    def rekey(self, radix: int) -> None:
        """Re-pack every key for a vocabulary of ``radix`` items (it only grows)."""
        radix = max(int(radix), 1)
        if radix == self.radix:
            return
        old = self.radix
        for k, bank in self.banks.items():
            if not len(bank):
                continue
            if not fits_int64(radix, k):
                bank.drop(bank.keys.copy())
                continue

            def remap(keys: np.ndarray, k: int = k) -> tuple[np.ndarray, np.ndarray]:
                return pack(unpack(keys, old, k), radix), np.ones(keys.shape, dtype=bool)

            bank.remap(remap)
        self.radix = radix

    def remap(self, mapping: np.ndarray) -> None:
        """The vocabulary was compacted: renumber every key through the old-to-new id map
        (increasing); itemsets holding a released id stop being followed."""
        table = np.asarray(mapping, dtype=np.int64)
        radix = max(int((table >= 0).sum()), 1)
        old = self.radix
        for k, bank in self.banks.items():
            if not len(bank):
                continue

            def renumber(keys: np.ndarray, k: int = k) -> tuple[np.ndarray, np.ndarray]:
                rows = table[unpack(keys, old, k)]
                keep = (rows >= 0).all(axis=1)
                rows[~keep] = 0
                return pack(rows.astype(np.int32), radix), keep

            if fits_int64(radix, k):
                bank.remap(renumber)
            else:
                bank.drop(bank.keys.copy())
        self.radix = radix

    def sync(
        self,
        window: WindowSnapshot,
        pane: WindowSnapshot,
        *,
        floor_count: float,
        keep: Mapping[int, np.ndarray],
    ) -> None:
        """Add the window's itemsets that could reach the rule floor and drop those far below
        it (except ``keep``, packed keys per size).

        A new candidate's reference starts from the window before ``pane``: its upper count
        there (``window upper - pane lower``, at most the untracked bound when the window does
        not track it) over those transactions.
        """
        self.rekey(len(window.item_names))
        n_before = max(int(window.transactions) - int(pane.transactions), 0)
        for k in self._sizes():
            bank = self.banks[k]
            level = window.levels[k - 1]
            # level rows are in lexicographic order, so their packed keys come out sorted
            near = level.upper >= floor_count / 2 if len(level) else np.zeros(0, dtype=bool)
            stay = self.keys_of(level.items[near]) if near.any() else np.zeros(0, dtype=np.int64)
            enter = stay[level.upper[near] >= floor_count]
            kept = np.unique(np.asarray(keep.get(k, np.zeros(0, dtype=np.int64)), dtype=np.int64))
            if len(bank):
                leave = ~(_member(stay, bank.keys) | _member(kept, bank.keys))
                if leave.any():
                    bank.drop(bank.keys[leave])
            wanted = _sorted_union(enter, kept) if kept.size else enter
            new = wanted[~bank.contains(wanted)] if len(bank) else wanted
            if not new.size:
                continue
            rows = self.rows_of(new, k)
            w_lo, w_hi = window.bounds_many(rows)
            p_lo, p_hi = pane.bounds_many(rows)
            upper = np.clip(w_hi - p_lo, 0, n_before).astype(np.float64)
            lower = np.clip(w_lo - p_hi, 0, None).astype(np.float64)
            bank.add(new, upper, float(n_before), np.minimum(lower, upper))

    def update(
        self, pane: WindowSnapshot, *, pane_index: int, threshold: float
    ) -> dict[int, CusumAlarms]:
        """Feed the closed pane's count bounds to every bank; the alarms per size."""
        out: dict[int, CusumAlarms] = {}
        n = int(pane.transactions)
        for k in self._sizes():
            bank = self.banks[k]
            level = pane.levels[k - 1]
            if len(level):
                keys = self.keys_of(level.items)
                order = np.argsort(keys, kind="stable")
                keys, lo, hi = keys[order], level.count[order], level.upper[order]
            else:
                keys = np.zeros(0, dtype=np.int64)
                lo = hi = np.zeros(0, dtype=np.int64)
            out[k] = bank.update(
                keys,
                lo,
                np.minimum(hi, n),
                n,
                threshold,
                absent_bound=float(min(pane.max_error, n)),
                pane=pane_index,
            )
        return out

    def rebase(self, size: int, keys: np.ndarray, direction: str) -> None:
        """After an alert: the new rate is the normal one for both directions."""
        keys = np.asarray(keys, dtype=np.int64)
        if keys.size:
            self.banks[size].rebase(np.unique(keys), direction)

    # -- persistence --------------------------------------------------------------------------

    def state(self) -> tuple[dict[str, object], dict[str, np.ndarray]]:
        """JSON-able settings and the banks' arrays."""
        banks: dict[str, object] = {}
        arrays: dict[str, np.ndarray] = {}
        for k, bank in self.banks.items():
            bank_meta, bank_arrays = bank.state_dict(prefix=f"cusum{k}.")
            banks[str(k)] = bank_meta
            arrays.update(bank_arrays)
        return {"radix": self.radix, "banks": banks}, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        """Restore :meth:`state` (raises CheckpointError when it does not fit)."""
        banks = meta["banks"]
        assert isinstance(banks, Mapping)
        for k in self.banks:
            self.banks[k] = CusumBank.load_state(banks[str(k)], dict(arrays), prefix=f"cusum{k}.")
        self.radix = int(meta["radix"])

    def check_invariants(self) -> None:
        for bank in self.banks.values():
            bank.check_invariants()


def _member(sorted_keys: np.ndarray, queries: np.ndarray) -> np.ndarray:
    """Which of ``queries`` are in ``sorted_keys`` (ascending): a binary search each, where
    ``np.isin`` would sort both again."""
    return lookup(sorted_keys, queries)[1]


def _sorted_union(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The union of two sorted arrays of distinct keys, sorted: ``b``'s keys missing from ``a``
    inserted in place (``np.union1d`` would sort both again).

    >>> _sorted_union(np.array([2, 5, 9]), np.array([1, 5, 7])).tolist()
    [1, 2, 5, 7, 9]
    """
    extra = b[~_member(a, b)] if a.size else b
    return np.insert(a, np.searchsorted(a, extra), extra) if extra.size else a
