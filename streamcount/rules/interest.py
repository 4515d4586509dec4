"""R-interest: drop rules across catalogue levels that say nothing beyond their ancestor rule.

With several catalogue levels counted, every specific rule ("trail shoe, size 42 => wool sock,
size M") is echoed by general ones ("trail shoes => wool socks"), and a specific rule whose
support is just its share of the general rule's tells a reader nothing new. Srikant & Agrawal
(VLDB 1995) prune such rules with their *R-interest* measure. **The definition implemented here
is the one restated from memory in the project's reference notes** (support at least R times
what the closest ancestor rule predicts); it was not checked against the paper's text:

* an *ancestor* of an itemset ``Z`` replaces items of ``Z`` by their ancestors; its *closest*
  ancestors replace exactly one item ``z`` by its nearest counted ancestor ``ẑ`` (its parent
  among the levels counted), and are kept only when valid generalised itemsets (``ẑ`` is not an
  ancestor of another item of ``Z``);
* the support of ``Z`` *expected* from the closest ancestor ``Ẑ`` is
  ``supp(Ẑ) * supp(z) / supp(ẑ)``: the ancestor's support shared out in proportion to ``z``'s
  share of ``ẑ``;
* ``Z`` is *R-interesting* when, for every closest ancestor, ``supp(Z) >= R * expected``; an
  itemset with no closest ancestor (every item at its top counted level, or unknown to the
  catalogue) is always kept. Every rule ``X => Y`` with ``X ∪ Y = Z`` shares the verdict (the
  measure is about support, which is the itemset's). The paper's confidence-based variant is
  not implemented.

Counts are intervals (Lossy Counting), so an itemset is dropped only when the evidence is
certain: when the *upper* bound of its count is below ``R`` times the *lower* bound of the
expected count, ``low(Ẑ) * low(z) / high(ẑ)``. An untracked ancestor (lower bound 0) never
drops anything.

Cost: per item position of the candidate itemsets, three vectorised bound look-ups.

References
----------
Srikant, R. & Agrawal, R. (1995). Mining Generalized Association Rules. VLDB, pp. 407-419.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from streamcount.engine.snapshot import WindowSnapshot

__all__ = ["interesting"]

#: an itemset exactly at R times its expected count is kept (float rounding never drops it)
_RTOL = 1e-9


def interesting(
    snapshot: WindowSnapshot,
    rows: NDArray[np.int32],
    upper: NDArray[np.int64],
    ratio: float,
) -> NDArray[np.bool_]:
    """Which itemsets (rows of ascending item ids, with the upper bounds of their counts)
    are R-interesting with ``R = ratio`` (see the module docstring).

    Without a taxonomy on the snapshot, or without counted ancestors, every row is kept.

    Examples
    --------
    Exact counts over 100 orders, with sock-m and sock-l (ids 0, 1) under the product sock
    (id 2), and mug (id 3). The pair (sock-m, mug) is bought 6 times; its closest ancestor
    (sock, mug) 20 times, and sock-m is 30 of sock's 60, so 10 are expected: 6 < 1.1 x 10,
    dropped. (sock-l, mug) 14 times, with sock-l 30 of 60: 14 >= 11, kept.

    >>> import numpy as np
    >>> from streamcount.engine.snapshot import LevelCounts
    >>> from streamcount.engine.taxonomy import ItemTaxonomy
    >>> def lv(rows, c):
    ...     a = np.array(c, dtype=np.int64)
    ...     return LevelCounts(len(rows[0]), np.array(rows, dtype=np.int32), a, a)
    >>> tax = ItemTaxonomy("v", ("sku", "product"), np.array([0, 0, 1, 1], dtype=np.int8),
    ...                    np.array([2, 2, -1, -1], dtype=np.int32),
    ...                    np.array([[2], [2], [-1], [-1]], dtype=np.int32))
    >>> snap = WindowSnapshot(1, 100, 100, 0, 0.0, None, 1,
    ...     (lv([[0], [1], [2], [3]], [30, 30, 60, 40]), lv([[0, 3], [1, 3], [2, 3]], [6, 14, 20])),
    ...     ["sock-m", "sock-l", "sock", "mug"], taxonomy=tax)
    >>> rows = np.array([[0, 3], [1, 3], [2, 3]], dtype=np.int32)
    >>> interesting(snap, rows, np.array([6, 14, 20]), 1.1).tolist()
    [False, True, True]
    """
    rows = np.asarray(rows, dtype=np.int32)
    n, k = rows.shape
    keep = np.ones(n, dtype=bool)
    taxonomy = snapshot.taxonomy
    if taxonomy is None or n == 0 or not (taxonomy.parent >= 0).any():
        return keep
    upper = np.asarray(upper, dtype=np.float64)
    for j in range(k):
        z = rows[:, j]
        parent = taxonomy.parents(z)
        valid = parent >= 0
        for i in range(k):
            if i != j:
                valid &= (parent != rows[:, i]) & ~taxonomy.is_ancestor(parent, rows[:, i])
        idx = np.flatnonzero(valid & keep)
        if idx.size == 0:
            continue
        ancestor_rows = rows[idx].copy()
        ancestor_rows[:, j] = parent[idx]
        ancestor_rows.sort(axis=1)
        a_low, _ = snapshot.bounds_many(ancestor_rows)
        z_low, _ = snapshot.bounds_many(z[idx, None])
        _, p_high = snapshot.bounds_many(parent[idx, None])
        with np.errstate(divide="ignore", invalid="ignore"):
            expected_low = np.where(
                p_high > 0, a_low.astype(np.float64) * z_low / np.maximum(p_high, 1), 0.0
            )
        drop = upper[idx] < ratio * expected_low * (1.0 - _RTOL)
        keep[idx[drop]] = False
    return keep
