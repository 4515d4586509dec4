"""``streamcount replay PATH``: run the engine over a file as fast as it can, report as JSON.

The report (one JSON object)::

    {"window": {"first_seq", "last_seq", "transactions", "max_error", "epsilon", "pane_size"},
     "itemsets": [{"items": [...], "count", "upper", "support"}, ...],
     "rules": [...],            # with --report ...,rules: rules passing the thresholds on
                                # the reported window
     "alerts": [...],           # with --report ...,alerts
     "input": {"transactions", "rejected": {reason: n}}}

Sequence numbers count accepted transactions from 1 in file order; after the last record every
buffered transaction is counted, so the window is exactly transactions
``first_seq..last_seq``.
"""

from __future__ import annotations

import gc
import sys
import time
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any, TextIO

from streamcount.config.settings import Config
from streamcount.engine.engine import Engine

__all__ = ["REPORT_PARTS", "ReplayResult", "replay_chunks", "replay_file"]

REPORT_PARTS = ("itemsets", "rules", "alerts")


@dataclass
class ReplayResult:
    report: dict[str, Any]
    engine: Engine
    alerts: list[dict[str, Any]] = field(default_factory=list)


class _Progress:
    """A one-line progress display on a terminal; silent when the stream is not a TTY."""

    def __init__(self, stream: TextIO | None) -> None:
        self.stream = stream if stream is not None and stream.isatty() else None
        self.start = time.monotonic()
        self.last = 0.0

    def update(self, n: int, *, final: bool = False) -> None:
        if self.stream is None:
            return
        now = time.monotonic()
        if not final and now - self.last < 0.25:
            return
        self.last = now
        rate = n / max(now - self.start, 1e-9)
        self.stream.write(f"\rreplay: {n:,} transactions, {rate:,.0f}/s")
        if final:
            self.stream.write("\n")
        self.stream.flush()


def replay_chunks(
    chunks: Iterable[Any],
    config: Config,
    *,
    report: Iterable[str] = ("itemsets",),
    progress: TextIO | None = None,
    on_alert: Callable[[dict[str, Any]], None] | None = None,
) -> ReplayResult:
    """Run the engine (and, if asked, rules and alerts) over parsed chunks.

    Each chunk has ``items`` (list of baskets), ``ts`` (list or ``None``) and ``errors``
    (records the parser rejected, each with a ``reason``).
    """
    parts = set(report)
    unknown = parts - set(REPORT_PARTS)
    if unknown:
        raise ValueError(f"--report: unknown part(s) {sorted(unknown)}; choose from {REPORT_PARTS}")
    alerts: list[dict[str, Any]] = []
    if "alerts" in parts:
        from streamcount.alerts.monitor import RuleMonitor

        monitor = RuleMonitor(config.rules, config.alerts)

        def on_close(eng: Engine) -> None:
            fired, _ = monitor.evaluate_close(eng, recent_panes=config.alerts.recent_panes)
            for alert in fired:
                record = alert.as_dict()
                alerts.append(record)
                if on_alert is not None:
                    on_alert(record)

        engine = Engine(config.engine, on_pane_closed=on_close)
    else:
        engine = Engine(config.engine)
    rejected: Counter[str] = Counter()
    bar = _Progress(progress)
    # The loop builds short-lived lists of strings (no reference cycles: parse errors come
    # without tracebacks); the cyclic collector would only rescan them, at about a fifth of
    # the replay's time, so it is paused for the loop.
    collecting = gc.isenabled()
    gc.disable()
    try:
        for chunk in chunks:
            for err in chunk.errors:
                rejected[err.reason] += 1
            if chunk.items:
                result = engine.add(chunk.items, chunk.ts)
                rejected.update(result.rejected_by_reason)
            bar.update(engine.transactions_seen)
    finally:
        if collecting:
            gc.enable()
    engine.flush()
    bar.update(engine.transactions_seen, final=True)
    snap = engine.snapshot()
    out: dict[str, Any] = {"window": snap.window_dict()}
    if "itemsets" in parts:
        out["itemsets"] = [s.as_dict() for s in snap.frequent(config.rules.min_support)]
    if "rules" in parts:
        # the rules that hold on the reported window (the alert state machine's confirmation
        # and hysteresis are about changes over time; the report is about this window)
        from streamcount.rules.derive import derive_rules

        out["rules"] = [r.as_dict() for r in derive_rules(snap, config.rules)]
    if "alerts" in parts:
        out["alerts"] = alerts
    out["input"] = {"transactions": engine.transactions_seen, "rejected": dict(rejected)}
    return ReplayResult(out, engine, alerts)


def replay_file(
    path: str,
    config: Config,
    *,
    report: Iterable[str] = ("itemsets",),
    progress: TextIO | None = sys.stderr,
) -> ReplayResult:
    """Read ``path`` (``.gz`` transparently, ``-`` for stdin) in ``config.input.format``."""
    from streamcount.intake.formats import iter_file_chunks

    chunks = iter_file_chunks(
        path, config.input.format, config.input, config.engine.max_basket_items
    )
    return replay_chunks(chunks, config, report=report, progress=progress)
