"""``streamcount replay PATH``: run the engine over a file as fast as it can, report as JSON.

The report (one JSON object)::

    {"window": {"first_seq", "last_seq", "transactions", "max_error", "epsilon", "pane_size"},
     "itemsets": [{"items": [...], "count", "upper", "support"}, ...],
     "rules": [...],            # with --report ...,rules: rules passing the thresholds on
                                # the reported window
     "alerts": [...],           # with --report ...,alerts
     "input": {"transactions", "rejected": {reason: n}}}

Sequence numbers count accepted transactions from 1 in file order. The transactions of the last
partial batch are added to the report as exact counts (the counting state is not flushed, so
it equals the live service's on the same input), so the window is exactly transactions
``first_seq..last_seq``.
"""

from __future__ import annotations

import gc
import sys
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any, TextIO

from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.intake import bulk
from streamcount.intake.bulk import iter_batches
from streamcount.intake.formats import make_decoder
from streamcount.intake.records import Decoded
from streamcount.pipeline import Pipeline
from streamcount.rules.derive import derive_rules

__all__ = ["REPORT_PARTS", "ReplayResult", "replay_decoded", "replay_file"]

REPORT_PARTS = ("itemsets", "rules", "alerts")


@dataclass
class ReplayResult:
    """The JSON report, the pipeline that produced it and the alerts raised, in order."""

    report: dict[str, Any]
    pipeline: Pipeline
    alerts: list[dict[str, Any]] = field(default_factory=list)
    #: how it ran: ``workers``, and ``why_one_process`` or ``parts`` and the workers' peak RSS
    stats: dict[str, Any] = field(default_factory=dict)

    @property
    def engine(self) -> Engine:
        return self.pipeline.engine


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


def _pipeline(
    config: Config,
    report: Iterable[str],
    on_alert: Callable[[dict[str, Any]], None] | None = None,
) -> tuple[set[str], Pipeline, list[dict[str, Any]]]:
    """The report parts asked for, a pipeline (rules and alerts when they are asked for) and
    the list its alerts are collected into."""
    parts = set(report)
    unknown = parts - set(REPORT_PARTS)
    if unknown:
        raise ValueError(f"--report: unknown part(s) {sorted(unknown)}; choose from {REPORT_PARTS}")
    pipeline = Pipeline(config, alerts="alerts" in parts)
    alerts: list[dict[str, Any]] = []

    def collect(records: list[dict[str, Any]]) -> None:
        alerts.extend(records)
        if on_alert is not None:
            for record in records:
                on_alert(record)

    pipeline.on_alerts(collect)
    return parts, pipeline, alerts


def replay_decoded(
    parts_in: Iterable[Decoded],
    config: Config,
    *,
    report: Iterable[str] = ("itemsets",),
    progress: TextIO | None = None,
    on_alert: Callable[[dict[str, Any]], None] | None = None,
) -> ReplayResult:
    """Run the pipeline (with rules and alerts when the report asks for them) over decoded
    transactions, then report on the final window."""
    parts, pipeline, alerts = _pipeline(config, report, on_alert)
    bar = _Progress(progress)
    # The loop builds short-lived lists of strings (no reference cycles: parse errors come
    # without tracebacks); the cyclic collector would only rescan them, at about a fifth of
    # the replay's time, so it is paused for the loop.
    collecting = gc.isenabled()
    gc.disable()
    try:
        for decoded in parts_in:
            pipeline.add(decoded)
            bar.update(pipeline.engine.transactions_seen)
    finally:
        if collecting:
            gc.enable()
    bar.update(pipeline.engine.transactions_seen, final=True)
    return _report(pipeline, config, parts, alerts)


def _report(
    pipeline: Pipeline, config: Config, parts: set[str], alerts: list[dict[str, Any]]
) -> ReplayResult:
    """The report on the pipeline's final window."""
    engine = pipeline.engine
    # the last partial batch is reported as an exact overlay, as the service shows it: the
    # counting state stays a function of the input alone (batch cuts are count-based)
    snap = engine.fresh_snapshot()
    out: dict[str, Any] = {"window": snap.window_dict()}
    if "itemsets" in parts:
        out["itemsets"] = [s.as_dict() for s in snap.frequent(config.rules.min_support)]
    if "rules" in parts:
        # the rules that hold on the reported window (the alert state machine is about
        # changes over time; the report is about this window)
        out["rules"] = [r.as_dict() for r in derive_rules(snap, config.rules)]
    if "alerts" in parts:
        out["alerts"] = alerts
    out["input"] = {
        "transactions": engine.transactions_seen,
        "rejected": dict(pipeline.rejected_counts),
    }
    return ReplayResult(out, pipeline, alerts)


def decode_file(path: str, config: Config) -> Iterable[Decoded]:
    """``path`` decoded in ``config.input.format``, batch by batch; orders still open at the
    end of the file (CSV) close into the last part."""
    decoder = make_decoder(
        config.input,
        config.engine.max_basket_items,
        require_ts=config.engine.window_seconds is not None,
    )
    batches = iter_batches(
        path, max_record_bytes=config.input.max_record_bytes, block_bytes=bulk.BLOCK_BYTES
    )
    for batch in batches:
        yield decoder.decode(batch)
    tail = decoder.close_all()
    if tail:
        yield Decoded.from_transactions(tail, source="file", timed=True)


def replay_file(
    path: str,
    config: Config,
    *,
    report: Iterable[str] = ("itemsets",),
    progress: TextIO | None = sys.stderr,
    workers: int = 1,
) -> ReplayResult:
    """Read ``path`` (``.gz`` transparently, ``-`` for stdin) in ``config.input.format``.

    ``workers > 1`` counts whole panes in that many processes when the input allows it (a
    plain file of basket or JSON lines, a count-based window; see
    :mod:`streamcount.replay_workers`), with exactly the report of one process; otherwise it
    runs in one process and ``stats["why_one_process"]`` says why.
    """
    from streamcount.replay_workers import plan, run_parts

    the_plan = plan(path, config, workers)
    if not the_plan.parallel:
        result = replay_decoded(decode_file(path, config), config, report=report, progress=progress)
        result.stats = {"workers": 1, "why_one_process": the_plan.why_one_process}
        return result
    parts, pipeline, alerts = _pipeline(config, report)
    bar = _Progress(progress)
    collecting = gc.isenabled()
    gc.disable()  # as in one process: short-lived acyclic lists only
    try:
        stats = run_parts(path, config, the_plan, pipeline, bar.update)
    finally:
        if collecting:
            gc.enable()
    bar.update(pipeline.engine.transactions_seen, final=True)
    result = _report(pipeline, config, parts, alerts)
    result.stats = stats
    return result
