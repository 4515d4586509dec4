"""Page's CUSUM on per-pane itemset counts, for many candidates at once, under a false-alert budget.

A :class:`CusumBank` holds, for a sorted int64 array of candidate keys (integer-encoded
itemsets), one CUSUM statistic per candidate, per direction (``up``: the rate rose; ``down``:
it fell) and per alternative rate. It is called once per closed pane with the pane's
transaction count ``n`` and, for each candidate, bounds ``[lo, hi]`` on the number of those
transactions that contain it (Lossy Counting: ``[f, f + delta]`` where the pane tracks the
itemset, ``[0, absent_bound]`` where it does not; exact counting: ``lo = hi``). It returns the
candidates whose statistic reached the threshold, with their evidence. No Python object per
candidate: every step is numpy on arrays aligned to the keys; a pane costs
O(candidates x alternatives) plus one ``searchsorted``. Alarms are signals for a person to
review, not decisions.

The test
--------
For a reference rate ``p0`` and an alternative ``p1`` the binomial log-likelihood ratio of a
pane is ``llr = x ln(p1/p0) + (n - x) ln((1 - p1)/(1 - p0))`` and the statistic is
``S = max(0, S + llr)`` (Page 1954). Alternatives are fixed multiples of the reference,
``p1 = r p0`` with ``r`` in ``ratios`` (default 1.5, 2, 4) for ``up`` and ``1/r`` for ``down``
(``p1`` clipped into ``(0, 1)``), never tuned to one expected change. The ``up`` test counts
``x = lo`` and the ``down`` test ``x = hi``, so counting error never manufactures evidence.

Reference rates come from each candidate's own history, separately per direction: decayed
sums of counts and transactions (decay ``(B - 1)/(B + 1)``, ``B = baseline_panes``, so they
hold the information of about ``B`` panes: Kish effective size ``n_eff = (sum w n)^2 / sum w^2
n``). The ``up`` reference sums ``hi`` and its test uses an upper bound of the rate; the
``down`` reference sums ``lo`` and its test a lower bound::

    p0 = (P_z(c_eff) + margin * h * k(r) / 2) / n_eff       (up; down: lower P_z, minus)

``P_z`` is the Poisson (Garwood) bound at ``z`` normal deviates of the effective count ``c_eff``
(Wilson-Hilferty form, :func:`poisson_upper`), and ``k(r)`` (:func:`sensitivity`) measures how
fast an error in ``p0`` inflates the false alarms of the ratio-``r`` test: the margin of ``h k /
2`` counts cancels, on average over the estimate's sampling error, the factor ``exp(h k
delta)`` that a relative error ``delta`` costs. A fixed ``z`` cannot do this: the damage grows
with ``h``, so a ``z`` calibrated at a raised budget fails at a small one (measured on the feed
of ``tests/test_cusum_calibration.py``: fixed ``z = 1`` without margin gives 0.24x the budget at
1,000 per million and 1.8x at 100; the margin with ``z = 0`` gives 0.07-0.13x from 10 to 10,000
per million, near the 0.11x of a test that knows the true rate). A count of 0 gives
a positive rate, never 0. A direction's reference takes a pane only when all its statistics are
0 after it: frozen during an excursion, so a test never adapts to the change it is detecting;
when an excursion ends without an alarm its panes are added then (``backfill``). Without the
backfill the reference is biased away from the panes that start excursions (low for ``up``,
high for ``down``) and false alarms reach 14x the budget. A candidate added later starts
from a pseudo-history given by the caller: the untracked upper bound (window ``max_error``,
window transactions) for ``up``, 0 for ``down``; its ``down`` tests are inactive until their
lower bound is positive.

The change point of an alarm is the pane at which the alarming statistic last left 0. The
evidence holds the reference rate and the rate since the change point (intervals at
``evidence_z``), the statistic, the threshold, the ratio and the change pane. After reporting an
alarm the caller calls :meth:`CusumBank.rebase` (statistics to 0, both directions' references
restarted from the panes since the change point: the new normal); otherwise the candidate
alarms again at the next pane.

Guarantee
---------
With the reference rate correct, each test has ``P(S_t >= h) <= exp(-h)`` at every pane
(Ville's inequality on the time-reversed likelihood ratio; Lorden 1971: ``ARL0 >= exp(h)``),
whatever resets happen. :func:`threshold` splits a budget of ``B`` expected false alarms per
million transactions over the ``M_t`` tests of pane ``t`` (candidates x directions x
alternatives that can alarm, :meth:`CusumBank.active_tests`): ``h_t = ln(10^6 M_t / (B n_t))``.
By linearity of expectation at most ``B`` false alarms per million transactions are expected,
whatever the dependence between tests, for count- or time-based panes and a changing ``M_t``.

Assumptions: independent baskets and a constant rate per itemset between changes (binomial
pane counts). No theorem covers the estimated reference; the margin is derived to first order
and checked by simulation (``tests/test_cusum_calibration.py``); the slack of ``exp(-h)`` for a
binomial CUSUM absorbs the rest. What breaks it: seasonality (daily or weekly cycles are
changes against a reference that does not model them); overdispersion (bulk orders, one
customer's repeated orders, bots): counts that vary more than binomially exceed the budget
(measured: rates wobbling from pane to pane with a coefficient of variation of 10 % give 1.1x
the budget at 1,000 per million, 20 % give 30x); a slow drift that never alarms is learned into
the reference. A false alarm restarts both references from its excursion, panes selected for
being extreme, which raises the chance of a follow-up false alarm the other way (measured:
+15-25 % false alarms, and it compounds under overdispersion).

References
----------
Page, E. S. Continuous inspection schemes. Biometrika 41(1/2), 1954.
Lorden, G. Procedures for reacting to a change in distribution. Ann. Math. Statist. 42(6), 1971.
Wilson, E. B. & Hilferty, M. M. The distribution of chi-square. PNAS 17(12), 1931.
Garwood, F. Fiducial limits for the Poisson distribution. Biometrika 28(3/4), 1936.
Kish, L. Survey Sampling. Wiley, 1965 (effective sample size of a weighted mean).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from streamcount.alerts.cusum_alarms import (
    DIRS,
    CusumAlarms,
    dir_index,
    join_alarms,
    keys_array,
    merged_rows,
    row_max,
)
from streamcount.alerts.cusum_stats import (
    CusumInputError,
    binomial_llr,
    poisson_lower,
    poisson_upper,
    rate_bound,
    sensitivity,
    threshold,
)
from streamcount.errors import CheckpointError, StreamcountError

__all__ = [
    "DEFAULT_MARGIN",
    "DEFAULT_RATIOS",
    "DEFAULT_Z",
    "CusumAlarms",
    "CusumBank",
    "CusumInputError",
    "CusumStateError",
    "binomial_llr",
    "poisson_lower",
    "poisson_upper",
    "sensitivity",
    "threshold",
]

DEFAULT_RATIOS: tuple[float, ...] = (1.5, 2.0, 4.0)
#: z of the reference bounds and the margin's multiple of ``h k(r) / 2`` counts (calibrated).
DEFAULT_Z = 0.0
DEFAULT_MARGIN = 1.0
_FORMAT = "streamcount.cusum/1"
_P_MIN = 1e-12
_P_MAX = 1.0 - 1e-9
_PER_ALT = ("stat", "start", "exc_lo", "exc_hi", "exc_n")
_PER_KEY = ("ref_c", "ref_n", "ref_n2", "pend_c", "pend_n", "pend_n2", "pend_w")


class CusumStateError(StreamcountError):
    """A :class:`CusumBank` invariant does not hold (a bug, or a tampered state)."""


class CusumBank:
    """CUSUM statistics for a sorted set of candidate keys (see the module docstring).

    Parameters
    ----------
    ratios:
        Alternative multiples ``r > 1`` of the reference rate; ``up`` tests ``r p0``, ``down``
        tests ``p0 / r``. Charge ``2 * len(ratios)`` tests per candidate to the budget.
    baseline_panes:
        Effective number of panes in the reference (decay ``(B - 1)/(B + 1)``).
    z:
        Normal deviate of the reference bounds (upper for ``up``, lower for ``down``).
    evidence_z:
        Normal deviate of the intervals reported with an alarm (1.96: 95 % two-sided).
    backfill:
        Add an excursion's frozen panes to the reference when it ends without an alarm.
    margin:
        Multiple of the estimation margin ``h k(r) / 2`` counts (0 turns it off).
    """

    def __init__(
        self,
        ratios: Sequence[float] = DEFAULT_RATIOS,
        baseline_panes: float = 50.0,
        z: float = DEFAULT_Z,
        evidence_z: float = 1.96,
        backfill: bool = True,
        margin: float = DEFAULT_MARGIN,
    ) -> None:
        r = np.asarray(ratios, dtype=np.float64)
        if r.ndim != 1 or r.size == 0 or not np.all(np.isfinite(r)) or np.any(r <= 1.0):
            raise CusumInputError(f"ratios = {ratios!r}: must be a non-empty list of numbers > 1")
        if not baseline_panes >= 1:
            raise CusumInputError(f"baseline_panes = {baseline_panes!r}: must be >= 1")
        for name, value in (("z", z), ("evidence_z", evidence_z)):
            if not 0 <= value <= 6:
                raise CusumInputError(f"{name} = {value!r}: must be in [0, 6]")
        self.ratios = tuple(float(v) for v in r)
        self.baseline_panes = float(baseline_panes)
        self.z = float(z)
        self.evidence_z = float(evidence_z)
        self.backfill = bool(backfill)
        if not 0 <= margin < math.inf:
            raise CusumInputError(f"margin = {margin!r}: must be >= 0")
        self.margin = float(margin)
        self.decay = (self.baseline_panes - 1.0) / (self.baseline_panes + 1.0)
        self._mult = {"up": r.copy(), "down": 1.0 / r}
        self._k = {d: sensitivity(m) for d, m in self._mult.items()}
        self.last_pane = -1
        self.keys = np.zeros(0, dtype=np.int64)
        self._a: dict[str, np.ndarray] = {}
        self._a.update(self._blank(0))

    # -- layout -----------------------------------------------------------------------------

    @property
    def n_alternatives(self) -> int:
        return len(self.ratios)

    def __len__(self) -> int:
        return int(self.keys.shape[0])

    def _blank(self, count: int) -> dict[str, np.ndarray]:
        k = self.n_alternatives
        out: dict[str, np.ndarray] = {}
        for d in DIRS:
            for name in _PER_ALT:
                dtype = np.int64 if name == "start" else np.float64
                out[f"{d}.{name}"] = np.zeros((count, k), dtype=dtype)
            out[f"{d}.start"][:] = -1
            for name in _PER_KEY:
                out[f"{d}.{name}"] = np.zeros(count, dtype=np.float64)
            out[f"{d}.pend_w"][:] = 1.0
        return out

    def _take(self, index: np.ndarray) -> None:
        self.keys = self.keys[index]
        for name, arr in self._a.items():
            self._a[name] = arr[index]

    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Boolean mask: which of ``keys`` are candidates."""
        q = keys_array(keys, "keys")
        pos = np.searchsorted(self.keys, q)
        pos_c = np.minimum(pos, max(len(self) - 1, 0))
        return (pos < len(self)) & (self.keys[pos_c] == q) if len(self) else np.zeros(q.shape, bool)

    def _positions(self, keys: np.ndarray, what: str) -> np.ndarray:
        q = keys_array(keys, what)
        found = self.contains(q)
        if not np.all(found):
            raise CusumInputError(f"{what}: {q[~found][:5].tolist()} are not candidates")
        return np.searchsorted(self.keys, q)

    # -- candidates -------------------------------------------------------------------------

    def add(
        self,
        keys: np.ndarray,
        count_upper: np.ndarray | float,
        transactions: np.ndarray | float,
        count_lower: np.ndarray | float = 0.0,
    ) -> None:
        """Merge new candidates, each with a pseudo-history of ``transactions`` transactions.

        The ``up`` reference starts at ``count_upper`` (e.g. the untracked bound ``max_error``
        of the window, or the window's upper count), the ``down`` one at ``count_lower``.
        Keys already present, or repeated, are refused.
        """
        new = keys_array(keys, "add(keys)")
        m = new.shape[0]
        cu = np.broadcast_to(np.asarray(count_upper, dtype=np.float64), (m,))
        cl = np.broadcast_to(np.asarray(count_lower, dtype=np.float64), (m,))
        tr = np.broadcast_to(np.asarray(transactions, dtype=np.float64), (m,))
        bad = ~(np.isfinite(cu) & np.isfinite(cl) & np.isfinite(tr))
        bad |= (cl < 0) | (cl > cu) | (cu > tr)
        if np.any(bad):
            i = int(np.flatnonzero(bad)[0])
            raise CusumInputError(
                f"add: key {int(new[i])} has count_lower={cl[i]!r}, count_upper={cu[i]!r}, "
                f"transactions={tr[i]!r}: need 0 <= count_lower <= count_upper <= transactions"
            )
        order = np.argsort(new, kind="stable")
        new, cu, cl, tr = new[order], cu[order], cl[order], tr[order]
        if m > 1 and np.any(new[1:] == new[:-1]):
            raise CusumInputError("add(keys): repeated keys")
        if np.any(self.contains(new)):
            raise CusumInputError(f"add(keys): {new[self.contains(new)][:5].tolist()} present")
        part = self._blank(m)
        part["up.ref_c"], part["down.ref_c"] = cu.copy(), cl.copy()
        for d in DIRS:
            part[f"{d}.ref_n"] = tr.copy()
            part[f"{d}.ref_n2"] = tr.copy()
        # both sorted: the new rows go to their slots and the old rows, in order, to the
        # rest (one scatter per array, where a sort and a gather would cost twice as much)
        slots = np.searchsorted(self.keys, new) + np.arange(m)
        fresh = np.zeros(len(self) + m, dtype=bool)
        fresh[slots] = True
        old_slots = np.flatnonzero(~fresh)
        self.keys = merged_rows(self.keys, new, old_slots, slots)
        for name, arr in self._a.items():
            self._a[name] = merged_rows(arr, part[name], old_slots, slots)

    def drop(self, keys: np.ndarray) -> None:
        """Forget candidates (all must be present)."""
        pos = self._positions(keys, "drop(keys)")
        keep = np.ones(len(self), dtype=bool)
        keep[pos] = False
        self.keys = self.keys[keep]
        for name, arr in self._a.items():
            self._a[name] = arr[keep]

    def remap(self, mapping: Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]) -> None:
        """Renumber keys: ``mapping(keys) -> (new_keys, keep)``; rows with ``keep`` False go."""
        new_keys, keep = mapping(self.keys.copy())
        new_keys = keys_array(new_keys, "remap new keys")
        keep = np.asarray(keep, dtype=bool)
        if new_keys.shape != self.keys.shape or keep.shape != self.keys.shape:
            raise CusumInputError("remap: mapping must return arrays shaped like the keys")
        idx = np.flatnonzero(keep)
        order = idx[np.argsort(new_keys[idx], kind="stable")]
        sorted_keys = new_keys[order]
        if sorted_keys.size > 1 and np.any(sorted_keys[1:] == sorted_keys[:-1]):
            raise CusumInputError("remap: two kept keys map to the same new key")
        self._take(order)
        self.keys = sorted_keys

    # -- the pane step ----------------------------------------------------------------------

    def _tested(self, d: str, h: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The reference ``p0`` each test uses, its ``p1`` and the active mask, all (N, A).

        ``p0 = (bound(c_eff) +/- margin * h * k(r) / 2) / n_eff``: the Poisson bound at ``z`` of
        the effective count, moved by the estimation margin (up: +, down: -).
        """
        a = self._a
        c, nn, n2 = a[f"{d}.ref_c"], a[f"{d}.ref_n"], a[f"{d}.ref_n2"]
        up = d == "up"
        has = nn > 0
        n_eff = np.where(has, nn * nn / np.where(n2 > 0, n2, 1.0), 1.0)
        c_eff = np.where(has, c / np.where(has, nn, 1.0) * n_eff, 0.0)
        base = poisson_upper(c_eff, self.z) if up else poisson_lower(c_eff, self.z)
        shift = self.margin * (h if math.isfinite(h) else 0.0) / 2.0 * self._k[d]
        p0 = (base[:, None] + (shift if up else -shift)[None, :]) / n_eff[:, None]
        p0 = np.where(has[:, None], np.clip(p0, 0.0, 1.0), 1.0 if up else 0.0)
        p1 = np.clip(p0 * self._mult[d][None, :], _P_MIN, _P_MAX)
        p0c = np.clip(p0, _P_MIN, _P_MAX)
        active = (p0 > _P_MIN) & (p0 < _P_MAX) & (p1 != p0c)
        return p0c, p1, active

    def active_tests(self) -> int:
        """Tests (candidate x direction x alternative) that can move at the next pane.

        A test is inactive when its reference bound leaves no room (``up`` at rate 1, ``down``
        at lower bound 0, e.g. a new candidate). Counted without the estimation margin (which
        depends on ``h``), so it may count a few tests that turn out inactive: an overcount,
        on the safe side. This is the ``M`` to charge for the next pane.
        """
        return sum(int(np.count_nonzero(self._tested(d, 0.0)[2])) for d in DIRS)

    def update(
        self,
        pane_keys: np.ndarray,
        lo: np.ndarray,
        hi: np.ndarray,
        n: int,
        h: float,
        *,
        absent_bound: float = 0.0,
        pane: int | None = None,
    ) -> CusumAlarms:
        """Feed one closed pane; return the candidates whose statistic reached ``h``.

        ``pane_keys`` (sorted, unique) with count bounds ``lo <= hi`` may include keys that are
        not candidates (ignored); candidates missing from it count as ``[0, absent_bound]``.
        ``pane`` is the pane's index (default: the previous one + 1; must increase).
        """
        pk = keys_array(pane_keys, "update(pane_keys)")
        lo = np.asarray(lo, dtype=np.float64)
        hi = np.asarray(hi, dtype=np.float64)
        if lo.shape != pk.shape or hi.shape != pk.shape:
            raise CusumInputError("update: pane_keys, lo and hi must have the same length")
        if not (isinstance(n, int | np.integer) and n >= 0):
            raise CusumInputError(f"update: n = {n!r}: must be an integer >= 0")
        if pk.size > 1 and np.any(pk[1:] <= pk[:-1]):
            raise CusumInputError("update: pane_keys must be sorted and unique")
        if not (np.all(np.isfinite(lo) & np.isfinite(hi)) and np.all((lo >= 0) & (lo <= hi))):
            raise CusumInputError("update: need finite 0 <= lo <= hi for every pane key")
        if np.any(lo > n) or not 0 <= absent_bound < math.inf:
            raise CusumInputError(f"update: lo above n = {n} or absent_bound = {absent_bound!r}")
        if not (h > 0) or math.isnan(h):
            raise CusumInputError(f"update: h = {h!r}: must be > 0")
        t = self.last_pane + 1 if pane is None else int(pane)
        if t <= self.last_pane:
            raise CusumInputError(f"update: pane {t} is not after pane {self.last_pane}")
        x_lo = np.zeros(len(self))
        x_hi = np.full(len(self), min(float(absent_bound), float(n)))
        if pk.size and len(self):
            pos = np.searchsorted(pk, self.keys)
            pos_c = np.minimum(pos, pk.size - 1)
            hit = (pos < pk.size) & (pk[pos_c] == self.keys)
            x_lo[hit] = lo[pos_c[hit]]
            x_hi[hit] = np.minimum(hi[pos_c[hit]], n)
        parts = []
        for d in DIRS:
            x_test, x_ref = (x_lo, x_hi) if d == "up" else (x_hi, x_lo)
            p0, p1, active = self._tested(d, float(h))
            idx, top = self._step(d, p0, p1, active, x_test, x_lo, x_hi, float(n), t)
            fire = np.flatnonzero(top >= h)
            parts.append(self._evidence(d, fire, p0[fire]))
            self._settle(d, idx, x_ref, float(n))
        self.last_pane = t
        return join_alarms(t, float(h), parts)

    def _step(
        self,
        d: str,
        p0: np.ndarray,
        p1: np.ndarray,
        active: np.ndarray,
        x: np.ndarray,
        x_lo: np.ndarray,
        x_hi: np.ndarray,
        n: float,
        t: int,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Advance the statistics of direction ``d`` by one pane; the rows whose statistics
        are all 0 (quiet) and each row's largest statistic."""
        a = self._a
        with np.errstate(invalid="ignore"):
            llr = binomial_llr(x[:, None], n, p0, p1)
        old = a[f"{d}.stat"]
        stat = np.where(active, np.maximum(old + llr, 0.0), 0.0)
        pos = stat > 0
        fresh = pos & (old == 0)
        a[f"{d}.start"] = np.where(fresh, t, np.where(pos, a[f"{d}.start"], -1))
        for name, val in (("exc_lo", x_lo[:, None]), ("exc_hi", x_hi[:, None]), ("exc_n", n)):
            acc = a[f"{d}.{name}"]
            acc[fresh] = 0.0
            acc += val
            acc[~pos] = 0.0
        a[f"{d}.stat"] = stat
        top = row_max(stat)
        return np.flatnonzero(top <= 0.0), top

    def _settle(self, d: str, quiet: np.ndarray, x_ref: np.ndarray, n: float) -> None:
        """Reference update with this pane, for the candidates whose statistics are all 0."""
        a, lam = self._a, self.decay
        c, nn, n2 = a[f"{d}.ref_c"], a[f"{d}.ref_n"], a[f"{d}.ref_n2"]
        if not self.backfill:
            c[quiet] = lam * c[quiet] + x_ref[quiet]
            nn[quiet] = lam * nn[quiet] + n
            n2[quiet] = lam * lam * n2[quiet] + n
            return
        pc, pn, pn2, pw = (a[f"{d}.{k}"] for k in ("pend_c", "pend_n", "pend_n2", "pend_w"))
        pc *= lam
        pc += x_ref
        pn *= lam
        pn += n
        pn2 *= lam * lam
        pn2 += n
        pw *= lam
        w = pw[quiet]
        c[quiet] = w * c[quiet] + pc[quiet]
        nn[quiet] = w * nn[quiet] + pn[quiet]
        n2[quiet] = w * w * n2[quiet] + pn2[quiet]
        pc[quiet], pn[quiet], pn2[quiet], pw[quiet] = 0.0, 0.0, 0.0, 1.0

    def _evidence(self, d: str, idx: np.ndarray, p0: np.ndarray) -> dict[str, np.ndarray]:
        a, ez, rows = self._a, self.evidence_z, np.arange(idx.size)
        stat = a[f"{d}.stat"][idx]
        alt = stat.argmax(axis=1) if idx.size else np.zeros(0, dtype=np.int64)
        c, nn, n2 = (a[f"{d}.{k}"][idx] for k in ("ref_c", "ref_n", "ref_n2"))
        lo_c, hi_c, en = (a[f"{d}.{k}"][idx, alt] for k in ("exc_lo", "exc_hi", "exc_n"))
        up = d == "up"
        with np.errstate(invalid="ignore", divide="ignore"):
            return {
                "keys": self.keys[idx],
                "direction": np.full(idx.size, 1 if up else -1, dtype=np.int8),
                "statistic": stat[rows, alt],
                "ratio": self._mult[d][alt],
                "change_pane": a[f"{d}.start"][idx, alt],
                "p0": p0[rows, alt],
                "ref_rate": np.where(nn > 0, c / np.where(nn > 0, nn, 1.0), np.nan),
                "ref_low": rate_bound(c, nn, n2, ez, False),
                "ref_high": rate_bound(c, nn, n2, ez, True),
                "recent_rate": (lo_c if up else hi_c) / en,
                "recent_low": rate_bound(lo_c, en, en, ez, False),
                "recent_high": rate_bound(hi_c, en, en, ez, True),
                "recent_transactions": en,
            }

    def rebase(self, keys: np.ndarray, direction: str, *, both: bool = True) -> None:
        """Restart after an alarm in ``direction``: the new normal is the panes since the change
        point of the largest statistic.

        That direction's statistics go to 0 and its reference is restarted from those panes
        (left as is for a key whose statistics are all 0). With ``both`` the other direction is
        restarted from the same panes too (its statistics to 0, its reference from the other
        count end), so a return to the old rate is seen as a change without waiting for the
        old panes to decay out of its reference.
        """
        d = DIRS[dir_index(direction)]
        pos = self._positions(keys, "rebase(keys)")
        a = self._a
        stat = a[f"{d}.stat"][pos]
        alt = stat.argmax(axis=1) if pos.size else np.zeros(0, dtype=np.int64)
        p = pos[stat[np.arange(pos.size), alt] > 0]
        alt = alt[stat[np.arange(pos.size), alt] > 0]
        lo_c, hi_c, en = (a[f"{d}.{k}"][p, alt] for k in ("exc_lo", "exc_hi", "exc_n"))
        for e in DIRS if both else (d,):
            self._clear(e, pos if e == d else p)
            a[f"{e}.ref_c"][p] = hi_c if e == "up" else lo_c
            a[f"{e}.ref_n"][p] = en
            a[f"{e}.ref_n2"][p] = en

    def _clear(self, d: str, rows: np.ndarray) -> None:
        a = self._a
        for name in _PER_ALT:
            a[f"{d}.{name}"][rows] = -1 if name == "start" else 0.0
        for name in ("pend_c", "pend_n", "pend_n2"):
            a[f"{d}.{name}"][rows] = 0.0
        a[f"{d}.pend_w"][rows] = 1.0

    # -- persistence and checks -------------------------------------------------------------

    def state_dict(self, prefix: str = "") -> tuple[dict[str, object], dict[str, np.ndarray]]:
        """``(meta, arrays)``: JSON-able settings and plain numpy arrays (copies)."""
        meta = {
            "format": _FORMAT,
            "ratios": list(self.ratios),
            "baseline_panes": self.baseline_panes,
            "z": self.z,
            "evidence_z": self.evidence_z,
            "backfill": self.backfill,
            "margin": self.margin,
            "last_pane": self.last_pane,
        }
        arrays = {f"{prefix}keys": self.keys.copy()}
        arrays.update({f"{prefix}{k}": v.copy() for k, v in self._a.items()})
        return meta, arrays

    @classmethod
    def load_state(
        cls, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray], prefix: str = ""
    ) -> CusumBank:
        """Rebuild a bank from :meth:`state_dict` output (checked; CheckpointError if bad)."""
        try:
            if meta.get("format") != _FORMAT:
                raise CheckpointError(f"cusum state format {meta.get('format')!r} != {_FORMAT}")
            json.dumps(meta)
            bank = cls(
                ratios=meta["ratios"],
                baseline_panes=float(meta["baseline_panes"]),
                z=float(meta["z"]),
                evidence_z=float(meta["evidence_z"]),
                backfill=bool(meta["backfill"]),
                margin=float(meta["margin"]),
            )
            bank.last_pane = int(meta["last_pane"])
            bank.keys = np.array(arrays[f"{prefix}keys"], dtype=np.int64)
            for name, ref in bank._a.items():
                bank._a[name] = np.array(arrays[f"{prefix}{name}"], dtype=ref.dtype)
            bank.check_invariants()
        except (KeyError, TypeError, ValueError, CusumStateError) as exc:
            raise CheckpointError(f"cusum state cannot be loaded: {exc!r}") from exc
        return bank

    def check_invariants(self) -> None:
        """Raise :class:`CusumStateError` unless the state is consistent."""
        n, k = len(self), self.n_alternatives

        def need(ok: object, what: str) -> None:
            if not ok:
                raise CusumStateError(f"cusum invariant broken: {what}")

        need(self.keys.dtype == np.int64 and self.keys.ndim == 1, "keys are 1-d int64")
        need(n < 2 or np.all(self.keys[1:] > self.keys[:-1]), "keys sorted and unique")
        need(set(self._a) == set(self._blank(0)), "array names")
        for name, arr in self._a.items():
            shape = (n, k) if name.split(".")[1] in _PER_ALT else (n,)
            need(arr.shape == shape, f"{name} shape {arr.shape} != {shape}")
            need(np.all(np.isfinite(arr)), f"{name} finite")
        for d in DIRS:
            g = {name: self._a[f"{d}.{name}"] for name in (*_PER_ALT, *_PER_KEY)}
            pos = g["stat"] > 0
            need(np.all(g["stat"] >= 0), f"{d}: statistics >= 0")
            need(np.all((g["start"] >= 0) == pos), f"{d}: change pane set iff statistic > 0")
            need(np.all(g["start"] <= self.last_pane), f"{d}: change pane not in the future")
            need(np.all(g["exc_n"][~pos] == 0) and np.all(g["exc_hi"][~pos] == 0), f"{d}: idle")
            need(np.all((g["exc_lo"] >= 0) & (g["exc_lo"] <= g["exc_hi"])), f"{d}: recent lo<=hi")
            need(np.all(g["exc_hi"] <= g["exc_n"]), f"{d}: recent counts <= transactions")
            for p in ("ref", "pend"):
                c, nn, n2 = g[f"{p}_c"], g[f"{p}_n"], g[f"{p}_n2"]
                need(np.all((c >= 0) & (c <= nn)), f"{d}: {p} counts within [0, transactions]")
                need(np.all((n2 >= 0) & (n2 <= nn)), f"{d}: {p} weights within [0, transactions]")
            need(np.all((g["pend_w"] >= 0) & (g["pend_w"] <= 1)), f"{d}: pending weight")
            quiet = ~pos.any(axis=1)
            need(np.all(g["pend_n"][quiet] == 0) and np.all(g["pend_w"][quiet] == 1), f"{d}: pend")
