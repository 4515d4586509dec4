"""Association rules derived from a window snapshot, each measure with an interval.

For every tracked itemset ``Z`` of size ``>= 2`` whose count clears the joint count threshold
and ``min_support``, every split ``Z = X ∪ Y`` with ``1 <= |Y| <= max_consequent_size`` is a
candidate rule ``X => Y`` (Agrawal, Imieliński & Swami 1993). Its counts come from the snapshot
as bounds (``a = c(Z)``, ``r = c(X)``, ``q = c(Y)``) and its measures as intervals
(:mod:`streamcount.measures`). A candidate is kept when, in order:

1. ``count(Z) >= min_count`` (``rules.min_count``, by default ``max(10, 10 x max_error)``:
   below ``10 x max_error`` the relative error of the support can exceed 10 %, and below 10
   transactions a rule rests on noise);
2. support ``>= min_support`` on its lower bound (the support's point value *is* its lower
   bound, so this holds whether or not ``conservative`` is set);
3. confidence ``>= min_confidence`` and lift ``>= min_lift``, judged on the intervals' low ends
   when ``conservative`` (the default), else on the point values;
4. when ``max_p_value`` is set, the one-sided test named by ``significance`` (``fisher`` or
   ``chi2``) at the least favourable corner of the bounds gives ``p <= max_p_value``. No
   multiple-testing correction is applied: with many rules per window, pick a small
   ``max_p_value`` (Webb 2007 discusses the problem for rules).

Rules are sorted by the low end of the lift interval, descending (ties: lift point value,
support, then names), and at most ``max_rules`` are returned.

Cost: the measure math is numpy over all candidates of a level at once (one
``bounds_many`` lookup per split pattern); only the p-values and the ``Rule`` objects of the
kept rules are built in a Python loop.

Rules and the alerts built on them are signals for a person to review, not decisions.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, overload

import numpy as np

from streamcount.config.settings import RulesConfig
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.rules.measures import (
    MEASURE_NAMES,
    CountBounds,
    Measure,
    RuleMeasures,
    chi_square_p_greater,
    fisher_greater,
    rule_measures,
)

__all__ = [
    "MIN_JOINT_COUNT",
    "SIGNIFICANCE_TESTS",
    "THRESHOLD_RTOL",
    "Rule",
    "at_least",
    "derive_rules",
    "joint_count_threshold",
    "measure_rules",
    "rule_p_value",
]

#: the one-sided tests ``rules.significance`` may name, as ``(N, a, r, q) -> p``; the config
#: rules take the names from here
_TESTS: dict[str, Callable[[int, int, int, int], float]] = {
    "fisher": fisher_greater,
    "chi2": chi_square_p_greater,
}
SIGNIFICANCE_TESTS: tuple[str, ...] = tuple(_TESTS)

#: thresholds are relaxed by this relative amount before comparing, so that float rounding in
#: products such as ``0.07 * 100 = 7.000000000000001`` does not reject an exact match
THRESHOLD_RTOL = 1e-9


@overload
def at_least(value: np.ndarray, threshold: float) -> np.ndarray: ...


@overload
def at_least(value: float, threshold: float) -> bool: ...


def at_least(value: np.ndarray | float, threshold: float) -> np.ndarray | bool:
    """``value >= threshold`` up to :data:`THRESHOLD_RTOL` (relative), elementwise for
    arrays."""
    return value >= threshold - THRESHOLD_RTOL * abs(threshold)


@dataclass(frozen=True, slots=True)
class Rule:
    """One association rule ``antecedent => consequent`` over a window.

    Attributes
    ----------
    antecedent, consequent:
        Item names, sorted.
    antecedent_ids, consequent_ids:
        The item ids of the snapshot's vocabulary, ascending.
    joint_count, antecedent_count, consequent_count:
        Tightened bounds of ``a = c(X ∪ Y)``, ``r = c(X)``, ``q = c(Y)``.
    transactions:
        ``N``, transactions in the window.
    support, confidence, lift, leverage, conviction:
        Point value and interval of each measure.
    p_value:
        One-sided p-value of the significance test at the least favourable corner, or
        ``None`` when the test is off.
    """

    antecedent: tuple[str, ...]
    consequent: tuple[str, ...]
    antecedent_ids: tuple[int, ...]
    consequent_ids: tuple[int, ...]
    joint_count: CountBounds
    antecedent_count: CountBounds
    consequent_count: CountBounds
    transactions: int
    support: Measure
    confidence: Measure
    lift: Measure
    leverage: Measure
    conviction: Measure
    p_value: float | None = None

    @property
    def key(self) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """``(antecedent, consequent)``: identifies the rule across windows."""
        return self.antecedent, self.consequent

    @property
    def items(self) -> tuple[str, ...]:
        """All items of the rule, sorted."""
        return tuple(sorted(self.antecedent + self.consequent))

    def measure(self, name: str) -> Measure:
        if name not in MEASURE_NAMES:
            raise ValueError(f"measure {name!r} is unknown; choose one of {MEASURE_NAMES}")
        found: Measure = getattr(self, name)
        return found

    def measures_dict(self) -> dict[str, dict[str, float | None]]:
        """``{name: {"value", "low", "high"}}``; infinite numbers are ``None``."""
        return {name: self.measure(name).as_dict() for name in MEASURE_NAMES}

    def as_dict(self) -> dict[str, object]:
        """JSON-ready form (used by the HTTP API and checkpoints)."""
        return {
            "antecedent": list(self.antecedent),
            "consequent": list(self.consequent),
            "antecedent_ids": list(self.antecedent_ids),
            "consequent_ids": list(self.consequent_ids),
            "counts": {
                "joint": self.joint_count.as_dict(),
                "antecedent": self.antecedent_count.as_dict(),
                "consequent": self.consequent_count.as_dict(),
            },
            "transactions": self.transactions,
            "measures": self.measures_dict(),
            "p_value": self.p_value,
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Rule:
        """Inverse of :meth:`as_dict` (``d`` as decoded from JSON)."""
        counts: Mapping[str, Mapping[str, int]] = d["counts"]
        measures: Mapping[str, dict[str, float | None]] = d["measures"]

        def cb(name: str) -> CountBounds:
            return CountBounds(int(counts[name]["low"]), int(counts[name]["high"]))

        p = d.get("p_value")
        return cls(
            tuple(d["antecedent"]),
            tuple(d["consequent"]),
            tuple(int(i) for i in d["antecedent_ids"]),
            tuple(int(i) for i in d["consequent_ids"]),
            cb("joint"),
            cb("antecedent"),
            cb("consequent"),
            int(d["transactions"]),
            support=Measure.from_dict(measures["support"]),
            confidence=Measure.from_dict(measures["confidence"]),
            lift=Measure.from_dict(measures["lift"]),
            leverage=Measure.from_dict(measures["leverage"]),
            conviction=Measure.from_dict(measures["conviction"]),
            p_value=None if p is None else float(p),
        )


#: default floor of the joint count a rule needs, whatever the window's error (a rule resting
#: on a handful of baskets is noise even when counts are exact; common practice, a >= 10)
MIN_JOINT_COUNT = 10


def joint_count_threshold(snapshot: WindowSnapshot, config: RulesConfig) -> int:
    """The joint count a rule needs: ``config.min_count``, or by default
    ``max(10, 10 x max_error)`` so that no rule rests on noise or on the counting error."""
    if config.min_count is not None:
        return max(1, int(config.min_count))
    return max(MIN_JOINT_COUNT, 10 * int(snapshot.max_error))


def rule_p_value(config: RulesConfig, transactions: int, a: int, r: int, q: int) -> float:
    """p-value of the test named by ``config.significance`` (one of
    :data:`SIGNIFICANCE_TESTS`, checked with the other settings) for one table (a, r, q, N)."""
    return _TESTS[config.significance](transactions, a, r, q)


def _concat_measures(parts: list[RuleMeasures], transactions: int) -> RuleMeasures:
    def cat(get: str) -> np.ndarray:
        return np.concatenate([getattr(p, get) for p in parts])

    a = (cat("a_low"), cat("a_high"))
    r = (cat("r_low"), cat("r_high"))
    q = (cat("q_low"), cat("q_high"))
    # recomputing from the concatenated (already tightened) bounds is exact and cheap
    return rule_measures(transactions, a, r, q)


def _build_rules(
    snapshot: WindowSnapshot,
    antecedent_rows: Sequence[np.ndarray],
    consequent_rows: Sequence[np.ndarray],
    m: RuleMeasures,
    p_values: Sequence[float | None],
) -> list[Rule]:
    names = snapshot.item_names
    out = []
    for i in range(len(m)):
        x_ids = tuple(int(v) for v in antecedent_rows[i])
        y_ids = tuple(int(v) for v in consequent_rows[i])
        out.append(
            Rule(
                tuple(sorted(names[j] for j in x_ids)),
                tuple(sorted(names[j] for j in y_ids)),
                x_ids,
                y_ids,
                CountBounds(int(m.a_low[i]), int(m.a_high[i])),
                CountBounds(int(m.r_low[i]), int(m.r_high[i])),
                CountBounds(int(m.q_low[i]), int(m.q_high[i])),
                m.transactions,
                support=m.support.at(i),
                confidence=m.confidence.at(i),
                lift=m.lift.at(i),
                leverage=m.leverage.at(i),
                conviction=m.conviction.at(i),
                p_value=p_values[i],
            )
        )
    return out


def derive_rules(
    snapshot: WindowSnapshot, config: RulesConfig, *, min_count: int | None = None
) -> list[Rule]:
    """The rules of ``snapshot`` that pass every threshold of ``config``, best lift first.

    Parameters
    ----------
    snapshot:
        The window's counts.
    config:
        Thresholds (``min_support``, ``min_confidence``, ``min_lift``, ``min_count``,
        ``max_consequent_size``, ``significance``, ``max_p_value``, ``conservative``,
        ``max_rules``).
    min_count:
        Overrides the joint count threshold (default: :func:`joint_count_threshold`).

    Examples
    --------
    Tan, Steinbach & Kumar (2005), ch. 6, Table 6.1, exact counts; ``{Diapers, Milk} =>
    {Beer}`` has support 0.4 and confidence 2/3, ``{Beer, Milk} => {Diapers}`` confidence 1
    (five transactions are below the default joint count of 10, so ``min_count=1`` here):

    >>> from streamcount.engine.snapshot import LevelCounts
    >>> import numpy as np
    >>> names = ["Beer", "Diapers", "Milk"]
    >>> lv = lambda rows, c: LevelCounts(len(rows[0]), np.array(rows, dtype=np.int32),
    ...                                  np.array(c, dtype=np.int64), np.array(c, dtype=np.int64))
    >>> snap = WindowSnapshot(1, 5, 5, 0, 0.0, None, 1,
    ...     (lv([[0], [1], [2]], [3, 4, 4]), lv([[0, 1], [0, 2], [1, 2]], [3, 2, 3]),
    ...      lv([[0, 1, 2]], [2])), names)
    >>> cfg = RulesConfig(min_support=0.4, min_confidence=0.6, min_lift=1.0, max_p_value=None)
    >>> [(r.antecedent, r.consequent, round(r.confidence.value, 2))
    ...  for r in derive_rules(snap, cfg, min_count=1) if len(r.antecedent) == 2]
    [(('Beer', 'Milk'), ('Diapers',), 1.0), (('Diapers', 'Milk'), ('Beer',), 0.67)]
    """
    n = int(snapshot.transactions)
    if n <= 0:
        return []
    threshold = max(1, int(min_count)) if min_count is not None else None
    if threshold is None:
        threshold = joint_count_threshold(snapshot, config)

    ant_blocks: list[np.ndarray] = []
    con_blocks: list[np.ndarray] = []
    parts: list[RuleMeasures] = []
    block_ids: list[np.ndarray] = []
    for level in snapshot.levels[1:]:
        k = level.size
        if not len(level):
            continue
        keep = (level.count >= threshold) & at_least(level.count, config.min_support * n)
        if not keep.any():
            continue
        rows = level.items[keep]
        a = (level.count[keep], level.upper[keep])
        for c in range(1, min(config.max_consequent_size, k - 1) + 1):
            for cons_cols in itertools.combinations(range(k), c):
                ante_cols = [j for j in range(k) if j not in cons_cols]
                x = np.ascontiguousarray(rows[:, ante_cols])
                y = np.ascontiguousarray(rows[:, list(cons_cols)])
                m = rule_measures(n, a, snapshot.bounds_many(x), snapshot.bounds_many(y))
                ant_blocks.append(x)
                con_blocks.append(y)
                parts.append(m)
                block_ids.append(np.full(len(m), len(parts) - 1, dtype=np.int64))
    if not parts:
        return []
    m = _concat_measures(parts, n)
    block = np.concatenate(block_ids)
    row = np.concatenate([np.arange(len(p), dtype=np.int64) for p in parts])

    conf = m.confidence.low if config.conservative else m.confidence.value
    lift = m.lift.low if config.conservative else m.lift.value
    passed = at_least(conf, config.min_confidence) & at_least(lift, config.min_lift)
    idx = np.flatnonzero(passed)
    if idx.size == 0:
        return []
    # sort by lift low desc, then lift value desc, then support desc; stable keeps the
    # deterministic candidate order (level, split, row) for full ties
    order = np.lexsort((-m.support.value[idx], -m.lift.value[idx], -m.lift.low[idx]))
    idx = idx[order]

    chosen: list[int] = []
    p_values: list[float | None] = []
    for i in idx.tolist():
        if len(chosen) >= config.max_rules:
            break
        p: float | None = None
        if config.max_p_value is not None:
            p = rule_p_value(config, n, int(m.a_low[i]), int(m.r_high[i]), int(m.q_high[i]))
            if not p <= config.max_p_value * (1.0 + THRESHOLD_RTOL):
                continue
        chosen.append(i)
        p_values.append(p)
    if not chosen:
        return []
    sel = np.asarray(chosen, dtype=np.int64)
    x_rows = [ant_blocks[b][r] for b, r in zip(block[sel].tolist(), row[sel].tolist(), strict=True)]
    y_rows = [con_blocks[b][r] for b, r in zip(block[sel].tolist(), row[sel].tolist(), strict=True)]
    return _build_rules(snapshot, x_rows, y_rows, m.take(sel), p_values)


def measure_rules(
    snapshot: WindowSnapshot,
    keys: Iterable[tuple[Sequence[str], Sequence[str]]],
    *,
    config: RulesConfig | None = None,
) -> list[Rule]:
    """Measure given rules (by item names) on ``snapshot``, whatever their thresholds.

    Used to follow rules that are active but no longer pass the entry thresholds. A name the
    snapshot's vocabulary does not know, or an itemset larger than the snapshot's levels,
    counts as untracked (``(0, max_error)``). With ``config`` and a ``max_p_value``, the
    p-value is filled in too. Vectorised per (antecedent size, consequent size) group.
    """
    pairs = [(tuple(sorted(x)), tuple(sorted(y))) for x, y in keys]
    if not pairs:
        return []
    n = int(snapshot.transactions)
    index = {name: i for i, name in enumerate(snapshot.item_names)}
    max_k = snapshot.max_itemset_size
    e = int(snapshot.max_error)

    def ids_of(names: tuple[str, ...]) -> list[int] | None:
        out = []
        for name in names:
            if name not in index:
                return None
            out.append(index[name])
        return sorted(out)

    def bounds(rows: list[list[int] | None]) -> tuple[np.ndarray, np.ndarray]:
        low = np.zeros(len(rows), dtype=np.int64)
        high = np.full(len(rows), e, dtype=np.int64)
        by_size: dict[int, list[int]] = {}
        for i, ids in enumerate(rows):
            if ids is not None and len(ids) <= max_k:
                by_size.setdefault(len(ids), []).append(i)
        for _size, members in by_size.items():
            arr = np.array([rows[i] for i in members], dtype=np.int32)
            lo, hi = snapshot.bounds_many(arr)
            low[members] = lo
            high[members] = hi
        return low, high

    x_ids = [ids_of(x) for x, _ in pairs]
    y_ids = [ids_of(y) for _, y in pairs]
    z_ids = [
        None if xi is None or yi is None else sorted(xi + yi)
        for xi, yi in zip(x_ids, y_ids, strict=True)
    ]
    m = rule_measures(n, bounds(z_ids), bounds(x_ids), bounds(y_ids))
    out = []
    for i, (x, y) in enumerate(pairs):
        p: float | None = None
        if config is not None and config.max_p_value is not None and n > 0:
            p = rule_p_value(config, n, int(m.a_low[i]), int(m.r_high[i]), int(m.q_high[i]))
        out.append(
            Rule(
                x,
                y,
                tuple(x_ids[i] or ()),
                tuple(y_ids[i] or ()),
                CountBounds(int(m.a_low[i]), int(m.a_high[i])),
                CountBounds(int(m.r_low[i]), int(m.r_high[i])),
                CountBounds(int(m.q_low[i]), int(m.q_high[i])),
                n,
                support=m.support.at(i),
                confidence=m.confidence.at(i),
                lift=m.lift.at(i),
                leverage=m.leverage.at(i),
                conviction=m.conviction.at(i),
                p_value=p,
            )
        )
    return out
