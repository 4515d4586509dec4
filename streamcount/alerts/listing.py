"""The list of active rules: the rules that hold on the window, with hysteresis.

A rule joins the list when it passes every entry threshold of ``rules`` at a pane close
(:func:`~streamcount.rules.derive.derive_rules`: the practical floor people configure) and
stays while it passes the exit thresholds (each entry threshold times ``rules.exit_ratio``,
judged on the intervals' high ends when conservative), so a rule near a threshold does not
flap in and out of the list. Joining or leaving the list is *not* an alert: a threshold
crossing of a noisy estimate is not a change in how people shop. Alerts come from the change
detectors (:mod:`.detectors`), which read and annotate this list: when a rule emerged, when its
rate fell (a faded rule leaves the list until it has dropped below the exit thresholds or
emerges again), and the evidence of its last change.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

from streamcount.config.settings import RulesConfig
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import CheckpointError
from streamcount.rules.derive import (
    Rule,
    at_least,
    derive_rules,
    joint_count_threshold,
    measure_rules,
)

__all__ = ["ListedRule", "RuleKey", "RuleListing"]

RuleKey = tuple[tuple[str, ...], tuple[str, ...]]


@dataclass(slots=True)
class ListedRule:
    """One rule the listing follows.

    Attributes
    ----------
    rule:
        Its latest measures.
    listed:
        It holds on the window now (entry thresholds, or exit thresholds once listed).
    since_seq, since_pane:
        When it joined the list (the window's last sequence number and the pane index).
    announced:
        An ``emerged`` alert was sent for it (or for its family) and it has not faded since.
    faded:
        A ``faded`` alert was sent; it stays off the list until it drops below the exit
        thresholds or emerges again.
    last_change:
        The record of its last alert (kind, id, seq), or ``None``.
    """

    rule: Rule
    listed: bool = False
    since_seq: int = 0
    since_pane: int = 0
    announced: bool = False
    faded: bool = False
    last_change: dict[str, object] | None = field(default=None)

    @property
    def active(self) -> bool:
        """Shown as active: listed and not faded."""
        return self.listed and not self.faded


class RuleListing:
    """The rules that hold on the window, updated at each pane close."""

    def __init__(self, config: RulesConfig) -> None:
        self.config = config
        self.rules: dict[RuleKey, ListedRule] = {}

    def _exit_holds(self, rule: Rule, min_count: int) -> bool:
        cfg = self.config
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

    def update(self, window: WindowSnapshot, *, seq: int, pane: int) -> list[Rule]:
        """Re-derive the rules on ``window``; returns the entry set (rules passing every entry
        threshold now)."""
        entry = derive_rules(window, self.config)
        by_key = {r.key: r for r in entry}
        follow = [k for k, s in self.rules.items() if k not in by_key and (s.listed or s.faded)]
        measured = {r.key: r for r in measure_rules(window, follow, config=self.config)}
        min_count = joint_count_threshold(window, self.config)
        for key, rule in by_key.items():
            state = self.rules.get(key)
            if state is None:
                self.rules[key] = ListedRule(rule, True, seq, pane)
                continue
            state.rule = rule
            if not state.listed:
                state.listed, state.since_seq, state.since_pane = True, seq, pane
        for key in follow:
            state = self.rules[key]
            rule = measured[key]
            state.rule = rule
            if not self._exit_holds(rule, min_count):
                # below the exit thresholds: no longer a rule; it may emerge again later
                del self.rules[key]
        return entry

    # -- views --------------------------------------------------------------------------------

    def active(self) -> list[ListedRule]:
        """Rules shown as active, best lift (low end) first."""
        out = [s for s in self.rules.values() if s.active]
        out.sort(key=lambda s: (-s.rule.lift.low, -s.rule.lift.value, s.rule.key))
        return out

    def over(self, items: Iterable[str]) -> list[ListedRule]:
        """Followed rules whose itemset is exactly ``items``."""
        wanted = tuple(sorted(items))
        return [s for s in self.rules.values() if s.rule.items == wanted]

    def thresholds(self, window: WindowSnapshot) -> dict[str, object]:
        """The rule thresholds in force, for alert records."""
        cfg = self.config
        return {
            "min_count": joint_count_threshold(window, cfg),
            "min_support": cfg.min_support,
            "min_confidence": cfg.min_confidence,
            "min_lift": cfg.min_lift,
            "conservative": cfg.conservative,
            "significance": cfg.significance,
            "max_p_value": cfg.max_p_value,
            "exit_ratio": cfg.exit_ratio,
        }

    # -- persistence --------------------------------------------------------------------------

    def state_dict(self) -> list[dict[str, object]]:
        return [
            {
                "rule": s.rule.as_dict(),
                "listed": s.listed,
                "since_seq": s.since_seq,
                "since_pane": s.since_pane,
                "announced": s.announced,
                "faded": s.faded,
                "last_change": s.last_change,
            }
            for _, s in sorted(self.rules.items())
        ]

    def load_state(self, entries: Iterable[Mapping[str, Any]]) -> None:
        rules: dict[RuleKey, ListedRule] = {}
        try:
            for e in entries:
                rule = Rule.from_dict(e["rule"])
                rules[rule.key] = ListedRule(
                    rule,
                    bool(e["listed"]),
                    int(e["since_seq"]),
                    int(e["since_pane"]),
                    bool(e["announced"]),
                    bool(e["faded"]),
                    e.get("last_change"),
                )
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"rule listing state is malformed: {exc!r}") from exc
        self.rules = rules

    def check_invariants(self) -> None:
        for key, s in self.rules.items():
            assert s.rule.key == key, "listing key"
            assert not (s.faded and s.announced), f"{key}: faded and announced"
            assert s.listed or s.faded or s.announced, f"{key}: followed for nothing"
            assert math.isfinite(s.rule.support.value), f"{key}: support"
