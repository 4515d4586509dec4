"""Exact recounts that let a reader judge an alert on a real file (``bench_alerts.py`` retail).

An alert says an itemset's co-purchase rate changed at an estimated change point. The recount
compares, exactly, the itemset's rate in the orders before that change point with its rate from
the change point to the alert:

* **before**: from the later of (the previous alert on the same itemset's change point, which is
  where the change test restarted its reference: "the new normal") and ``window`` orders before
  the change, up to the change;
* **since**: from the change point to the alert.

It also gives the exact **lift** of the itemset since the change (its rate over the product of
its items' own rates over the same orders): a lift near 1 means the joint rate moved because
one item's own popularity moved, not because the items are bought *together* more.
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["Recount"]


class Recount:
    """Exact itemset counts over ranges of one file's transactions (an inverted index).

    Parameters
    ----------
    baskets:
        The transactions in order; transaction ``i`` (0-based) has sequence number ``i + 1``.
    """

    def __init__(self, baskets: list[list[str]]) -> None:
        where: dict[str, list[int]] = {}
        for t, basket in enumerate(baskets, 1):
            for item in basket:
                where.setdefault(item, []).append(t)
        self.where = {k: np.array(v, dtype=np.int64) for k, v in where.items()}
        #: sequence number of each item's first sale
        self.first = {k: int(v[0]) for k, v in self.where.items()}
        #: per itemset, the change point of its last alert checked (the test's restart)
        self.restart: dict[tuple[str, ...], int] = {}

    def count(self, items: list[str], first: int, last: int) -> int:
        """Transactions ``first..last`` (sequence numbers, inclusive) holding every item."""
        common = self.where[items[0]]
        for item in items[1:]:
            common = np.intersect1d(common, self.where[item], assume_unique=True)
        return int(np.searchsorted(common, last, "right") - np.searchsorted(common, first))

    def lift(self, items: list[str], first: int, last: int) -> float | None:
        """Exact lift of ``items`` over transactions ``first..last`` (None: an item unsold)."""
        n = last - first + 1
        if n <= 0:
            return None
        joint = self.count(items, first, last) / n
        product = 1.0
        for item in items:
            product *= self.count([item], first, last) / n
        return joint / product if product > 0 else None

    def check(self, alert: dict[str, Any], window: int, pane: int) -> dict[str, Any]:
        """The exact figures of one alert record (call in alert order: it remembers restarts)."""
        from scipy.stats import binom

        ev = alert["evidence"]
        change = ev["change_seq"]
        if change is None:
            change = int(ev["change_pane"]) * pane + 1
        items = sorted(alert["items"])
        seq = int(alert["seq"])
        lo = max(self.restart.get(tuple(items), 1), change - window, 1)
        self.restart[tuple(items)] = change
        n_ref, n_rec = change - lo, seq - change + 1
        c_ref = self.count(items, lo, change - 1) if n_ref > 0 else 0
        c_rec = self.count(items, change, seq)
        p_ref = c_ref / n_ref if n_ref > 0 else 0.0
        p_rec = c_rec / n_rec
        if ev["direction"] == "up":
            moved = p_rec >= 1.5 * p_ref
            p_value = float(binom.sf(c_rec - 1, n_rec, p_ref)) if p_ref > 0 else float(c_rec == 0)
        else:
            moved = p_rec <= p_ref / 1.5
            p_value = float(binom.cdf(c_rec, n_rec, p_ref)) if p_ref > 0 else 1.0
        newest = max(self.first[i] for i in items)
        return {
            "reference_first_seq": lo,
            "reference_transactions": n_ref,
            "reference_count": c_ref,
            "recent_first_seq": change,
            "recent_transactions": n_rec,
            "recent_count": c_rec,
            "moved_1_5x": bool(moved),
            "p_value": p_value,
            "lift_since": self.lift(items, change, seq),
            "lift_before": self.lift(items, lo, change - 1),
            "new_item": newest >= change - window,
            "newest_item_first_seq": newest,
        }
