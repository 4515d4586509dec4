"""Rule measures, their intervals and the 2x2 tests, against published examples and scipy."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2_contingency, fisher_exact

from streamcount.rules.measures import (
    Interval,
    Measure,
    chi_square,
    chi_square_p_greater,
    fisher_greater,
    fisher_greater_many,
    rule_measures,
    tighten,
)


def exact(n: int, a: int, r: int, q: int):
    return rule_measures(n, ([a], [a]), ([r], [r]), ([q], [q]))


def test_games_videos_han_kamber_pei():
    # Han, Kamber & Pei, Data Mining 3rd ed. (2012), Sec. 6.3 (games/videos, Tables 6.6-6.7,
    # from memory): N 10000, games 6000, videos 7500, both 4000; s 40 %, c 66.7 %, lift 0.89,
    # chi2 555.6. Yates 554.45, leverage -0.05, conviction 0.75 are computed (not published).
    m = exact(10_000, 4000, 6000, 7500)
    assert m.support.value[0] == pytest.approx(0.40)
    assert m.confidence.value[0] == pytest.approx(0.6667, abs=5e-5)
    assert m.lift.value[0] == pytest.approx(0.8889, abs=5e-5)
    assert round(float(m.lift.value[0]), 2) == 0.89
    assert m.leverage.value[0] == pytest.approx(-0.05)
    assert m.conviction.value[0] == pytest.approx(0.75)
    assert float(chi_square(10_000, 4000, 6000, 7500)) == pytest.approx(555.6, abs=0.05)
    assert float(chi_square(10_000, 4000, 6000, 7500, yates=True)) == pytest.approx(
        554.45, abs=0.005
    )
    # exact counts: every interval collapses to the point value
    for name in ("support", "confidence", "lift", "leverage", "conviction"):
        ma = m.measure(name)
        assert ma.low[0] == pytest.approx(ma.value[0]) == pytest.approx(ma.high[0])


def test_tea_coffee_tan_steinbach_kumar():
    # Tan, Steinbach & Kumar, Introduction to Data Mining (2005), ch. 6 tea/coffee table
    # (from memory, numbers read in course notes): N 1000, tea 200, coffee 800, both 150.
    # lift 0.9375 published; leverage -0.01, conviction 0.80, chi2 3.906, Yates 3.525 computed.
    m = exact(1000, 150, 200, 800)
    assert m.confidence.value[0] == pytest.approx(0.75)
    assert m.lift.value[0] == pytest.approx(0.9375)
    assert m.leverage.value[0] == pytest.approx(-0.01)
    assert m.conviction.value[0] == pytest.approx(0.80)
    assert float(chi_square(1000, 150, 200, 800)) == pytest.approx(3.906, abs=5e-4)
    assert float(chi_square(1000, 150, 200, 800, yates=True)) == pytest.approx(3.525, abs=5e-4)
    # negative association: the one-sided test for positive association does not reject
    assert fisher_greater(1000, 150, 200, 800) > 0.9
    assert chi_square_p_greater(1000, 150, 200, 800) == 1.0


def test_tighten_uses_a_below_r_and_q():
    la, ua, lr, ur, lq, uq = tighten(100, ([30], [60]), ([10], [50]), ([20], [200]))
    assert la.tolist() == [30]
    assert lr.tolist() == [30]  # max(f_X, f_XY)
    assert ur.tolist() == [50]
    assert uq.tolist() == [100]  # never above N
    assert ua.tolist() == [50]  # min(U_XY, U_X, U_Y)
    assert lq.tolist() == [30]


def test_conviction_infinite_when_confidence_one():
    m = exact(10, 4, 4, 6)
    assert math.isinf(m.conviction.value[0])
    d = m.conviction.at(0).as_dict()
    assert d["value"] is None and d["high"] is None
    assert Measure.from_dict(d).value == math.inf


def test_zero_denominators_do_not_warn():
    # pytest turns warnings into errors: a division by zero would fail here
    m = rule_measures(10, ([0], [2]), ([0], [2]), ([0], [2]))
    assert m.confidence.high[0] == 1.0
    assert m.lift.high[0] == math.inf
    assert m.lift.value[0] == 0.0
    empty = rule_measures(0, ([0], [0]), ([0], [0]), ([0], [0]))
    assert empty.support.value[0] == 0.0


def test_interval_contains():
    iv = Interval(1.0, 2.0)
    assert 1.5 in iv and 1.0 in iv and 2.0 in iv
    assert 2.1 not in iv
    assert 5.0 in Interval(1.0, math.inf)


@st.composite
def tables(draw, max_n: int = 400):
    n = draw(st.integers(2, max_n))
    r = draw(st.integers(1, n - 1))
    q = draw(st.integers(1, n - 1))
    a = draw(st.integers(max(0, r + q - n), min(r, q)))
    return n, a, r, q


@settings(max_examples=200, deadline=None)
@given(tables())
def test_fisher_matches_scipy(t):
    n, a, r, q = t
    ref = fisher_exact([[a, r - a], [q - a, n - r - q + a]], alternative="greater").pvalue
    got = fisher_greater(n, a, r, q)
    assert got == pytest.approx(ref, rel=1e-9, abs=1e-300)


def test_fisher_large_and_tiny():
    # far tail of a big table: no underflow to 0 when scipy still has a positive value
    n, a, r, q = 200_000, 900, 5_000, 6_000
    ref = fisher_exact([[a, r - a], [q - a, n - r - q + a]], alternative="greater").pvalue
    assert fisher_greater(n, a, r, q) == pytest.approx(ref, rel=1e-7)
    assert fisher_greater_many([n, n], [a, 150], [r, r], [q, q]).shape == (2,)
    assert fisher_greater(10, 0, 3, 3) == 1.0
    assert fisher_greater(10, 4, 3, 3) == 0.0
    with pytest.raises(ValueError, match="margins"):
        fisher_greater(10, 1, 11, 3)


@settings(max_examples=200, deadline=None)
@given(tables())
def test_chi_square_matches_scipy(t):
    n, a, r, q = t
    table = np.array([[a, r - a], [q - a, n - r - q + a]])
    for yates in (False, True):
        ref = chi2_contingency(table, correction=yates).statistic
        got = float(chi_square(n, a, r, q, yates=yates))
        assert got == pytest.approx(ref, rel=1e-9, abs=1e-9)


def exact_values(n, a, r, q):
    conf = a / r
    return {
        "support": a / n,
        "confidence": conf,
        "lift": n * a / (r * q),
        # exact rational arithmetic: the float form a/n - (r/n)(q/n) cancels badly near 1
        "leverage": float(Fraction(a, n) - Fraction(r * q, n * n)),
        "conviction": math.inf if a == r else (1 - q / n) / (1 - conf),
    }


@st.composite
def slack_cases(draw):
    n, a, r, q = draw(tables(max_n=2000))
    # antecedent count must be positive for the exact confidence to exist; tables() gives r>=1
    e = draw(st.integers(0, 50))

    def bounds(true: int) -> tuple[int, int]:
        lo = draw(st.integers(max(0, true - e), true))
        hi = draw(st.integers(true, true + e))
        return lo, hi

    return n, (a, r, q), bounds(a), bounds(r), bounds(q)


@settings(max_examples=300, deadline=None)
@given(slack_cases())
def test_intervals_contain_exact_measures(case):
    # property (ALGORITHMS §4 intervals, derived and simulation-checked there): whenever the
    # true counts lie inside their bounds, every interval holds the exact measure, and the
    # point value (from the lower bounds) lies inside the interval too
    n, (a, r, q), ab, rb, qb = case
    m = rule_measures(n, ([ab[0]], [ab[1]]), ([rb[0]], [rb[1]]), ([qb[0]], [qb[1]]))
    for name, value in exact_values(n, a, r, q).items():
        meas = m.measure(name).at(0)
        assert meas.interval.contains(value), (name, value, meas)
        assert meas.interval.contains(meas.value), (name, meas)
    # the least favourable corner for the tests minimises N*a - r*q
    assert n * int(m.a_low[0]) - int(m.r_high[0]) * int(m.q_high[0]) <= n * a - r * q


def test_vectorised_over_many_rules():
    rng = np.random.default_rng(7)
    n = 5000
    r = rng.integers(1, n, 1000)
    q = rng.integers(1, n, 1000)
    a = np.minimum(r, q) // 2
    m = rule_measures(n, (a, a), (r, r), (q, q))
    assert len(m) == 1000
    np.testing.assert_allclose(m.lift.value, n * a / (r * q))
    sub = m.take(np.array([3, 5]))
    assert len(sub) == 2
    assert sub.lift.value[1] == m.lift.value[5]
