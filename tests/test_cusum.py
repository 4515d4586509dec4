"""CUSUM bank: formulas against scalar/scipy references, the pane step against a scalar model,
and the bookkeeping (rebase, merge, drop, remap, state round trip, invariants).

Outside references: ``math.log`` for the likelihood ratio, ``scipy.stats.gamma`` for the
Poisson (Garwood) bounds, ``scipy.optimize.brentq`` for the adjustment-coefficient root behind
``sensitivity``, and a one-candidate scalar model written from the module docstring.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import event, given
from hypothesis import strategies as st
from scipy.optimize import brentq
from scipy.stats import gamma, norm

from streamcount.alerts.cusum import CusumBank, CusumInputError, CusumStateError
from streamcount.alerts.cusum_stats import (
    binomial_llr,
    poisson_lower,
    poisson_upper,
    sensitivity,
    threshold,
)
from streamcount.engine.keys import pack, unpack
from streamcount.errors import CheckpointError

P_MIN, P_MAX = 1e-12, 1.0 - 1e-9

# -- the pure statistics ---------------------------------------------------------------------


def test_threshold_worked_value() -> None:
    # Union-bound split h = ln(M * P / B), worked example of the design notes (derived there,
    # not from a paper): M = 5,000 tests per pane, P = 10^6 / 1,000 panes per million, B = 1
    # -> h ~= 15.4. Recomputed here with math.log.
    h = threshold(1.0, 5000, 1000)
    assert h == pytest.approx(math.log(5000 * 1000 / 1.0), rel=1e-12)
    assert round(h, 1) == 15.4


def test_threshold_time_based_panes_floor_and_errors() -> None:
    n = np.array([500, 1000, 2000, 0])
    h = threshold(10.0, np.array([100, 0, 3000, 50]), n)
    assert h[0] == pytest.approx(math.log(1e6 * 100 / (10 * 500)))
    assert h[1] == pytest.approx(max(math.log(1e6 * 1 / (10 * 1000)), 1.0))  # M >= 1
    assert h[2] == pytest.approx(math.log(1e6 * 3000 / (10 * 2000)))
    assert h[3] == math.inf  # an empty pane cannot alarm
    assert threshold(1e9, 1, 1000) == 1.0  # level above 1: floor
    assert threshold(1e9, 1, 1000, floor=0.5) == 0.5
    with pytest.raises(CusumInputError, match="budget"):
        threshold(0.0, 10, 100)
    with pytest.raises(CusumInputError, match="pane_transactions"):
        threshold(1.0, 10, -5)


@given(
    n=st.integers(0, 5000),
    frac=st.floats(0, 1),
    p0=st.floats(1e-6, 0.999),
    p1=st.floats(1e-6, 0.999),
)
def test_llr_matches_math_log(n: int, frac: float, p0: float, p1: float) -> None:
    x = math.floor(frac * n)
    want = x * math.log(p1 / p0) + (n - x) * math.log((1 - p1) / (1 - p0))
    got = float(binomial_llr(np.array([x]), n, np.array([p0]), np.array([p1]))[0])
    assert got == pytest.approx(want, rel=1e-9, abs=1e-9)


@given(count=st.one_of(st.just(0.0), st.floats(1e-6, 1e5)), z=st.floats(0, 3))
def test_poisson_bounds_against_scipy_gamma(count: float, z: float) -> None:
    # Garwood bounds: upper = Gamma(count + 1) quantile Phi(z), lower = Gamma(count) quantile
    # Phi(-z) (0 for count 0). Tolerances are the ones stated in the docstrings.
    up = float(poisson_upper(count, z))
    assert up == pytest.approx(gamma.ppf(norm.cdf(z), count + 1), rel=0.02)
    lo = float(poisson_lower(count, z))
    exact = gamma.ppf(norm.sf(z), count) if count > 0 else 0.0
    assert exact - 0.05 - 1e-9 * exact <= lo <= exact + 0.01 + 1e-9 * exact
    assert 0 <= lo <= count <= up


def test_rule_of_three_from_zero() -> None:
    # 95 % one-sided upper bound from a count of 0 is -ln(0.05) = 3.0 (the rule of three).
    assert float(poisson_upper(0.0, 1.645)) == pytest.approx(-math.log(0.05), rel=0.02)
    assert float(poisson_lower(0.0, 1.645)) == 0.0


@pytest.mark.parametrize("r", [1.5, 2.0, 4.0, 1 / 1.5, 0.5, 0.25])
def test_sensitivity_is_the_slope_of_the_adjustment_root(r: float) -> None:
    # A ratio-r test run with p0 = p (1 -/+ delta) on binomial counts with rate p: false
    # alarms decay like exp(-theta h), theta the positive root of E[exp(theta llr)] = 1, i.e.
    # p e^{theta a} + (1 - p) e^{theta b} = 1 (per trial). Documented: theta ~= 1 - k(r) delta.
    p, delta = 1e-4, 1e-3
    q0 = p * (1 - delta) if r > 1 else p * (1 + delta)
    q1 = r * q0
    a, b = math.log(q1 / q0), math.log((1 - q1) / (1 - q0))

    def mgf(theta: float) -> float:
        return p * math.exp(theta * a) + (1 - p) * math.exp(theta * b) - 1.0

    theta = brentq(mgf, 0.5, 1.0 - 1e-9)
    slope = (1.0 - theta) / delta
    assert slope == pytest.approx(float(sensitivity(r)), rel=0.02)


# -- a one-candidate scalar model, straight from the module docstring ------------------------


def _wh_upper(c: float, z: float) -> float:
    a = c + 1.0
    return a * (1 - 1 / (9 * a) + z / (3 * math.sqrt(a))) ** 3


def _wh_lower(c: float, z: float) -> float:
    if c <= 0:
        return 0.0
    return c * max(1 - 1 / (9 * c) - z / (3 * math.sqrt(c)), 0.0) ** 3


class ScalarDirection:
    """One candidate, one direction. Backfill replays the frozen panes one by one."""

    def __init__(self, up: bool, bank: CusumBank, c: float, n: float) -> None:
        self.up, self.z, self.margin, self.lam = up, bank.z, bank.margin, bank.decay
        self.mult = [r if up else 1 / r for r in bank.ratios]
        self.k = [abs(m - 1) / (m * math.log(m) - m + 1) for m in self.mult]
        self.c, self.n, self.n2 = c, n, n
        k = len(self.mult)
        self.stat, self.start = [0.0] * k, [-1] * k
        self.exc = [[0.0, 0.0, 0.0] for _ in range(k)]
        self.pending: list[tuple[float, float]] = []

    def p0(self, h: float) -> list[float]:
        if self.n <= 0:
            return [1.0 if self.up else 0.0] * len(self.mult)
        n_eff = self.n**2 / self.n2
        c_eff = self.c / self.n * n_eff
        base = _wh_upper(c_eff, self.z) if self.up else _wh_lower(c_eff, self.z)
        sign = 1 if self.up else -1
        return [min(max((base + sign * self.margin * h / 2 * k) / n_eff, 0.0), 1.0) for k in self.k]

    def step(self, lo: float, hi: float, n: float, h: float, t: int) -> None:
        x, x_ref = (lo, hi) if self.up else (hi, lo)
        for i, (p0, m) in enumerate(zip(self.p0(h), self.mult, strict=True)):
            p1 = min(max(p0 * m, P_MIN), P_MAX)
            p0c = min(max(p0, P_MIN), P_MAX)
            if P_MIN < p0 < P_MAX and p1 != p0c:
                llr = x * math.log(p1 / p0c) + (n - x) * math.log((1 - p1) / (1 - p0c))
                new = max(0.0, self.stat[i] + llr)
            else:
                new = 0.0
            if new > 0:
                if self.stat[i] == 0:
                    self.start[i], self.exc[i] = t, [0.0, 0.0, 0.0]
                self.exc[i] = [self.exc[i][0] + lo, self.exc[i][1] + hi, self.exc[i][2] + n]
            else:
                self.start[i], self.exc[i] = -1, [0.0, 0.0, 0.0]
            self.stat[i] = new
        self.pending.append((x_ref, n))
        if all(s == 0 for s in self.stat):
            for xr, nn in self.pending:
                self.c = self.lam * self.c + xr
                self.n = self.lam * self.n + nn
                self.n2 = self.lam**2 * self.n2 + nn
            self.pending = []

    def clear(self) -> None:
        k = len(self.mult)
        self.stat, self.start = [0.0] * k, [-1] * k
        self.exc = [[0.0, 0.0, 0.0] for _ in range(k)]
        self.pending = []


def _rebase_pair(alarming: ScalarDirection, other: ScalarDirection) -> None:
    """Both directions restart from the panes since the alarming statistic left 0."""
    i = alarming.stat.index(max(alarming.stat))
    moved = alarming.stat[i] > 0
    lo, hi, n = alarming.exc[i]
    alarming.clear()
    if moved:
        other.clear()
        for d in (alarming, other):
            d.c = hi if d.up else lo
            d.n = d.n2 = n


_pane = st.tuples(
    st.integers(0, 2000),  # n
    st.lists(
        st.tuples(st.floats(0, 0.08), st.integers(0, 4), st.booleans()), min_size=3, max_size=3
    ),  # per candidate: rate, delta, tracked
    st.floats(1.0, 12.0),  # h
)


@given(
    panes=st.lists(_pane, min_size=1, max_size=25),
    init=st.lists(st.tuples(st.integers(0, 300), st.integers(0, 400)), min_size=3, max_size=3),
    z=st.sampled_from([0.0, 1.0]),
    margin=st.sampled_from([0.0, 1.0]),
    baseline=st.sampled_from([1.0, 5.0, 50.0]),
)
def test_pane_step_matches_scalar_model(panes, init, z, margin, baseline) -> None:
    bank = CusumBank(baseline_panes=baseline, z=z, margin=margin)
    keys = np.array([3, 17, 40], dtype=np.int64)
    cu = np.array([c for c, _ in init], dtype=float)
    tr = cu + np.array([extra for _, extra in init], dtype=float)
    cl = np.floor(cu / 2)
    bank.add(keys, cu, tr, cl)
    model = [
        (ScalarDirection(True, bank, cu[i], tr[i]), ScalarDirection(False, bank, cl[i], tr[i]))
        for i in range(3)
    ]
    absent = 6.0
    total = 0
    for t, (n, cands, h) in enumerate(panes):
        tracked = [i for i in range(3) if cands[i][2]]
        lo = np.array([min(math.floor(cands[i][0] * n), n) for i in range(3)], dtype=float)
        hi = np.array([lo[i] + cands[i][1] for i in range(3)])
        pk = keys[tracked]
        alarms = bank.update(pk, lo[tracked], hi[tracked], n, h, absent_bound=absent)
        bank.check_invariants()
        fired = set()
        for i in range(3):
            lo_i, hi_i = (lo[i], min(hi[i], n)) if i in tracked else (0.0, min(absent, n))
            for j, d in enumerate(model[i]):
                d.step(lo_i, hi_i, n, h, t)
                if max(d.stat) >= h:
                    fired.add((int(keys[i]), 1 if j == 0 else -1))
        assert fired == set(zip(alarms.keys.tolist(), alarms.direction.tolist(), strict=True))
        total += len(fired)
        state = bank.state_dict()[1]
        for i in range(3):
            for j, name in enumerate(("up", "down")):
                d = model[i][j]
                np.testing.assert_allclose(state[f"{name}.stat"][i], d.stat, rtol=1e-8, atol=1e-8)
                assert state[f"{name}.start"][i].tolist() == d.start
                got_ref = [state[f"{name}.ref_{k}"][i] for k in ("c", "n", "n2")]
                np.testing.assert_allclose(got_ref, [d.c, d.n, d.n2], rtol=1e-9, atol=1e-9)
        for key, direction in sorted(fired):
            name = "up" if direction == 1 else "down"
            bank.rebase(np.array([key]), name)
            up_m, down_m = model[int(np.searchsorted(keys, key))]
            if direction == 1:
                _rebase_pair(up_m, down_m)
            else:
                _rebase_pair(down_m, up_m)
        bank.check_invariants()
    event(f"alarms (capped at 3): {min(total, 3)}")


# -- bookkeeping ----------------------------------------------------------------------------


def _bank_with_history(seed: int = 5, n_keys: int = 40) -> tuple[CusumBank, np.ndarray]:
    rng = np.random.default_rng(seed)
    keys = np.sort(rng.choice(10**6, n_keys, replace=False)).astype(np.int64)
    bank = CusumBank()
    c = rng.binomial(20_000, 0.01, n_keys).astype(float)
    bank.add(keys, c, 20_000, c)
    for _ in range(10):
        x = rng.binomial(1000, 0.01, n_keys).astype(float)
        bank.update(keys, x, x, 1000, 12.0)
        bank.check_invariants()
    return bank, keys


def test_planted_rise_alarm_evidence_and_rebase() -> None:
    bank, keys = _bank_with_history()
    rng = np.random.default_rng(9)
    target = keys[7]
    alarms = None
    for t in range(10, 30):
        x = rng.binomial(1000, 0.01, keys.size).astype(float)
        if t >= 15:
            x[7] = 60.0  # 6 % from pane 15 on
        alarms = bank.update(keys, x, x, 1000, 12.0)
        bank.check_invariants()
        if target in alarms.of("up"):
            break
    assert alarms is not None and target in alarms.of("up")
    i = int(np.flatnonzero(alarms.keys == target)[0])
    assert alarms.direction[i] == 1 and alarms.change_pane[i] == 15
    assert alarms.statistic[i] >= alarms.threshold == 12.0
    panes = alarms.pane - 15 + 1
    assert alarms.recent_transactions[i] == 1000 * panes
    assert alarms.recent_rate[i] == pytest.approx(0.06)
    # recent interval: exact Poisson (Garwood) 95 % bounds from scipy, within the WH accuracy
    c = 60.0 * panes
    assert alarms.recent_low[i] * 1000 * panes == pytest.approx(gamma.ppf(0.025, c), rel=0.02)
    assert alarms.recent_high[i] * 1000 * panes == pytest.approx(gamma.ppf(0.975, c + 1), rel=0.02)
    assert alarms.ref_low[i] < 0.013 and alarms.ref_high[i] > 0.008
    assert alarms.ref_low[i] <= alarms.ref_rate[i] <= alarms.ref_high[i] < alarms.recent_low[i]
    assert alarms.ratio[i] in bank.ratios and alarms.p0[i] > alarms.ref_rate[i]
    bank.rebase(np.array([target]), "up")
    bank.check_invariants()
    _, arrays = bank.state_dict()
    pos = int(np.searchsorted(bank.keys, target))
    assert np.all(arrays["up.stat"][pos] == 0) and np.all(arrays["up.start"][pos] == -1)
    assert arrays["up.ref_c"][pos] == c and arrays["up.ref_n"][pos] == 1000 * panes
    # the new normal: 6 % no longer alarms up
    for _ in range(5):
        x = rng.binomial(1000, 0.01, keys.size).astype(float)
        x[7] = 60.0
        assert target not in bank.update(keys, x, x, 1000, 12.0).of("up")


def test_new_candidate_from_zero_exact_mode() -> None:
    bank = CusumBank()
    bank.add(np.array([5]), 0.0, 20_000)  # exact mode: 0 in a window of 20,000
    assert bank.active_tests() == 3  # up tests only: the down lower bound is 0
    a = bank.update(np.array([5]), np.array([0.0]), np.array([0.0]), 1000, 15.4)
    assert len(a) == 0
    a = bank.update(np.array([5]), np.array([20.0]), np.array([20.0]), 1000, 15.4)
    assert a.of("up").tolist() == [5]
    assert np.all(a.p0 > 0)  # a rate of 0 is never used


def test_merge_drop_keep_other_states() -> None:
    bank, keys = _bank_with_history()
    before_meta, before = bank.state_dict()
    new = np.array([keys[3] + 1, -5, keys[-1] + 10], dtype=np.int64)
    new = new[~np.isin(new, keys)]
    bank.add(new, 30.0, 10_000, 10.0)
    bank.check_invariants()
    assert np.all(np.diff(bank.keys) > 0) and len(bank) == keys.size + new.size
    _, after = bank.state_dict()
    old_pos = np.searchsorted(bank.keys, keys)
    for name, arr in before.items():
        if name != "keys":
            np.testing.assert_array_equal(after[name][old_pos], arr)
    new_pos = np.searchsorted(bank.keys, new)
    assert np.all(after["up.ref_c"][new_pos] == 30) and np.all(after["down.ref_c"][new_pos] == 10)
    assert np.all(after["up.stat"][new_pos] == 0)
    bank.drop(new)
    bank.check_invariants()
    meta, again = bank.state_dict()
    assert meta == before_meta
    for name, arr in before.items():
        np.testing.assert_array_equal(again[name], arr)
    with pytest.raises(CusumInputError, match="present"):
        bank.add(keys[:1], 1.0, 10)
    with pytest.raises(CusumInputError, match="repeated"):
        bank.add(np.array([-9, -9]), 1.0, 10)
    with pytest.raises(CusumInputError, match="not candidates"):
        bank.drop(np.array([-12345]))
    with pytest.raises(CusumInputError, match="count_lower"):
        bank.add(np.array([-7]), 5.0, 3.0)


def test_remap_with_packed_item_ids() -> None:
    # pairs of item ids packed in radix 100; item 7 is retired and ids above it shift down
    rows = np.array([[1, 2], [1, 7], [2, 9], [3, 8], [8, 9]])
    keys = pack(rows, 100)
    bank = CusumBank()
    bank.add(keys, np.arange(5.0) + 10, 1000, np.arange(5.0))
    x = np.array([1.0, 2, 3, 4, 5])
    bank.update(keys, x, x, 100, 10.0)
    _, before = bank.state_dict()

    def renumber(k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = unpack(k, 100, 2)
        keep = ~np.any(r == 7, axis=1)
        r = np.where(r > 7, r - 1, r)
        return pack(r, 50), keep

    bank.remap(renumber)
    bank.check_invariants()
    want = pack(np.array([[1, 2], [2, 8], [3, 7], [7, 8]]), 50)
    assert bank.keys.tolist() == sorted(want.tolist())
    _, after = bank.state_dict()
    np.testing.assert_array_equal(after["up.ref_c"], before["up.ref_c"][[0, 2, 3, 4]])
    with pytest.raises(CusumInputError, match="same new key"):
        bank.remap(lambda k: (np.zeros_like(k), np.ones(k.shape, bool)))


def test_state_round_trip_is_exact_and_continues_identically() -> None:
    bank, _ = _bank_with_history()
    bank.add(np.array([-1, -2], dtype=np.int64), 5.0, 5000)
    meta, arrays = bank.state_dict(prefix="cusum/")
    meta = json.loads(json.dumps(meta))
    twin = CusumBank.load_state(meta, {k: v.copy() for k, v in arrays.items()}, prefix="cusum/")
    twin.check_invariants()
    assert twin.state_dict()[0] == bank.state_dict()[0]
    rng = np.random.default_rng(2)
    all_keys = bank.keys
    for _ in range(8):
        x = rng.binomial(1000, 0.02, all_keys.size).astype(float)
        a1 = bank.update(all_keys, x, x + 1, 1000, 8.0)
        a2 = twin.update(all_keys, x, x + 1, 1000, 8.0)
        np.testing.assert_array_equal(a1.keys, a2.keys)
        np.testing.assert_array_equal(a1.statistic, a2.statistic)
    for name, arr in bank.state_dict()[1].items():
        np.testing.assert_array_equal(twin.state_dict()[1][name], arr)


def test_check_invariants_catches_tampering() -> None:
    bank, _ = _bank_with_history()
    meta, arrays = bank.state_dict()
    tamper = {
        "up.stat": lambda a: a.__setitem__((0, 0), -1.0),
        "keys": lambda a: a.__setitem__(slice(0, 2), a[1::-1].copy()),
        "down.ref_c": lambda a: a.__setitem__(0, 1e12),
        "up.start": lambda a: a.__setitem__((1, 1), 3),
        "down.exc_n": lambda a: a.__setitem__((2, 0), np.nan),
    }
    for name, spoil in tamper.items():
        bad = {k: v.copy() for k, v in arrays.items()}
        spoil(bad[name])
        with pytest.raises(CheckpointError, match="cusum"):
            CusumBank.load_state(meta, bad)
    with pytest.raises(CheckpointError):
        CusumBank.load_state({**meta, "format": "other/9"}, arrays)
    missing = {k: v for k, v in arrays.items() if k != "up.ref_n2"}
    with pytest.raises(CheckpointError):
        CusumBank.load_state(meta, missing)
    bank._a["up.ref_n"][0] = -1.0
    with pytest.raises(CusumStateError, match="transactions"):
        bank.check_invariants()


def test_update_rejects_bad_input() -> None:
    bank, keys = _bank_with_history()
    x = np.ones(keys.size)
    with pytest.raises(CusumInputError, match="sorted"):
        bank.update(keys[::-1], x, x, 1000, 10.0)
    with pytest.raises(CusumInputError, match="lo <= hi"):
        bank.update(keys, x, x - 1, 1000, 10.0)
    with pytest.raises(CusumInputError, match="same length"):
        bank.update(keys, x[:-1], x, 1000, 10.0)
    with pytest.raises(CusumInputError, match="n = "):
        bank.update(keys, x, x, -1, 10.0)
    with pytest.raises(CusumInputError, match="lo above n"):
        bank.update(keys, x * 50, x * 50, 10, 10.0)
    with pytest.raises(CusumInputError, match="h = "):
        bank.update(keys, x, x, 1000, 0.0)
    with pytest.raises(CusumInputError, match="not after"):
        bank.update(keys, x, x, 1000, 10.0, pane=3)
    with pytest.raises(CusumInputError, match="direction"):
        bank.rebase(keys[:1], "sideways")
    with pytest.raises(CusumInputError, match="ratios"):
        CusumBank(ratios=(0.5, 2.0))
    bank.check_invariants()  # nothing above changed the state


def test_pane_keys_beyond_candidates_and_absent_bound() -> None:
    bank = CusumBank()
    bank.add(np.array([10, 20]), 100.0, 10_000, 100.0)
    pane_keys = np.array([5, 10, 15])  # 20 untracked in this pane, 5 and 15 not candidates
    bank.update(
        pane_keys,
        np.array([50.0, 7.0, 50.0]),
        np.array([50.0, 9.0, 50.0]),
        1000,
        30.0,
        absent_bound=4.0,
    )
    _, arrays = bank.state_dict()
    # the up reference took the upper counts (9 and the absent bound 4), the down one the lower
    lam = bank.decay
    np.testing.assert_allclose(arrays["up.ref_c"], [lam * 100 + 9, lam * 100 + 4])
    np.testing.assert_allclose(arrays["down.ref_c"], [lam * 100 + 7, lam * 100 + 0])


def test_active_tests_counts_candidates_directions_alternatives() -> None:
    bank, keys = _bank_with_history()
    assert bank.active_tests() == keys.size * 2 * len(bank.ratios)
    bank.add(np.array([-3]), 12.0, 10_000)  # down reference 0: its down tests cannot move
    assert bank.active_tests() == keys.size * 2 * len(bank.ratios) + len(bank.ratios)
