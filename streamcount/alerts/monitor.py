"""Rule and itemset state over time, and the alerts raised when it changes.

:class:`RuleMonitor` is called once per pane close with the window's snapshot (and, for surges,
a *recent* snapshot and a *baseline* snapshot that excludes it). It keeps a small state per
rule and per itemset and returns :class:`Alert` records. Alerts are signals for a person to
review, not decisions.

Kinds
-----
``emerged``
    A rule ``X => Y`` passes every entry threshold of ``rules`` (:func:`derive_rules`:
    joint count, support, confidence, lift, significance; on the intervals' low ends when
    ``rules.conservative``) for ``confirm_evaluations`` evaluations in a row.
``faded``
    An active rule falls below the *exit* thresholds, each entry threshold times
    ``rules.exit_ratio`` (hysteresis; judged on the intervals' *high* ends when conservative,
    so a rule fades only when it has certainly weakened), for ``confirm_evaluations``
    evaluations in a row. Significance gates entry only. After fading, the rule may not emerge
    again for ``cooldown_evaluations`` evaluations.
``surged``
    An itemset (size >= 2) grows in the recent window over the baseline (Dong & Li 1999
    growth rate), judged conservatively: ``GR_lo = (L_R/N_R) / (max(U_B, 1)/N_B) >=
    alerts.growth_rate``, ``L_R >= alerts.surge_min_count``, and the one-sided Fisher test on
    ``[[L_R, N_R-L_R], [U_B, N_B-U_B]]`` gives ``p <= alerts.surge_max_p_value`` (``L`` lower,
    ``U`` upper count bounds; an itemset untracked in the baseline has ``U_B = max_error``).
    A surge resolves (silently) when ``GR_hi = (U_R/N_R) / (max(L_B, 1)/N_B)`` drops below
    ``growth_rate x exit_ratio`` (or ``U_R`` below ``surge_min_count x exit_ratio``); the same
    confirmation and cooldown rules apply per itemset.

Warm-up
-------
Until the first window is full (``warm=False``) the state is tracked as usual but no alert is
returned. The rules active when warm-up ends are the starting state: they are listed by
:attr:`RuleMonitor.active_rules` and counted in one INFO log line, never alerted as
``emerged`` (they do get a ``faded`` alert when they fade). Rules *near* their thresholds when
warm-up ends (passing the exit thresholds, judged on point values) are part of the starting
state too: as long as they keep passing the exit thresholds they are *primed*, and if one
crosses the entry thresholds it becomes active silently (listed, never alerted, neither on
entering nor on fading), since a rule hovering around a threshold is not a change in how
people shop. A primed rule that falls below the exit thresholds loses its priming, so a
real comeback later is alerted. Priming needs a warm-up: a monitor whose first evaluation
is already warm primes nothing.

Families (deduplication)
------------------------
A rule ``R'`` belongs to the *family* of an active rule ``R`` when ``R``'s itemset is contained
in ``R'``'s (a subset, or the same itemset split another way), ``R`` comes first in the family
order (fewer items, then fewer antecedent items, then by name) and ``R'`` brings no lift gain
beyond ``R``'s interval: ``lift_low(R') <= lift_high(R) x (1 + family_lift_tolerance)``. So
``X => Y`` and ``Y => X`` (equal lift) are one family, and so are a rule and its superset rules
without a lift gain. Only the family's *representative* (the first active rule in the family
order) alerts; a member is tracked and listed as active, but neither its ``emerged`` nor its
``faded`` alert is sent. Surges form families the same way: an itemset ``S`` is a member of an
active surge ``T`` when ``T`` is a proper subset of ``S`` and ``GR_lo(S) <= GR_hi(T) x (1 +
family_lift_tolerance)``.

Alert record
------------
:meth:`Alert.as_dict` matches ``streamcount/schemas/alert.schema.json``: ``id`` (first 16 hex
digits of SHA-256 over kind, antecedent, consequent (or items) and seq: stable, so a sink may
deduplicate on it), ``kind``, ``seq``, ``event_time``, ``items``, ``antecedent`` and
``consequent`` (``null`` for ``surged``), ``measures`` (``{value, low, high}`` for support,
confidence, lift, leverage and conviction; a ``surged`` alert carries the recent support
only), ``p_value``, ``growth_rate`` (``{value, low, high}`` for ``surged``, else ``null``),
``window`` and ``baseline`` (``{first_seq, last_seq, transactions, max_error}``) and
``thresholds`` (the thresholds that fired). Infinite numbers (conviction of a rule with
confidence 1, an unbounded growth rate) are written as ``null``: JSON has no infinity.

References
----------
Dong, G. & Li, J. Efficient mining of emerging patterns: discovering trends and differences.
KDD 1999.
"""

