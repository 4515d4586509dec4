"""The alert record: what a person reviewing an alert reads, with its evidence.

:meth:`Alert.as_dict` is the JSON object every sink delivers; ``streamcount/schemas/
alert.schema.json`` documents it and the tests validate every record against it. Infinite
numbers (the conviction of a rule with confidence 1) are written as ``null``: JSON has no
infinity. Alerts are signals for a person to review, not decisions.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

from streamcount.engine.snapshot import WindowSnapshot
from streamcount.rules.measures import Measure

__all__ = ["Alert", "Evidence", "alert_id", "window_dict"]


def alert_id(kind: str, antecedent: Sequence[str], consequent: Sequence[str], seq: int) -> str:
    """Stable alert id: first 16 hex digits of SHA-256 over kind, antecedent, consequent, seq.

    The same input gives the same id, so a receiver can drop the repeats that follow a restart
    from a checkpoint.

    >>> alert_id("emerged", ["tea"], ["scone"], 7) == alert_id("emerged", ["tea"], ["scone"], 7)
    True
    >>> len(alert_id("surged", ["tea", "scone"], [], 7))
    16
    """
    payload = json.dumps([kind, list(antecedent), list(consequent), int(seq)])
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()[:16]


def _num(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def window_dict(snapshot: WindowSnapshot) -> dict[str, int]:
    """``{first_seq, last_seq, transactions, max_error}`` of a window snapshot."""
    return {
        "first_seq": int(snapshot.first_seq),
        "last_seq": int(snapshot.last_seq),
        "transactions": int(snapshot.transactions),
        "max_error": int(snapshot.max_error),
    }


@dataclass(frozen=True, slots=True)
class Evidence:
    """Why the change test fired: the itemset's co-purchase rate before and since the change.

    Attributes
    ----------
    direction:
        ``up`` (the rate rose: emerged, surged) or ``down`` (it fell: faded).
    reference_rate:
        The rate before the change (per transaction), with an interval.
    recent_rate:
        The rate since the estimated change, with an interval, over ``recent_transactions``.
    statistic, threshold:
        Page's CUSUM statistic and the threshold it reached (nats).
    ratio:
        The alternative the test was tuned to, as a multiple of the reference rate.
    change_pane, change_seq, change_time:
        Where the change is estimated to have started: the pane index, the first sequence
        number and event time of that pane (``None`` when unknown).
    tests, level, budget_per_million:
        The false-alert budget in force: the number of tests the pane's budget was split over,
        the per-test false-alarm level ``exp(-threshold)``, and the budget (expected false
        alerts per million transactions on a stationary feed).
    incomplete_panes:
        Only from a merger (``cluster.role: merger``): runs ``(first, last, missing workers)``
        of consecutive panes, from the earlier of the change pane and the window's first pane
        through the alert's pane, that were closed without those workers' summaries (their
        orders there are not counted); empty when every pane was complete, and then left out
        of the record.
    """

    direction: str
    reference_rate: Measure
    recent_rate: Measure
    recent_transactions: int
    statistic: float
    threshold: float
    ratio: float
    change_pane: int
    change_seq: int | None
    change_time: float | None
    tests: int
    level: float
    budget_per_million: float
    incomplete_panes: tuple[tuple[int, int, tuple[str, ...]], ...] = ()

    def as_dict(self) -> dict[str, object]:
        out: dict[str, object] = {
            "direction": self.direction,
            "reference_rate": self.reference_rate.as_dict(),
            "recent_rate": self.recent_rate.as_dict(),
            "recent_transactions": int(self.recent_transactions),
            "statistic": float(self.statistic),
            "threshold": float(self.threshold),
            "ratio": float(self.ratio),
            "change_pane": int(self.change_pane),
            "change_seq": self.change_seq,
            "change_time": self.change_time,
            "tests": int(self.tests),
            "level": float(self.level),
            "budget_per_million": float(self.budget_per_million),
        }
        if self.incomplete_panes:
            out["incomplete_panes"] = [
                {"first": int(first), "last": int(last), "missing_workers": list(workers)}
                for first, last, workers in self.incomplete_panes
            ]
        return out


@dataclass(frozen=True, slots=True)
class Alert:
    """One alert record.

    Attributes
    ----------
    id:
        :func:`alert_id` of kind, rule (or items) and ``seq``.
    kind:
        One of :data:`streamcount.alerts.kinds.ALERT_KINDS`.
    seq, event_time, pane:
        The pane close that raised it: last sequence number of the window, event time,
        pane index.
    items, antecedent, consequent:
        The itemset and, for a rule, its two sides (``None`` for a surge of an itemset that
        is not a rule).
    measures:
        Support (and for a rule confidence, lift, leverage, conviction), each with its
        interval, on the window of the pane close.
    p_value:
        The rule's significance test at the least favourable corner, or ``None``.
    evidence:
        The change test's evidence.
    also:
        Other kinds raised for the same itemset at the same pane close, folded into this one
        notification (an itemset that surges and emerges at once is one ``emerged`` alert with
        ``also: ["surged"]``).
    window:
        The window of the pane close.
    thresholds:
        The rule thresholds (the practical floor) in force.
    item_details:
        With a catalogue (``items.catalogue`` / ``items.levels``): the level and display name
        of the record's items that the catalogue knows, by name
        (:func:`streamcount.catalogue.view.item_details`); ``None`` without a catalogue, and
        then left out of the record.
    """

    id: str
    kind: str
    seq: int
    event_time: float | None
    pane: int
    items: tuple[str, ...]
    antecedent: tuple[str, ...] | None
    consequent: tuple[str, ...] | None
    measures: Mapping[str, Measure]
    p_value: float | None
    evidence: Evidence
    window: Mapping[str, int]
    thresholds: Mapping[str, object]
    also: tuple[str, ...] = field(default=())
    item_details: Mapping[str, Mapping[str, str | None]] | None = None

    def as_dict(self) -> dict[str, object]:
        """The JSON record (``alert.schema.json``)."""
        out: dict[str, object] = {
            "id": self.id,
            "kind": self.kind,
            "seq": self.seq,
            "event_time": self.event_time,
            "pane": self.pane,
            "items": list(self.items),
            "antecedent": None if self.antecedent is None else list(self.antecedent),
            "consequent": None if self.consequent is None else list(self.consequent),
            "measures": {name: m.as_dict() for name, m in self.measures.items()},
            "p_value": _num(self.p_value),
            "evidence": self.evidence.as_dict(),
            "also": list(self.also),
            "window": dict(self.window),
            "thresholds": dict(self.thresholds),
        }
        if self.item_details is not None:
            out["item_details"] = {name: dict(d) for name, d in self.item_details.items()}
        return out
