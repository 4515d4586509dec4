"""The alert kinds: the one list the detectors, the metrics, the schema and the docs read."""

from __future__ import annotations

__all__ = ["ALERT_KINDS"]

#: ``emerged``: a rule now holds and its co-purchase rate has risen; ``faded``: an active
#: rule's co-purchase rate has fallen; ``surged``: an itemset's co-purchase rate has risen
ALERT_KINDS: tuple[str, ...] = ("emerged", "faded", "surged")