from __future__ import annotations

import hashlib
import json
import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Protocol

import numpy as np

from streamcount.config.settings import AlertsConfig, RulesConfig
from streamcount.engine.keys import pack
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import CheckpointError, ConfigError
from streamcount.rules.derive import (
    Rule,
    at_least,
    derive_rules,
    joint_count_threshold,
    measure_rules,
)
from streamcount.rules.measures import CountBounds, Measure, fisher_greater

__all__ = ["ALERT_KINDS", "Alert", "RuleMonitor", "Surge", "alert_id"]

logger = logging.getLogger(__name__)

ALERT_KINDS: tuple[str, ...] = ("emerged", "faded", "surged")

_STATE_VERSION = 1
#: cap on the rules remembered as near their thresholds at the end of warm-up
_PRIMED_MAX_RULES = 100_000

RuleKey = tuple[tuple[str, ...], tuple[str, ...]]


class _WindowSource(Protocol):
    """What :meth:`RuleMonitor.evaluate_close` needs of the engine (no import of it here)."""

    @property
    def window_full(self) -> bool: ...

    def snapshot(self, *, newest: int | None = None, skip_newest: int = 0) -> WindowSnapshot: ...

    def split_snapshot(
        self, recent_panes: int
    ) -> tuple[WindowSnapshot, WindowSnapshot, WindowSnapshot]: ...


def _window_dict(snapshot: WindowSnapshot) -> dict[str, int]:
    return {
        "first_seq": int(snapshot.first_seq),
        "last_seq": int(snapshot.last_seq),
        "transactions": int(snapshot.transactions),
        "max_error": int(snapshot.max_error),
    }


def alert_id(kind: str, antecedent: Sequence[str], consequent: Sequence[str], seq: int) -> str:
    """Stable alert id: first 16 hex digits of SHA-256 over kind, antecedent, consequent, seq.

    >>> alert_id("emerged", ["tea"], ["scone"], 7) == alert_id("emerged", ["tea"], ["scone"], 7)
    True
    """
    payload = json.dumps([kind, list(antecedent), list(consequent), int(seq)])
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()[:16]


def _num(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


@dataclass(frozen=True, slots=True)
class Alert:
    """One alert record (see the module docstring for the fields)."""

    id: str
    kind: str
    seq: int
    event_time: float | None
    items: tuple[str, ...]
    antecedent: tuple[str, ...] | None
    consequent: tuple[str, ...] | None
    measures: Mapping[str, Measure]
    p_value: float | None
    growth_rate: Measure | None
    window: Mapping[str, int]
    baseline: Mapping[str, int] | None
    thresholds: Mapping[str, object]

    def as_dict(self) -> dict[str, object]:
        """The JSON record (``alert.schema.json``)."""
        return {
            "id": self.id,
            "kind": self.kind,
            "seq": self.seq,
            "event_time": self.event_time,
            "items": list(self.items),
            "antecedent": None if self.antecedent is None else list(self.antecedent),
            "consequent": None if self.consequent is None else list(self.consequent),
            "measures": {name: m.as_dict() for name, m in self.measures.items()},
            "p_value": _num(self.p_value),
            "growth_rate": None if self.growth_rate is None else self.growth_rate.as_dict(),
            "window": dict(self.window),
            "baseline": None if self.baseline is None else dict(self.baseline),
            "thresholds": dict(self.thresholds),
        }


@dataclass(frozen=True, slots=True)
class Surge:
    """One itemset's growth from the baseline to the recent window, with bounds."""

    items: tuple[str, ...]
    recent_count: CountBounds
    baseline_count: CountBounds
    support: Measure
    growth_rate: Measure
    p_value: float | None
    window: Mapping[str, int]
    baseline: Mapping[str, int]

    def as_dict(self) -> dict[str, object]:
        return {
            "items": list(self.items),
            "recent_count": self.recent_count.as_dict(),
            "baseline_count": self.baseline_count.as_dict(),
            "support": self.support.as_dict(),
            "growth_rate": self.growth_rate.as_dict(),
            "p_value": _num(self.p_value),
            "window": dict(self.window),
            "baseline": dict(self.baseline),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, object]) -> Surge:
        rc: dict[str, int] = d["recent_count"]  # type: ignore[assignment]
        bc: dict[str, int] = d["baseline_count"]  # type: ignore[assignment]
        p = d.get("p_value")
        return cls(
            tuple(d["items"]),  # type: ignore[arg-type]
            CountBounds(int(rc["low"]), int(rc["high"])),
            CountBounds(int(bc["low"]), int(bc["high"])),
            Measure.from_dict(d["support"]),  # type: ignore[arg-type]
            Measure.from_dict(d["growth_rate"]),  # type: ignore[arg-type]
            None if p is None else float(p),  # type: ignore[arg-type]
            dict(d["window"]),  # type: ignore[call-overload]
            dict(d["baseline"]),  # type: ignore[call-overload]
        )


