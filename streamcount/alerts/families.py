"""Rule and itemset families: one alert per family.

A rule ``R'`` belongs to the *family* of another rule ``R`` when ``R``'s itemset is contained in
``R'``'s (the same itemset split another way, or a subset), ``R`` comes first in the family
order (fewer items, then fewer antecedent items, then by name) and ``R'`` brings no lift gain
beyond ``R``'s interval: ``lift_low(R') <= lift_high(R) x (1 + family_lift_tolerance)``. So
``X => Y`` and ``Y => X`` (equal lift) are one family, and so are a rule and its superset rules
without a lift gain. Only a family's representative alerts. Surges form families the same way
on the growth of their rate: an itemset ``S`` is a member of a surging ``T`` when ``T`` is a
proper subset of ``S`` and ``S`` does not grow clearly faster.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from streamcount.rules.derive import Rule

__all__ = ["family_order", "first_of_family", "rule_family_rep", "surge_family_rep"]


def family_order(rule: Rule) -> tuple[int, int, tuple[tuple[str, ...], tuple[str, ...]]]:
    """Sort key: fewer items first, then fewer antecedent items, then by name."""
    return len(rule.items), len(rule.antecedent), rule.key


def first_of_family(rules: Sequence[Rule]) -> Rule:
    """The rule of a family that comes first in the family order."""
    return min(rules, key=family_order)


def rule_family_rep(rule: Rule, others: Iterable[Rule], tolerance: float) -> Rule | None:
    """Among ``others``, the rule whose family ``rule`` belongs to, or ``None``.

    An other rule represents ``rule`` when its itemset is contained in ``rule``'s, it comes
    first in the family order and ``rule`` shows no lift gain beyond it.
    """
    items = set(rule.items)
    rank = family_order(rule)
    best: Rule | None = None
    for other in others:
        if other.key == rule.key or not set(other.items) <= items:
            continue
        if family_order(other) >= rank:
            continue
        if rule.lift.low <= other.lift.high * (1.0 + tolerance) and (
            best is None or family_order(other) < family_order(best)
        ):
            best = other
    return best


def surge_family_rep(
    items: tuple[str, ...],
    growth_low: float,
    others: Iterable[tuple[tuple[str, ...], float]],
    tolerance: float,
) -> tuple[str, ...] | None:
    """Among surging ``others`` (itemset, growth high end), the proper subset ``items`` is a
    member of (no clear extra growth), smallest first; or ``None``."""
    mine = set(items)
    best: tuple[str, ...] | None = None
    for other, growth_high in others:
        if not set(other) < mine:
            continue
        if growth_low <= growth_high * (1.0 + tolerance) and (
            best is None or (len(other), other) < (len(best), best)
        ):
            best = other
    return best
