"""Figures of ``bench_alerts.py``: Poisson bounds, verdicts and the Markdown tables.

Poisson bounds are exact (Garwood 1936), from the chi-square distribution (scipy.stats): for
``k`` events the one-sided 95 % upper bound of the expected count is ``chi2.ppf(0.95, 2k + 2)
/ 2`` and the lower bound ``chi2.ppf(0.05, 2k) / 2`` (0 for ``k = 0``). A budget of ``B`` per
million over ``T`` transactions allows an expected ``A = B T / 10^6`` false alerts:

* **holds** when the lower bound is at most ``A`` (the observed count is within the Poisson
  interval of a rate at or below the budget; equivalently, not significantly above it at 5 %);
* **shown** when even the upper bound is at most ``A`` (the data show the rate is below the
  budget; with no alert this needs ``T >= 2.996 x 10^6 / B``, hence 3,000,000 transactions at
  the default budget of 1 per million).

Delays: the median is the middle value (mean of the two middle ones for an even count); the
90th percentile is the nearest-rank value (the ``ceil(0.9 n)``-th smallest). A miss counts as
an infinite delay in both, so misses can only make them worse.
"""

from __future__ import annotations

import math
import statistics
from typing import Any

__all__ = [
    "delay_stats",
    "fmt_delay",
    "md_table",
    "poisson_bounds",
    "rate_row",
]

CONFIDENCE = 0.95


def poisson_bounds(k: int, confidence: float = CONFIDENCE) -> tuple[float, float]:
    """One-sided lower and upper bounds (each at ``confidence``) of a Poisson mean, ``k`` seen."""
    from scipy.stats import chi2

    lower = 0.0 if k == 0 else float(chi2.ppf(1.0 - confidence, 2 * k)) / 2.0
    upper = float(chi2.ppf(confidence, 2 * k + 2)) / 2.0
    return lower, upper


def rate_row(alerts: int, exposure: int, budget: float) -> dict[str, Any]:
    """Observed rate, its bounds and the verdicts for ``alerts`` over ``exposure`` transactions."""
    lower, upper = poisson_bounds(alerts)
    allowed = budget * exposure / 1e6
    per_m = 1e6 / exposure if exposure else math.nan
    return {
        "alerts": alerts,
        "exposure": exposure,
        "budget": budget,
        "allowed": allowed,
        "rate": alerts * per_m,
        "lower_rate": lower * per_m,
        "upper_rate": upper * per_m,
        "ratio": alerts / allowed if allowed else math.nan,
        "ratio_lower": lower / allowed if allowed else math.nan,
        "ratio_upper": upper / allowed if allowed else math.nan,
        "holds": lower <= allowed,
        "shown": upper <= allowed,
    }


def _percentile(sorted_values: list[float], q: float) -> float:
    if not sorted_values:
        return math.nan
    rank = max(1, math.ceil(q * len(sorted_values)))
    return sorted_values[rank - 1]


def delay_stats(delays: list[float | None]) -> dict[str, Any]:
    """Median and 90th percentile of delays in panes; ``None`` (a miss) counts as infinite."""
    values = sorted(math.inf if d is None else float(d) for d in delays)
    hits = [v for v in values if math.isfinite(v)]
    histogram: dict[str, int] = {}
    for v in values:
        key = "miss" if not math.isfinite(v) else f"{v:g}"
        histogram[key] = histogram.get(key, 0) + 1
    return {
        "runs": len(values),
        "detected": len(hits),
        "misses": len(values) - len(hits),
        "median": statistics.median(values) if values else math.nan,
        "p90": _percentile(values, 0.9),
        "histogram": histogram,
    }


def fmt_delay(value: float) -> str:
    if math.isnan(value):
        return "n/a"
    if math.isinf(value):
        return "miss"
    return f"{value:g}"


def md_table(header: list[str], rows: list[list[Any]]) -> list[str]:
    """A Markdown table as lines."""
    out = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    out += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return out
