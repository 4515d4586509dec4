"""The kinds of alert, in one list: the ``kind`` of an alert record, the ``kind`` label of
``streamcount_alerts_total`` and the enum of ``schemas/alert.schema.json``."""

from __future__ import annotations

__all__ = ["ALERT_KINDS"]

#: ``emerged``: a rule entered; ``faded``: an active rule left; ``surged``: an itemset grew
#: in the recent panes against the window's baseline
ALERT_KINDS: tuple[str, ...] = ("emerged", "faded", "surged")