@dataclass(slots=True)
class _State:
    """Per rule or itemset: confirmed state, consecutive disagreeing evaluations, cooldown."""

    active: bool = False
    pending: int = 0
    cooldown: int = 0
    announced: bool = False
    latest: Rule | Surge | None = field(default=None)

    def idle(self) -> bool:
        return not self.active and self.pending == 0 and self.cooldown == 0

    def step(self, enter: bool, holds: bool, confirm: int, cooldown: int) -> str | None:
        """Advance one evaluation; returns ``"enter"``, ``"exit"`` or ``None``.

        ``enter``: the entry condition holds now; ``holds``: the exit thresholds still hold.
        """
        if self.active:
            if holds:
                self.pending = 0
                return None
            self.pending += 1
            if self.pending >= confirm:
                self.active, self.pending, self.cooldown = False, 0, cooldown
                return "exit"
            return None
        if self.cooldown > 0:
            self.cooldown -= 1
            self.pending = 0
            return None
        if not enter:
            self.pending = 0
            return None
        self.pending += 1
        if self.pending >= confirm:
            self.active, self.pending = True, 0
            return "enter"
        return None


def _translate(rows: np.ndarray, src: Sequence[str], dst: Sequence[str]) -> np.ndarray:
    """Item-id rows of vocabulary ``src`` in vocabulary ``dst``; -1 for an unknown name.

    Snapshots of one engine share a growing vocabulary, so one is usually a prefix of the
    other and ids carry over unchanged (ids past the shorter one's end are unknown).
    """
    if src is dst:
        return rows
    common = min(len(src), len(dst))
    if list(src[:common]) == list(dst[:common]):
        out = rows.copy()
        out[rows >= len(dst)] = -1
        return out
    index = {name: i for i, name in enumerate(dst)}
    table = np.array([index.get(name, -1) for name in src], dtype=np.int32)
    out = table[rows] if rows.size else rows
    return np.sort(out, axis=1)


