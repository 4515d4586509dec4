"""Rule measures with intervals from count bounds, and 2x2 significance tests.

For a rule ``X => Y`` over ``N`` transactions (``N`` exact) with ``a = c(X ∪ Y)``,
``r = c(X)`` and ``q = c(Y)``, the window only knows bounds ``L <= count <= U`` (Lossy
Counting, Manku & Motwani 2002; see :mod:`streamcount.snapshot`). The bounds are first
tightened with ``a <= min(r, q)`` and ``count <= N``::

    La = L_XY          Ua = min(U_XY, U_X, U_Y, N)
    Lr = max(L_X, La)  Ur = min(U_X, N)          (the same for q)

and every measure becomes an interval that contains the exact value wherever the true counts
lie inside their bounds:

==========  ===============================  =========================================
measure     exact                            interval
==========  ===============================  =========================================
support     a/N                              [La/N, Ua/N]
confidence  a/r                              [La/Ur, min(1, Ua/Lr)]
lift        N·a/(r·q)                        [N·La/(Ur·Uq), N·Ua/(Lr·Lq)]
leverage    a/N − (r/N)(q/N)                 [La/N − Ur·Uq/N², Ua/N − Lr·Lq/N²]
conviction  (1 − q/N)/(1 − a/r), ∞ if a = r  [(1 − Uq/N)/(1 − conf_lo), (1 − Lq/N)/(1 − conf_hi)]
==========  ===============================  =========================================

The point value of each measure is computed from the lower bounds ``(La, Lr, Lq)``; with exact
counts (no slack) it is the exact value. The point value always lies inside the interval.
Degenerate denominators take their limits: a confidence with ``r = 0`` is 0 (point, low) and 1
(high); a lift whose denominator is 0 is 0 (point, low) or ``inf`` (high); conviction is ``inf``
when its confidence is 1.

Significance (standard 2x2 statistics), cells ``n11 = a``, ``n12 = r − a``, ``n21 = q − a``,
``n22 = N − r − q + a``, so ``n11·n22 − n12·n21 = N·a − r·q``:

- Pearson ``χ² = N(N·a − r·q)² / (r(N−r)q(N−q))`` (0 when a margin is 0 or N), with Yates'
  correction ``|N·a − r·q| -> max(0, |N·a − r·q| − N/2)``;
- Fisher's exact test, one-sided for positive association,
  ``p = Σ_{k>=a} C(r,k)·C(N−r,q−k)/C(N,q)``, computed from ``math.lgamma`` and the ratio of
  successive hypergeometric terms, summed in a scaled form so tiny p-values do not underflow.

With approximate counts, tests are run at the least favourable corner ``a = La``, ``r = Ur``,
``q = Uq``, which minimises ``N·a − r·q`` (the evidence for positive association).

Cost: :func:`rule_measures` and :func:`chi_square` are O(n) numpy over n rules; the p-value
functions are scalar and loop in Python, so callers apply them only to the rules that passed
every other filter.

References
----------
Agrawal, Imieliński & Swami, SIGMOD 1993 (support, confidence). Brin, Motwani & Silverstein,
SIGMOD 1997 (lift/interest, χ²). Brin, Motwani, Ullman & Tsur, SIGMOD 1997 (conviction).
Piatetsky-Shapiro 1991 (leverage). Fisher's exact test and Yates' correction: any statistics
text.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = [
    "MEASURE_NAMES",
    "CountBounds",
    "Interval",
    "Measure",
    "MeasureArray",
    "RuleMeasures",
    "chi_square",
    "chi_square_p_greater",
    "fisher_greater",
    "fisher_greater_many",
    "rule_measures",
    "tighten",
]

#: the measures every rule carries, in output order
MEASURE_NAMES: tuple[str, ...] = ("support", "confidence", "lift", "leverage", "conviction")


def _json_number(x: float) -> float | None:
    """``x`` as a JSON number; ``None`` (JSON null) for a non-finite value (``inf``)."""
    return float(x) if math.isfinite(x) else None


@dataclass(frozen=True, slots=True)
class Interval:
    """A closed interval ``[low, high]`` (``high`` may be ``inf``)."""

    low: float
    high: float

    def __contains__(self, x: float) -> bool:
        return self.contains(x)

    def contains(self, x: float, *, rel_tol: float = 1e-12) -> bool:
        """Whether ``x`` lies in the interval, up to a relative rounding tolerance."""
        if x == self.low or x == self.high:
            return True
        lo = self.low - rel_tol * abs(self.low) if math.isfinite(self.low) else self.low
        hi = self.high + rel_tol * abs(self.high) if math.isfinite(self.high) else self.high
        return lo <= x <= hi

    @property
    def width(self) -> float:
        return self.high - self.low


@dataclass(frozen=True, slots=True)
class CountBounds:
    """Lower and upper bound of one count (``low <= true <= high``)."""

    low: int
    high: int

    def as_dict(self) -> dict[str, int]:
        return {"low": self.low, "high": self.high}


@dataclass(frozen=True, slots=True)
class Measure:
    """One measure of one rule: the point value and the interval that holds the exact value.

    ``as_dict`` gives ``{"value", "low", "high"}``; an infinite number (conviction of a rule
    with confidence 1) becomes ``None`` (JSON ``null``), because JSON has no infinity.
    """

    value: float
    low: float
    high: float

    @property
    def interval(self) -> Interval:
        return Interval(self.low, self.high)

    def as_dict(self) -> dict[str, float | None]:
        return {
            "value": _json_number(self.value),
            "low": _json_number(self.low),
            "high": _json_number(self.high),
        }

    @classmethod
    def from_dict(cls, d: dict[str, float | None]) -> Measure:
        """Inverse of :meth:`as_dict` (``None`` reads back as ``inf``)."""

        def num(x: float | None) -> float:
            return math.inf if x is None else float(x)

        return cls(num(d["value"]), num(d["low"]), num(d["high"]))


@dataclass(frozen=True, slots=True)
class MeasureArray:
    """Point values and interval ends of one measure over ``n`` rules (float64 arrays)."""

    value: NDArray[np.float64]
    low: NDArray[np.float64]
    high: NDArray[np.float64]

    def __len__(self) -> int:
        return int(self.value.shape[0])

    def at(self, i: int) -> Measure:
        return Measure(float(self.value[i]), float(self.low[i]), float(self.high[i]))

    def take(self, idx: np.ndarray) -> MeasureArray:
        return MeasureArray(self.value[idx], self.low[idx], self.high[idx])


@dataclass(frozen=True, slots=True)
class RuleMeasures:
    """Measures of ``n`` rules, with the tightened count bounds they came from.

    Attributes
    ----------
    transactions:
        ``N``.
    a_low, a_high, r_low, r_high, q_low, q_high:
        Tightened int64 bounds of the joint, antecedent and consequent counts.
    support, confidence, lift, leverage, conviction:
        One :class:`MeasureArray` each.
    """

    transactions: int
    a_low: NDArray[np.int64]
    a_high: NDArray[np.int64]
    r_low: NDArray[np.int64]
    r_high: NDArray[np.int64]
    q_low: NDArray[np.int64]
    q_high: NDArray[np.int64]
    support: MeasureArray
    confidence: MeasureArray
    lift: MeasureArray
    leverage: MeasureArray
    conviction: MeasureArray

    def __len__(self) -> int:
        return int(self.a_low.shape[0])

    def measure(self, name: str) -> MeasureArray:
        if name not in MEASURE_NAMES:
            raise ValueError(f"measure {name!r} is unknown; choose one of {MEASURE_NAMES}")
        found: MeasureArray = getattr(self, name)
        return found

    def take(self, idx: np.ndarray) -> RuleMeasures:
        """The measures of the rules at ``idx`` (an index or boolean array)."""
        return RuleMeasures(
            self.transactions,
            self.a_low[idx],
            self.a_high[idx],
            self.r_low[idx],
            self.r_high[idx],
            self.q_low[idx],
            self.q_high[idx],
            *(self.measure(name).take(idx) for name in MEASURE_NAMES),
        )


def tighten(
    transactions: int,
    a: tuple[ArrayLike, ArrayLike],
    r: tuple[ArrayLike, ArrayLike],
    q: tuple[ArrayLike, ArrayLike],
) -> tuple[NDArray[np.int64], ...]:
    """Tightened ``(La, Ua, Lr, Ur, Lq, Uq)`` from raw ``(low, high)`` pairs of a, r, q.

    >>> [x.tolist() for x in tighten(10, ([3], [9]), ([2], [5]), ([4], [12]))]
    [[3], [5], [3], [5], [4], [10]]
    """
    n = np.int64(transactions)
    la = np.asarray(a[0], dtype=np.int64)
    lr = np.maximum(np.asarray(r[0], dtype=np.int64), la)
    lq = np.maximum(np.asarray(q[0], dtype=np.int64), la)
    ur = np.minimum(np.asarray(r[1], dtype=np.int64), n)
    uq = np.minimum(np.asarray(q[1], dtype=np.int64), n)
    ua = np.minimum(np.minimum(np.asarray(a[1], dtype=np.int64), ur), uq)
    return la, ua, lr, ur, lq, uq


def _div(num: ArrayLike, den: ArrayLike, zero: float) -> NDArray[np.float64]:
    """``num / den`` elementwise, ``zero`` where ``den == 0``."""
    fnum = np.asarray(num, dtype=np.float64)
    fden = np.asarray(den, dtype=np.float64)
    out = np.full(np.broadcast(fnum, fden).shape, zero, dtype=np.float64)
    np.divide(fnum, fden, out=out, where=fden != 0)
    return out


def _conviction(one_minus_q: NDArray[np.float64], conf: NDArray[np.float64]) -> NDArray[np.float64]:
    """``(1 - q/N) / (1 - conf)``, ``inf`` where ``conf >= 1``."""
    gap = 1.0 - conf
    out = np.full(conf.shape, np.inf, dtype=np.float64)
    np.divide(one_minus_q, gap, out=out, where=gap > 0)
    return out


def rule_measures(
    transactions: int,
    a: tuple[np.ndarray, np.ndarray],
    r: tuple[np.ndarray, np.ndarray],
    q: tuple[np.ndarray, np.ndarray],
) -> RuleMeasures:
    """Every measure with its interval for ``n`` rules at once.

    Parameters
    ----------
    transactions:
        ``N``, the window's (exact) transaction count.
    a, r, q:
        ``(low, high)`` arrays of the joint, antecedent and consequent counts, as read from a
        snapshot (an untracked itemset is ``(0, max_error)``).

    Examples
    --------
    Tea => coffee over 1000 transactions (tea 200, coffee 800, both 150; Tan, Steinbach &
    Kumar 2005, ch. 6), exact counts:

    >>> m = rule_measures(1000, ([150], [150]), ([200], [200]), ([800], [800]))
    >>> round(float(m.lift.value[0]), 4), round(float(m.leverage.value[0]), 4)
    (0.9375, -0.01)

    With slack the interval widens around the point value:

    >>> m = rule_measures(1000, ([140], [160]), ([195], [205]), ([790], [810]))
    >>> bool(m.lift.low[0] <= 0.9375 <= m.lift.high[0])
    True
    """
    la, ua, lr, ur, lq, uq = tighten(transactions, a, r, q)
    n = float(transactions)
    nn = n * n if transactions else 1.0
    fla, fua, flr, fur, flq, fuq = (x.astype(np.float64) for x in (la, ua, lr, ur, lq, uq))

    support = MeasureArray(_div(fla, n, 0.0), _div(fla, n, 0.0), _div(fua, n, 0.0))

    conf_val = _div(fla, flr, 0.0)
    conf_lo = _div(fla, fur, 0.0)
    conf_hi = np.minimum(1.0, _div(fua, flr, 1.0))
    confidence = MeasureArray(conf_val, conf_lo, conf_hi)

    lift = MeasureArray(
        _div(n * fla, flr * flq, 0.0),
        _div(n * fla, fur * fuq, 0.0),
        _div(n * fua, flr * flq, np.inf),
    )

    # (N a - r q) / N^2: the products of counts are exact integers in float64 (below 2^53
    # for windows up to ~9e7 transactions), so only the division rounds; a/N - (r/N)(q/N)
    # would cancel catastrophically when the supports are close to 1
    leverage = MeasureArray(
        (n * fla - flr * flq) / nn if transactions else np.zeros_like(fla),
        (n * fla - fur * fuq) / nn if transactions else np.zeros_like(fla),
        (n * fua - flr * flq) / nn if transactions else np.zeros_like(fla),
    )

    one_minus_lq = 1.0 - _div(flq, n, 0.0)
    one_minus_uq = 1.0 - _div(fuq, n, 0.0)
    conviction = MeasureArray(
        _conviction(one_minus_lq, conf_val),
        _conviction(one_minus_uq, conf_lo),
        _conviction(one_minus_lq, conf_hi),
    )
    return RuleMeasures(
        int(transactions), la, ua, lr, ur, lq, uq, support, confidence, lift, leverage, conviction
    )


def chi_square(
    transactions: int | np.ndarray,
    a: np.ndarray | int,
    r: np.ndarray | int,
    q: np.ndarray | int,
    *,
    yates: bool = False,
) -> np.ndarray:
    """Pearson's χ² (1 d.f.) of the 2x2 tables given by ``(N, a, r, q)``, vectorised.

    0 where a margin is 0 or ``N`` (no association can be measured).

    >>> chi_square(1000, 150, 200, 800).round(3).tolist()  # tea/coffee, Tan et al. 2005
    3.906
    >>> chi_square(1000, 150, 200, 800, yates=True).round(3).tolist()
    3.525
    """
    n = np.asarray(transactions, dtype=np.float64)
    fa = np.asarray(a, dtype=np.float64)
    fr = np.asarray(r, dtype=np.float64)
    fq = np.asarray(q, dtype=np.float64)
    diff = np.abs(n * fa - fr * fq)
    if yates:
        diff = np.maximum(0.0, diff - n / 2.0)
    den = fr * (n - fr) * fq * (n - fq)
    return _div(n * diff * diff, den, 0.0)


def chi_square_p_greater(transactions: int, a: int, r: int, q: int) -> float:
    """p-value of a positive association by Yates-corrected χ² (1 d.f.).

    The two-sided tail ``erfc(sqrt(χ²/2))`` is reported (conservative for the one-sided
    question); a table without positive association (``N·a <= r·q``) gets 1.
    """
    if transactions * a <= r * q:
        return 1.0
    stat = float(chi_square(transactions, a, r, q, yates=True))
    return math.erfc(math.sqrt(stat / 2.0))


def _log_comb(n: int, k: int) -> float:
    return math.lgamma(n + 1) - math.lgamma(k + 1) - math.lgamma(n - k + 1)


_TAIL_EPS = 1e-17


def fisher_greater(transactions: int, a: int, r: int, q: int) -> float:
    """One-sided Fisher exact p-value for positive association, ``P(K >= a)``.

    ``K`` is hypergeometric: ``q`` draws from ``N`` transactions of which ``r`` contain X.
    Equal to ``scipy.stats.fisher_exact([[a, r-a], [q-a, N-r-q+a]], alternative="greater")``.
    ``a`` below the support of ``K`` gives 1, above it 0.

    Cost: O(number of terms until they fall below 1e-17 of the sum); the terms decrease
    geometrically away from the mode, so a few dozen for small p-values.

    >>> round(fisher_greater(9, 2, 3, 2), 4)  # P(K >= 2), K ~ Hypergeom(N=9, r=3, q=2)
    0.0833
    """
    n, a, r, q = int(transactions), int(a), int(r), int(q)
    if not (0 <= r <= n and 0 <= q <= n):
        raise ValueError(f"fisher_greater: margins r={r}, q={q} must lie in [0, N={n}]")
    lo = max(0, r + q - n)
    hi = min(r, q)
    if a <= lo:
        return 1.0
    if a > hi:
        return 0.0
    mode = ((r + 1) * (q + 1)) // (n + 2)
    rest = n - r - q

    def log_pmf(k: int) -> float:
        return _log_comb(r, k) + _log_comb(n - r, q - k) - _log_comb(n, q)

    if a > mode:
        # upper tail from a, terms decreasing: pmf(k+1)/pmf(k) = (r-k)(q-k)/((k+1)(rest+k+1))
        total, term, k = 1.0, 1.0, a
        while k < hi:
            term *= (r - k) * (q - k) / ((k + 1) * (rest + k + 1))
            total += term
            k += 1
            if term < _TAIL_EPS * total:
                break
        return min(1.0, math.exp(log_pmf(a) + math.log(total)))
    # a at or below the mode: 1 - lower tail below a, terms decreasing downwards:
    # pmf(k-1)/pmf(k) = k(rest+k)/((r-k+1)(q-k+1))
    total, term, k = 1.0, 1.0, a - 1
    while k > lo:
        term *= k * (rest + k) / ((r - k + 1) * (q - k + 1))
        total += term
        k -= 1
        if term < _TAIL_EPS * total:
            break
    return min(1.0, max(0.0, 1.0 - math.exp(log_pmf(a - 1) + math.log(total))))


def fisher_greater_many(
    transactions: int | Sequence[int] | np.ndarray,
    a: Sequence[int] | np.ndarray,
    r: Sequence[int] | np.ndarray,
    q: Sequence[int] | np.ndarray,
) -> np.ndarray:
    """:func:`fisher_greater` over arrays (a Python loop: use it on few, filtered rules)."""
    a_arr = np.asarray(a, dtype=np.int64)
    n_arr = np.broadcast_to(np.asarray(transactions, dtype=np.int64), a_arr.shape)
    r_arr = np.asarray(r, dtype=np.int64)
    q_arr = np.asarray(q, dtype=np.int64)
    out = np.empty(a_arr.shape, dtype=np.float64)
    for i, (ni, ai, ri, qi) in enumerate(
        zip(n_arr.tolist(), a_arr.tolist(), r_arr.tolist(), q_arr.tolist(), strict=True)
    ):
        out[i] = fisher_greater(ni, ai, ri, qi)
    return out
