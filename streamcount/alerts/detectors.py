"""Alert detectors: each kind of alert is one detector over the change tests.

The monitor runs one change test per candidate itemset (:class:`~.tracker.ChangeTracker`: Page's
CUSUM on the itemset's per-pane count, up and down, under the false-alert budget) and asks each
detector two things at every pane close:

``eligible(close)``
    the itemsets that could raise this kind of alert now (packed keys per size). They are the
    tests the budget is split over: ``M`` = eligible itemsets x alternatives, summed over the
    detectors.
``fire(close, keys, alarms, budget)``
    the alerts for the eligible itemsets whose test reached the threshold.

Kinds (the single list is :data:`streamcount.alerts.kinds.ALERT_KINDS`):

``emerged``
    A rule passes the rule thresholds (the practical floor) and its itemset's co-purchase rate
    has risen (the up test fired), and no rule of the itemset's family is already announced.
``faded``
    An active rule's co-purchase rate has fallen (the down test fired on its recent panes, not
    on the whole window draining), so a stock-out is reported within a few panes of the stop.
``surged``
    An itemset with at least ``alerts.surge_min_count`` orders in its recent panes has a risen
    co-purchase rate. A surge of an itemset that is not yet a rule is followed until the rule
    emerges (or for one window), so the emerged alert keeps its evidence.

A change of lift that comes only from the antecedent's (or consequent's) own rate, with the
joint rate unchanged, raises nothing: the tests watch how often items are bought together.
Adding a kind is one detector here and one entry in the alert schema.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np

from streamcount.alerts.cusum import CusumAlarms
from streamcount.alerts.families import first_of_family, rule_family_rep, surge_family_rep
from streamcount.alerts.listing import ListedRule, RuleListing
from streamcount.alerts.record import Alert, Evidence, alert_id, window_dict
from streamcount.alerts.tracker import ChangeTracker
from streamcount.config.settings import AlertsConfig
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.rules.derive import Rule
from streamcount.rules.measures import Measure

__all__ = [
    "Budget",
    "Detector",
    "EmergedDetector",
    "FadedDetector",
    "PaneClose",
    "Raised",
    "SurgedDetector",
    "recent_lift_low",
]

Keys = dict[int, np.ndarray]


@dataclass(frozen=True, slots=True)
class Budget:
    """The false-alert budget at one pane close: ``tests`` split the budget, ``threshold`` the
    CUSUM threshold ``ln(10^6 tests / (budget n))`` and ``level`` ``exp(-threshold)``."""

    per_million: float
    tests: int
    threshold: float

    @property
    def level(self) -> float:
        return math.exp(-self.threshold) if math.isfinite(self.threshold) else 0.0

    def as_dict(self) -> dict[str, object]:
        return {
            "false_alerts_per_million": self.per_million,
            "tests": self.tests,
            "threshold": self.threshold if math.isfinite(self.threshold) else None,
            "level": self.level,
        }


@dataclass(frozen=True)
class PaneClose:
    """What the detectors see at one pane close."""

    seq: int
    event_time: float | None
    pane: int
    window: WindowSnapshot
    pane_counts: WindowSnapshot
    recent: WindowSnapshot
    entry: list[Rule]
    listing: RuleListing
    tracker: ChangeTracker
    #: first sequence number and start time of recent panes, for the change point
    pane_starts: Mapping[int, tuple[int, float | None]]

    def names(self, size: int, key: int) -> tuple[str, ...]:
        row = self.tracker.rows_of(np.array([key], dtype=np.int64), size)[0]
        return tuple(sorted(self.window.item_names[i] for i in row.tolist()))

    def key_of(self, items: tuple[str, ...], index: Mapping[str, int]) -> int | None:
        if not all(n in index for n in items):
            return None
        ids = sorted(index[n] for n in items)
        return int(self.tracker.keys_of(np.array([ids], dtype=np.int32))[0])


@dataclass(slots=True)
class Raised:
    """An alert a detector raised, and what the monitor must do after sending it."""

    alert: Alert
    size: int
    key: int
    #: restart the itemset's tests in this direction (``None``: keep following the change)
    rebase: str | None


class Detector(Protocol):
    """One kind of alert over the change tests."""

    kind: str

    def eligible(self, close: PaneClose) -> Keys:
        """Packed keys (per size, sorted, unique) that could raise this kind now."""
        ...

    def fire(
        self, close: PaneClose, keys: Keys, alarms: Mapping[int, CusumAlarms], budget: Budget
    ) -> list[Raised]:
        """Alerts for the eligible ``keys`` whose test fired (in ``alarms``)."""
        ...

    def keep(self, tracker: ChangeTracker) -> Keys:
        """Keys the tracker must go on following whatever their counts."""
        ...

    def state_dict(self) -> dict[str, Any]: ...

    def load_state(self, state: Mapping[str, Any]) -> None: ...

    def check_invariants(self) -> None: ...


# ---------------------------------------------------------------------------------------------
# shared pieces


def _rows(alarms: CusumAlarms, direction: int, keys: np.ndarray) -> np.ndarray:
    """Row indices of ``alarms`` in ``direction`` whose key is in ``keys``."""
    mine = (alarms.direction == direction) & np.isin(alarms.keys, keys)
    return np.flatnonzero(mine)


def _evidence(close: PaneClose, alarms: CusumAlarms, i: int, budget: Budget) -> Evidence:
    change = int(alarms.change_pane[i])
    start = close.pane_starts.get(change)
    return Evidence(
        direction="up" if alarms.direction[i] > 0 else "down",
        reference_rate=Measure(
            float(alarms.ref_rate[i]), float(alarms.ref_low[i]), float(alarms.ref_high[i])
        ),
        recent_rate=Measure(
            float(alarms.recent_rate[i]),
            float(alarms.recent_low[i]),
            float(alarms.recent_high[i]),
        ),
        recent_transactions=int(alarms.recent_transactions[i]),
        statistic=float(alarms.statistic[i]),
        threshold=float(alarms.threshold),
        ratio=float(alarms.ratio[i]),
        change_pane=change,
        change_seq=None if start is None else int(start[0]),
        change_time=None if start is None else start[1],
        tests=budget.tests,
        level=budget.level,
        budget_per_million=budget.per_million,
    )


def _rule_measures(rule: Rule) -> dict[str, Measure]:
    return {
        "support": rule.support,
        "confidence": rule.confidence,
        "lift": rule.lift,
        "leverage": rule.leverage,
        "conviction": rule.conviction,
    }


def _rule_alert(
    kind: str, rule: Rule, close: PaneClose, evidence: Evidence, thresholds: Mapping[str, object]
) -> Alert:
    return Alert(
        id=alert_id(kind, rule.antecedent, rule.consequent, close.seq),
        kind=kind,
        seq=int(close.seq),
        event_time=close.event_time,
        pane=int(close.pane),
        items=rule.items,
        antecedent=rule.antecedent,
        consequent=rule.consequent,
        measures=_rule_measures(rule),
        p_value=rule.p_value,
        evidence=evidence,
        window=window_dict(close.window),
        thresholds=dict(thresholds),
    )


def _mark(rules: list[ListedRule], alert: Alert, *, emerged: bool) -> None:
    change = {"kind": alert.kind, "id": alert.id, "seq": alert.seq, "pane": alert.pane}
    for state in rules:
        state.announced = emerged
        state.faded = not emerged
        state.last_change = change


def _by_size(pairs: list[tuple[int, int]]) -> Keys:
    out: dict[int, list[int]] = {}
    for size, key in pairs:
        out.setdefault(size, []).append(key)
    return {k: np.unique(np.array(v, dtype=np.int64)) for k, v in out.items()}


class _RuleDetector:
    """What the rule detectors share: the family tolerance, and no state of their own (the
    rule list and the change tests hold it)."""

    def __init__(self, config: AlertsConfig) -> None:
        self.tolerance = float(config.family_lift_tolerance)

    def _eligible(self, close: PaneClose, rules: Iterable[Rule]) -> Keys:
        """Packed keys of the itemsets of ``rules`` that the change tests follow."""
        index = {name: i for i, name in enumerate(close.window.item_names)}
        pairs = []
        for rule in rules:
            key = close.key_of(rule.items, index)
            if key is not None and len(rule.items) in close.tracker.banks:
                pairs.append((len(rule.items), key))
        return _by_size(pairs)

    def keep(self, tracker: ChangeTracker) -> Keys:
        return {}

    def state_dict(self) -> dict[str, Any]:
        return {}

    def load_state(self, state: Mapping[str, Any]) -> None:
        return None

    def check_invariants(self) -> None:
        return None


# ---------------------------------------------------------------------------------------------
# emerged


class EmergedDetector(_RuleDetector):
    """Rules that now hold and whose co-purchase rate has risen."""

    kind = "emerged"

    def eligible(self, close: PaneClose) -> Keys:
        fresh = [
            rule
            for rule in close.entry
            if not any(s.announced for s in close.listing.over(rule.items))
        ]
        return self._eligible(close, fresh)

    def fire(
        self, close: PaneClose, keys: Keys, alarms: Mapping[int, CusumAlarms], budget: Budget
    ) -> list[Raised]:
        by_items: dict[tuple[str, ...], list[Rule]] = {}
        for rule in close.entry:
            by_items.setdefault(rule.items, []).append(rule)
        announced = [s.rule for s in close.listing.rules.values() if s.announced]
        found: list[tuple[int, int, int, Rule]] = []
        for size, wanted in sorted(keys.items()):
            got = alarms.get(size)
            if got is None or not wanted.size:
                continue
            for i in _rows(got, +1, wanted).tolist():
                items = close.names(size, int(got.keys[i]))
                rules = by_items.get(items)
                if rules:
                    found.append((size, int(got.keys[i]), i, first_of_family(rules)))
        out: list[Raised] = []
        thresholds = close.listing.thresholds(close.window)
        newly: list[Rule] = []
        for size, key, i, rule in sorted(found, key=lambda f: (f[0], f[3].key)):
            covered = rule_family_rep(rule, [*announced, *newly], self.tolerance)
            evidence = _evidence(close, alarms[size], i, budget)
            alert = _rule_alert(self.kind, rule, close, evidence, thresholds)
            _mark(close.listing.over(rule.items), alert, emerged=True)
            newly.append(rule)
            if covered is None:
                out.append(Raised(alert, size, key, "up"))
            else:  # a member of an announced family: tracked, not sent
                close.tracker.rebase(size, np.array([key]), "up")
        return out


# ---------------------------------------------------------------------------------------------
# faded


class FadedDetector(_RuleDetector):
    """Active rules whose co-purchase rate has fallen."""

    kind = "faded"

    def eligible(self, close: PaneClose) -> Keys:
        active = [s.rule for s in close.listing.rules.values() if s.active]
        return self._eligible(close, active)

    def fire(
        self, close: PaneClose, keys: Keys, alarms: Mapping[int, CusumAlarms], budget: Budget
    ) -> list[Raised]:
        found: list[tuple[int, int, int, list[ListedRule]]] = []
        for size, wanted in sorted(keys.items()):
            got = alarms.get(size)
            if got is None or not wanted.size:
                continue
            for i in _rows(got, -1, wanted).tolist():
                items = close.names(size, int(got.keys[i]))
                states = [s for s in close.listing.over(items) if s.active]
                if states:
                    found.append((size, int(got.keys[i]), i, states))
        out: list[Raised] = []
        thresholds = close.listing.thresholds(close.window)
        fading: list[Rule] = []
        for size, key, i, states in sorted(found, key=lambda f: (f[0], f[3][0].rule.key)):
            rule = first_of_family([s.rule for s in states])
            covered = rule_family_rep(rule, fading, self.tolerance)
            evidence = _evidence(close, alarms[size], i, budget)
            alert = _rule_alert(self.kind, rule, close, evidence, thresholds)
            _mark(states, alert, emerged=False)
            fading.append(rule)
            if covered is None:
                out.append(Raised(alert, size, key, "down"))
            else:
                close.tracker.rebase(size, np.array([key]), "down")
        return out


# ---------------------------------------------------------------------------------------------
# surged


@dataclass(slots=True)
class _Latch:
    pane: int
    growth_high: float


class SurgedDetector:
    """Itemsets bought together clearly more often than before.

    A surge of an itemset that is not an active rule is *latched*: its test keeps running
    (so the rule's ``emerged`` alert, when it comes, carries the evidence) and the itemset
    raises no second surge until the latch ends, one window later or when the rule emerges.
    """

    kind = "surged"

    def __init__(self, config: AlertsConfig, window_panes: int) -> None:
        self.tolerance = float(config.family_lift_tolerance)
        self.min_count = int(config.surge_min_count)
        self.min_lift = float(config.surge_min_lift)
        self.window_panes = int(window_panes)
        #: itemsets (sorted item ids) surging and followed until their rule emerges
        self.latched: dict[tuple[int, ...], _Latch] = {}

    def _latched_keys(self, tracker: ChangeTracker) -> Keys:
        return _by_size(
            [
                (len(ids), int(tracker.keys_of(np.array([ids], dtype=np.int32))[0]))
                for ids in self.latched
                if len(ids) in tracker.banks
            ]
        )

    def eligible(self, close: PaneClose) -> Keys:
        out: Keys = {}
        latched = self._latched_keys(close.tracker)
        for size, bank in close.tracker.banks.items():
            if not len(bank):
                continue
            rows = close.tracker.rows_of(bank.keys, size)
            lo, _ = close.recent.bounds_many(rows)
            busy = lo >= self.min_count
            if self.min_lift > 0 and busy.any():
                busy[busy] = recent_lift_low(close.recent, rows[busy], lo[busy]) >= self.min_lift
            keys = bank.keys[busy]
            held = latched.get(size)
            out[size] = keys[~np.isin(keys, held)] if held is not None else keys
        return out

    def expire(self, close: PaneClose) -> Keys:
        """End the latches older than a window, or whose itemset's rule emerged; returns their
        keys (the monitor restarts their tests)."""
        done = []
        names = close.window.item_names
        for ids, latch in list(self.latched.items()):
            items = tuple(sorted(names[i] for i in ids))
            emerged = any(s.announced for s in close.listing.over(items))
            if emerged or close.pane - latch.pane >= self.window_panes:
                del self.latched[ids]
                if len(ids) in close.tracker.banks:
                    key = int(close.tracker.keys_of(np.array([ids], dtype=np.int32))[0])
                    done.append((len(ids), key))
        return _by_size(done)

    def fire(
        self, close: PaneClose, keys: Keys, alarms: Mapping[int, CusumAlarms], budget: Budget
    ) -> list[Raised]:
        out: list[Raised] = []
        surging: list[tuple[tuple[str, ...], float]] = []
        names = close.window.item_names
        for ids, latch in self.latched.items():
            surging.append((tuple(sorted(names[i] for i in ids)), latch.growth_high))
        for size, wanted in sorted(keys.items()):
            got = alarms.get(size)
            if got is None or not wanted.size:
                continue
            for i in _rows(got, +1, wanted).tolist():
                key = int(got.keys[i])
                items = close.names(size, key)
                ev = _evidence(close, got, i, budget)
                ref = ev.reference_rate
                growth = Measure(
                    _ratio(ev.recent_rate.value, ref.value),
                    _ratio(ev.recent_rate.low, ref.high),
                    _ratio(ev.recent_rate.high, ref.low),
                )
                member = surge_family_rep(items, growth.low, surging, self.tolerance)
                surging.append((items, growth.high))
                active = [s for s in close.listing.over(items) if s.active]
                if active:
                    rebase: str | None = "up"  # an active rule's rate rose: the new normal
                else:
                    rebase = None  # follow it until its rule emerges
                    ids = close.tracker.rows_of(np.array([key]), size)[0]
                    self.latched[tuple(int(x) for x in ids)] = _Latch(close.pane, growth.high)
                if member is not None:
                    if rebase is not None:
                        close.tracker.rebase(size, np.array([key]), "up")
                    continue
                n = int(close.window.transactions)
                lo, hi = close.window.bounds_many(close.tracker.rows_of(np.array([key]), size))
                support = Measure(
                    float(lo[0]) / n if n else 0.0,
                    float(lo[0]) / n if n else 0.0,
                    float(min(hi[0], n)) / n if n else 0.0,
                )
                rule = first_of_family([s.rule for s in active]) if active else None
                alert = Alert(
                    id=alert_id(self.kind, items, (), close.seq),
                    kind=self.kind,
                    seq=int(close.seq),
                    event_time=close.event_time,
                    pane=int(close.pane),
                    items=items,
                    antecedent=None if rule is None else rule.antecedent,
                    consequent=None if rule is None else rule.consequent,
                    measures=_rule_measures(rule) if rule is not None else {"support": support},
                    p_value=None if rule is None else rule.p_value,
                    evidence=ev,
                    window=window_dict(close.window),
                    thresholds={
                        **close.listing.thresholds(close.window),
                        "surge_min_count": self.min_count,
                        "surge_min_lift": self.min_lift,
                    },
                )
                out.append(Raised(alert, size, key, rebase))
        return out

    def keep(self, tracker: ChangeTracker) -> Keys:
        return self._latched_keys(tracker)

    def remap(self, mapping: np.ndarray) -> None:
        """Renumber the latched itemsets' ids (the vocabulary was compacted)."""
        latched = {}
        for ids, latch in self.latched.items():
            new = tuple(int(mapping[i]) for i in ids)
            if min(new) >= 0:
                latched[new] = latch
        self.latched = latched

    def state_dict(self) -> dict[str, Any]:
        return {
            "latched": [
                [list(ids), latch.pane, latch.growth_high]
                for ids, latch in sorted(self.latched.items())
            ]
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        self.latched = {
            tuple(int(i) for i in ids): _Latch(int(p), float(g))
            for ids, p, g in state.get("latched", [])
        }

    def check_invariants(self) -> None:
        for ids, latch in self.latched.items():
            assert len(ids) >= 2 and list(ids) == sorted(set(ids)), "surge latch itemset"
            assert latch.pane >= 0, "surge latch pane"


def recent_lift_low(recent: WindowSnapshot, rows: np.ndarray, joint_low: np.ndarray) -> np.ndarray:
    """The lift of each itemset (``rows``, ascending item ids, one size >= 2) in the recent
    panes, counted conservatively: the largest over its single-item consequents ``i`` of
    ``n * c(S) / (c(S - i) * c(i))`` with the lower count of ``S`` (``joint_low``) and the
    upper counts of the parts, so counting error never raises it.

    Two items bought in 40 and 25 of 100 orders, together in 20: lift 100 * 20 / (40 * 25) = 2.

    >>> from streamcount.config.settings import EngineConfig
    >>> from streamcount.engine.engine import Engine
    >>> eng = Engine(EngineConfig(epsilon=0.0, window_size=100, pane_size=100, max_itemset_size=2))
    >>> _ = eng.add([["a", "b"]] * 20 + [["a"]] * 20 + [["b"]] * 5 + [["c"]] * 55)
    >>> snap = eng.snapshot()
    >>> recent_lift_low(snap, np.array([[0, 1]]), np.array([20])).tolist()
    [2.0]
    """
    n, k = rows.shape
    best = np.zeros(n)
    if not n or recent.transactions <= 0:
        return best
    for drop in range(k):
        rest = np.delete(rows, drop, axis=1)
        _, hi_rest = recent.bounds_many(rest)
        _, hi_item = recent.bounds_many(rows[:, drop : drop + 1])
        denom = hi_rest.astype(np.float64) * hi_item
        with np.errstate(divide="ignore", invalid="ignore"):
            lift = np.where(denom > 0, recent.transactions * joint_low / denom, 0.0)
        best = np.maximum(best, lift)
    return best


def _ratio(a: float, b: float) -> float:
    if b <= 0:
        return math.inf if a > 0 else 1.0
    return a / b