def _bounds_by_rows(snapshot: WindowSnapshot, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``bounds_many`` that tolerates -1 ids (unknown names: ``(0, max_error)``)."""
    low = np.zeros(rows.shape[0], dtype=np.int64)
    high = np.full(rows.shape[0], int(snapshot.max_error), dtype=np.int64)
    if rows.shape[0] == 0 or rows.shape[1] > snapshot.max_itemset_size:
        return low, high
    ok = (rows >= 0).all(axis=1)
    if ok.any():
        lo, hi = snapshot.bounds_many(rows[ok])
        low[ok], high[ok] = lo, hi
    return low, high


class RuleMonitor:
    """Follows rules and itemsets from pane to pane and returns alerts when they change.

    Parameters
    ----------
    rules:
        Entry thresholds, ``exit_ratio``, ``confirm_evaluations``, ``cooldown_evaluations``.
    alerts:
        Surge settings (``surge``, ``growth_rate``, ``surge_min_count``,
        ``surge_max_p_value``).
    family_lift_tolerance:
        Relative lift (or growth-rate) gain a superset must exceed to be alerted apart from its
        family's representative (see the module docstring); ``None`` takes
        ``alerts.family_lift_tolerance``.

    Notes
    -----
    Cost per evaluation: one :func:`derive_rules` on the window, one vectorised
    :func:`measure_rules` for the active rules that left the entry set, and for surges one
    vectorised pass over the recent window's tracked itemsets; Python work is proportional to
    the rules kept (``max_rules``) and the followed states.
    """

    def __init__(
        self,
        rules: RulesConfig,
        alerts: AlertsConfig,
        *,
        family_lift_tolerance: float | None = None,
    ) -> None:
        if family_lift_tolerance is None:
            family_lift_tolerance = alerts.family_lift_tolerance
        if not 0.0 < rules.exit_ratio <= 1.0:
            raise ConfigError("rules.exit_ratio", rules.exit_ratio, "must be in (0, 1]")
        if rules.confirm_evaluations < 1:
            raise ConfigError(
                "rules.confirm_evaluations", rules.confirm_evaluations, "must be at least 1"
            )
        if rules.cooldown_evaluations < 0:
            raise ConfigError(
                "rules.cooldown_evaluations", rules.cooldown_evaluations, "must be at least 0"
            )
        if family_lift_tolerance < 0:
            raise ConfigError(
                "alerts.family_lift_tolerance", family_lift_tolerance, "must be at least 0"
            )
        self.rules_config = rules
        self.alerts_config = alerts
        self.family_lift_tolerance = float(family_lift_tolerance)
        self._rules: dict[RuleKey, _State] = {}
        self._surges: dict[tuple[str, ...], _State] = {}
        self._evaluations = 0
        self._warm_done = False
        #: rules near their thresholds since warm-up: their activation is not news (see below)
        self._primed: set[RuleKey] = set()

    # ------------------------------------------------------------------ views
    @property
    def evaluations(self) -> int:
        """Evaluations so far (pane closes seen)."""
        return self._evaluations

    @property
    def active_rules(self) -> list[Rule]:
        """Active rules with their latest measures, best lift (low end) first."""
        out = [s.latest for s in self._rules.values() if s.active and isinstance(s.latest, Rule)]
        out.sort(key=lambda r: (-r.lift.low, -r.lift.value, r.antecedent, r.consequent))
        return out

    @property
    def active_surges(self) -> list[Surge]:
        """Itemsets currently surging, largest growth rate (low end) first."""
        out = [s.latest for s in self._surges.values() if s.active and isinstance(s.latest, Surge)]
        out.sort(key=lambda g: (-g.growth_rate.low, g.items))
        return out

    # ------------------------------------------------------------------ evaluation
    def evaluate_close(
        self, engine: _WindowSource, *, recent_panes: int
    ) -> tuple[list[Alert], WindowSnapshot]:
        """:meth:`evaluate` on an engine right after a pane closed: its whole window, the
        ``recent_panes`` newest panes and the rest of the window as the baseline (those two
        only when surges are on). Returns the alerts and the window evaluated."""
        if self.alerts_config.surge:
            window, recent, baseline = engine.split_snapshot(recent_panes)
        else:
            window, recent, baseline = engine.snapshot(), None, None
        alerts = self.evaluate(
            window,
            recent=recent,
            baseline=baseline,
            seq=window.last_seq,
            event_time=window.last_ts,
            warm=engine.window_full,
        )
        return alerts, window

    def evaluate(
        self,
        window: WindowSnapshot,
        *,
        recent: WindowSnapshot | None = None,
        baseline: WindowSnapshot | None = None,
        seq: int,
        event_time: float | None = None,
        warm: bool = True,
    ) -> list[Alert]:
        """Update every state from this pane close and return the alerts it raises.

        Parameters
        ----------
        window:
            The whole window.
        recent, baseline:
            The recent panes and the rest of the window (excluding ``recent``); surges are
            skipped when either is missing or empty, or when ``alerts.surge`` is off.
        seq:
            Sequence number of the evaluation (written into the alerts and their ids).
        event_time:
            Event time of the pane close, if known.
        warm:
            False until the first window is full: states advance, no alert is returned.
        """
        self._evaluations += 1
        if warm and not self._warm_done:
            # prime only after a warm-up was seen: with none, nothing is "already there"
            self._finish_warmup(seq, window, prime=self._evaluations > 1)
        out = self._evaluate_rules(window, seq, event_time, warm)
        if (
            self.alerts_config.surge
            and recent is not None
            and baseline is not None
            and recent.transactions > 0
            and baseline.transactions > 0
        ):
            out.extend(self._evaluate_surges(recent, baseline, seq, event_time, warm))
        if out:
            logger.debug("evaluation %d (seq %d): %d alerts", self._evaluations, seq, len(out))
        return out

    def _finish_warmup(self, seq: int, window: WindowSnapshot, *, prime: bool) -> None:
        self._warm_done = True
        cfg = self.rules_config
        ratio = cfg.exit_ratio
        near = replace(
            cfg,
            min_support=cfg.min_support * ratio,
            min_confidence=cfg.min_confidence * ratio,
            min_lift=cfg.min_lift * ratio,
            max_p_value=None,
            max_rules=_PRIMED_MAX_RULES,
        )
        min_count = math.ceil(joint_count_threshold(window, cfg) * ratio)
        if prime:
            self._primed = {r.key for r in derive_rules(window, near, min_count=min_count)}
        rules = {k: s for k, s in self._rules.items() if s.active}
        for state in rules.values():  # all start together: the family order decides
            rep = self._rule_family_rep(state.latest, rules, frozenset(rules))  # type: ignore[arg-type]
            state.announced = rep is None
        surges = {k: s for k, s in self._surges.items() if s.active}
        for state in surges.values():
            state.announced = self._surge_family_rep(state.latest, surges) is None  # type: ignore[arg-type]
        logger.info(
            "alert warm-up over at seq %d: %d rules and %d surges active, %d rules near "
            "their thresholds (starting state, not alerted)",
            seq,
            sum(s.active for s in self._rules.values()),
            sum(s.active for s in self._surges.values()),
            len(self._primed),
        )

    def _rule_family_rep(
        self,
        rule: Rule,
        active: Mapping[RuleKey, _State],
        newly: frozenset[RuleKey] = frozenset(),
    ) -> RuleKey | None:
        """The representative of ``rule``'s family among the ``active`` rules, or ``None``.

        Another active rule represents ``rule`` when its itemset is contained in ``rule``'s
        (the same itemset split another way, or a subset), it comes first in the family order
        (fewer items, then fewer antecedent items, then by name), and ``rule`` shows no lift
        gain beyond it. ``X => Y`` and ``Y => X`` have the same lift, so the two directions of
        a rule always share a family. The family order only decides between rules that become
        active together (``newly``): a rule already active represents one that joins later.
        """
        items = set(rule.items)
        tol = 1.0 + self.family_lift_tolerance
        rank = (len(rule.items), len(rule.antecedent), rule.key)
        best: RuleKey | None = None
        best_rank: tuple[int, int, RuleKey] | None = None
        for key, state in active.items():
            other = state.latest
            if not isinstance(other, Rule) or key == rule.key:
                continue
            other_rank = (len(other.items), len(other.antecedent), key)
            if not set(other.items) <= items:
                continue
            if other_rank >= rank and (key in newly or len(other.items) > len(rule.items)):
                continue
            if rule.lift.low <= other.lift.high * tol and (
                best_rank is None or other_rank < best_rank
            ):
                best, best_rank = key, other_rank
        return best

    def _surge_family_rep(
        self, surge: Surge, active: Mapping[tuple[str, ...], _State]
    ) -> tuple[str, ...] | None:
        items = set(surge.items)
        tol = 1.0 + self.family_lift_tolerance
        best: tuple[str, ...] | None = None
        for key, state in active.items():
            other = state.latest
            if not isinstance(other, Surge) or not set(key) < items:
                continue
            if surge.growth_rate.low <= other.growth_rate.high * tol and (
                best is None or (len(key), key) < (len(best), best)
            ):
                best = key
        return best

    def _exit_holds(self, rule: Rule, min_count: int) -> bool:
        cfg = self.rules_config
        ratio = cfg.exit_ratio
        if cfg.conservative:
            count, sup = rule.joint_count.high, rule.support.high
            conf, lift = rule.confidence.high, rule.lift.high
        else:
            count, sup = rule.joint_count.low, rule.support.value
            conf, lift = rule.confidence.value, rule.lift.value
        return bool(
            at_least(count, min_count * ratio)
            and at_least(sup, cfg.min_support * ratio)
            and at_least(conf, cfg.min_confidence * ratio)
            and at_least(lift, cfg.min_lift * ratio)
        )

    def _rule_thresholds(self, window: WindowSnapshot, kind: str) -> dict[str, object]:
        cfg = self.rules_config
        ratio = 1.0 if kind == "emerged" else cfg.exit_ratio
        out: dict[str, object] = {
            "min_count": math.ceil(joint_count_threshold(window, cfg) * ratio),
            "min_support": cfg.min_support * ratio,
            "min_confidence": cfg.min_confidence * ratio,
            "min_lift": cfg.min_lift * ratio,
            "conservative": cfg.conservative,
            "confirm_evaluations": cfg.confirm_evaluations,
        }
        if kind == "emerged":
            out["significance"] = cfg.significance
            out["max_p_value"] = cfg.max_p_value
        else:
            out["exit_ratio"] = cfg.exit_ratio
        return out

    def _rule_alert(
        self, kind: str, rule: Rule, window: WindowSnapshot, seq: int, event_time: float | None
    ) -> Alert:
        return Alert(
            id=alert_id(kind, rule.antecedent, rule.consequent, seq),
            kind=kind,
            seq=int(seq),
            event_time=None if event_time is None else float(event_time),
            items=rule.items,
            antecedent=rule.antecedent,
            consequent=rule.consequent,
            measures={
                "support": rule.support,
                "confidence": rule.confidence,
                "lift": rule.lift,
                "leverage": rule.leverage,
                "conviction": rule.conviction,
            },
            p_value=rule.p_value,
            growth_rate=None,
            window=_window_dict(window),
            baseline=None,
            thresholds=self._rule_thresholds(window, kind),
        )

    def _evaluate_rules(
        self, window: WindowSnapshot, seq: int, event_time: float | None, warm: bool
    ) -> list[Alert]:
        cfg = self.rules_config
        entry = {r.key: r for r in derive_rules(window, cfg)}
        follow = [k for k, s in self._rules.items() if s.active and k not in entry]
        measured = {r.key: r for r in measure_rules(window, follow, config=cfg)}
        min_count = joint_count_threshold(window, cfg)

        emerged: list[RuleKey] = []
        faded: list[RuleKey] = []
        for key in list(dict.fromkeys([*self._rules, *entry])):
            state = self._rules.get(key) or _State()
            rule = entry.get(key) or measured.get(key)
            holds = key in entry or (rule is not None and self._exit_holds(rule, min_count))
            change = state.step(
                key in entry, holds, cfg.confirm_evaluations, cfg.cooldown_evaluations
            )
            if rule is not None:
                state.latest = rule
            if change == "enter":
                emerged.append(key)
            elif change == "exit":
                faded.append(key)
            if state.idle() and change is None:
                self._rules.pop(key, None)
            else:
                self._rules[key] = state

        if self._primed and self._warm_done:
            # a primed rule stays primed while it keeps passing the exit thresholds
            stays = {k for k in self._primed if k in entry}
            rest = [k for k in self._primed if k not in entry]
            stays.update(
                r.key
                for r in measure_rules(window, rest, config=cfg)
                if self._exit_holds(r, min_count)
            )
            self._primed = stays

        out: list[Alert] = []
        for key in sorted(faded):
            state = self._rules[key]
            if warm and state.announced:
                out.append(self._rule_alert("faded", state.latest, window, seq, event_time))  # type: ignore[arg-type]
            state.announced = False
            if state.idle() and cfg.cooldown_evaluations == 0:
                self._rules.pop(key, None)
        active = {k: s for k, s in self._rules.items() if s.active}
        for key in sorted(emerged, key=lambda k: (len(k[0]), k)):
            state = self._rules[key]
            rep = self._rule_family_rep(  # type: ignore[arg-type]
                state.latest, active, frozenset(emerged)
            )
            state.announced = warm and rep is None and key not in self._primed
            if state.announced:
                out.append(self._rule_alert("emerged", state.latest, window, seq, event_time))  # type: ignore[arg-type]
        return out

    # ------------------------------------------------------------------ surges
    def _measure_surges(
        self,
        recent: WindowSnapshot,
        baseline: WindowSnapshot,
        extra: Sequence[tuple[str, ...]],
    ) -> list[tuple[Surge, bool, bool]]:
        """``(surge, enter, holds)`` for the recent window's candidates and ``extra`` itemsets."""
        cfg = self.alerts_config
        ratio = self.rules_config.exit_ratio
        n_r, n_b = int(recent.transactions), int(baseline.transactions)
        index = {name: i for i, name in enumerate(recent.item_names)}
        groups: dict[int, list[np.ndarray]] = {}
        for level in recent.levels[1:]:
            if len(level):
                sel = level.count >= cfg.surge_min_count
                if sel.any():
                    groups.setdefault(level.size, []).append(level.items[sel])
        followed: dict[int, list[list[int]]] = {}
        for items in extra:
            if len(items) > recent.max_itemset_size or any(i not in index for i in items):
                continue  # unknown to recent: not measured, so its surge does not hold
            followed.setdefault(len(items), []).append(sorted(index[i] for i in items))
        for size, id_rows in followed.items():
            groups.setdefault(size, []).append(np.array(id_rows, dtype=np.int32))

        out: list[tuple[Surge, bool, bool]] = []
        names = recent.item_names
        for size, blocks in sorted(groups.items()):
            rows = np.unique(np.concatenate(blocks), axis=0)
            is_followed = np.zeros(rows.shape[0], dtype=bool)
            if size in followed:
                radix = int(rows.max()) + 1
                is_followed = np.isin(
                    pack(rows, radix), pack(np.array(followed[size], dtype=np.int32), radix)
                )
            lr, ur = recent.bounds_many(rows)
            lb, ub = _bounds_by_rows(baseline, _translate(rows, names, baseline.item_names))
            ur = np.minimum(ur, n_r)
            ub = np.minimum(ub, n_b)
            gr_lo = (lr / n_r) / (np.maximum(ub, 1) / n_b)
            gr_hi = (ur / n_r) / (np.maximum(lb, 1) / n_b)
            gr_val = (lr / n_r) / (np.maximum(lb, 1) / n_b)
            candidate = at_least(gr_lo, cfg.growth_rate) & (lr >= cfg.surge_min_count)
            holds = at_least(gr_hi, cfg.growth_rate * ratio) & at_least(
                ur, cfg.surge_min_count * ratio
            )
            # Python work only for growth candidates and followed itemsets
            for i in np.flatnonzero(candidate | is_followed).tolist():
                items = tuple(sorted(names[j] for j in rows[i].tolist()))
                p: float | None = None
                enter = bool(candidate[i])
                if enter:
                    p = fisher_greater(n_r + n_b, int(lr[i]), n_r, int(lr[i] + ub[i]))
                    enter = p <= cfg.surge_max_p_value
                surge = Surge(
                    items,
                    CountBounds(int(lr[i]), int(ur[i])),
                    CountBounds(int(lb[i]), int(ub[i])),
                    Measure(lr[i] / n_r, lr[i] / n_r, ur[i] / n_r),
                    Measure(float(gr_val[i]), float(gr_lo[i]), float(gr_hi[i])),
                    p,
                    _window_dict(recent),
                    _window_dict(baseline),
                )
                out.append((surge, enter, bool(holds[i])))
        return out

    def _surge_alert(self, surge: Surge, seq: int, event_time: float | None) -> Alert:
        cfg = self.alerts_config
        return Alert(
            id=alert_id("surged", surge.items, (), seq),
            kind="surged",
            seq=int(seq),
            event_time=None if event_time is None else float(event_time),
            items=surge.items,
            antecedent=None,
            consequent=None,
            measures={"support": surge.support},
            p_value=surge.p_value,
            growth_rate=surge.growth_rate,
            window=surge.window,
            baseline=surge.baseline,
            thresholds={
                "growth_rate": cfg.growth_rate,
                "surge_min_count": cfg.surge_min_count,
                "surge_max_p_value": cfg.surge_max_p_value,
                "confirm_evaluations": self.rules_config.confirm_evaluations,
            },
        )

    def _evaluate_surges(
        self,
        recent: WindowSnapshot,
        baseline: WindowSnapshot,
        seq: int,
        event_time: float | None,
        warm: bool,
    ) -> list[Alert]:
        rc = self.rules_config
        followed = [k for k, s in self._surges.items() if not s.idle()]
        measured = {
            s.items: (s, e, h) for s, e, h in self._measure_surges(recent, baseline, followed)
        }
        started: list[tuple[str, ...]] = []
        for key in list(dict.fromkeys([*self._surges, *measured])):
            state = self._surges.get(key) or _State()
            surge, enter, holds = measured.get(key, (None, False, False))
            change = state.step(enter, holds, rc.confirm_evaluations, rc.cooldown_evaluations)
            if surge is not None:
                state.latest = surge
            if change == "enter":
                started.append(key)
            elif change == "exit":
                state.announced = False
            if state.idle():
                self._surges.pop(key, None)
            else:
                self._surges[key] = state
        out: list[Alert] = []
        active = {k: s for k, s in self._surges.items() if s.active}
        for key in sorted(started, key=lambda k: (len(k), k)):
            state = self._surges[key]
            rep = self._surge_family_rep(state.latest, active)  # type: ignore[arg-type]
            state.announced = warm and rep is None
            if state.announced:
                out.append(self._surge_alert(state.latest, seq, event_time))  # type: ignore[arg-type]
        return out

    # ------------------------------------------------------------------ checkpoints
    def state_dict(self) -> dict[str, object]:
        """JSON-able state (states, pending counters, cooldowns, latest measures)."""

        def enc(state: _State) -> dict[str, object]:
            return {
                "active": state.active,
                "pending": state.pending,
                "cooldown": state.cooldown,
                "announced": state.announced,
                "latest": None if state.latest is None else state.latest.as_dict(),
            }

        return {
            "version": _STATE_VERSION,
            "evaluations": self._evaluations,
            "warm_done": self._warm_done,
            "rules": [
                {"antecedent": list(k[0]), "consequent": list(k[1]), **enc(s)}
                for k, s in sorted(self._rules.items())
            ],
            "surges": [{"items": list(k), **enc(s)} for k, s in sorted(self._surges.items())],
            "primed": [[list(k[0]), list(k[1])] for k in sorted(self._primed)],
        }

    def load_state(self, d: Mapping[str, object]) -> None:
        """Restore what :meth:`state_dict` wrote; :class:`CheckpointError` when unusable."""
        if not isinstance(d, Mapping) or d.get("version") != _STATE_VERSION:
            found = d.get("version") if isinstance(d, Mapping) else type(d).__name__
            raise CheckpointError(
                f"alert monitor state: version {found!r} is not {_STATE_VERSION}; "
                "start without the checkpoint or use a matching streamcount version"
            )
        try:
            rules: dict[RuleKey, _State] = {}
            for e in d["rules"]:  # type: ignore[attr-defined]
                key = (tuple(e["antecedent"]), tuple(e["consequent"]))
                latest = None if e["latest"] is None else Rule.from_dict(e["latest"])
                rules[key] = _State(
                    bool(e["active"]),
                    int(e["pending"]),
                    int(e["cooldown"]),
                    bool(e["announced"]),
                    latest,
                )
            surges: dict[tuple[str, ...], _State] = {}
            for e in d["surges"]:  # type: ignore[attr-defined]
                latest_s = None if e["latest"] is None else Surge.from_dict(e["latest"])
                surges[tuple(e["items"])] = _State(
                    bool(e["active"]),
                    int(e["pending"]),
                    int(e["cooldown"]),
                    bool(e["announced"]),
                    latest_s,
                )
            evaluations = int(d["evaluations"])  # type: ignore[call-overload]
            warm_done = bool(d["warm_done"])
            primed = {(tuple(a), tuple(c)) for a, c in d.get("primed", [])}  # type: ignore[attr-defined]
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"alert monitor state is malformed: {exc!r}") from exc
        self._rules, self._surges = rules, surges
        self._evaluations, self._warm_done = evaluations, warm_done
        self._primed = primed
