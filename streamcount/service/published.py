"""The view the HTTP threads read: built by the service loop, swapped in by reference.

:class:`ViewBuilder` turns the pipeline's state into an immutable
:class:`~streamcount.service.api.View`: the window (with the fresh overlay when a batch has
waited uncounted for :data:`OVERLAY_SECONDS`), the statistics, the active rules (re-measured on
the overlay), the alert history and the ``/v1/status`` answer. A view is rebuilt without
re-summing the panes when nothing counted changed since the previous one.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

from streamcount import __version__
from streamcount.alerts.sinks import SinkFanout
from streamcount.config.settings import Config
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.intake.sources import Source
from streamcount.pipeline import Pipeline
from streamcount.rules.derive import Rule, measure_rules
from streamcount.service.api import View, rule_notes
from streamcount.service.extension import Extensions
from streamcount.service.history import HistoryStore

__all__ = ["OVERLAY_SECONDS", "ViewBuilder", "source_status"]

#: a buffer left uncounted this long is shown as an exact overlay (a quiet feed's latest
#: orders appear within this delay plus one publish); while batches keep being counted the
#: overlay is skipped, it would cost an exact count per publish for little news
OVERLAY_SECONDS = 1.0


def source_status(source: Source) -> dict[str, Any]:
    """One source's entry in ``/v1/status``: name, connection, lag and gap where known."""
    health = source.health()
    out: dict[str, Any] = {"name": source.name, "connected": health.connected}
    if health.bus is not None:
        out["lag_messages"] = health.bus.lag_messages
    if health.gap is not None:
        out["gap"] = health.gap
    return out


class ViewBuilder:
    """Builds each :class:`View` from the pipeline and the service's parts (module notes).

    ``sources`` lists the running sources; ``last_checkpoint`` gives the Unix time of the last
    checkpoint written (``None``: none yet).
    """

    def __init__(
        self,
        config: Config,
        pipeline: Pipeline,
        history: HistoryStore,
        sinks: SinkFanout,
        extensions: Extensions,
        sources: Callable[[], Sequence[Source]],
        last_checkpoint: Callable[[], float | None],
    ) -> None:
        self.config = config
        self.pipeline = pipeline
        self.history = history
        self.sinks = sinks
        self.extensions = extensions
        self.sources = sources
        self.last_checkpoint = last_checkpoint
        self._counted_key: tuple[tuple[int, int], ...] = ()
        #: when the counted panes last changed (monotonic clock)
        self.counted_at = time.monotonic()

    def window_key(self) -> tuple[tuple[int, int], ...]:
        """What the window's counts depend on: each live pane and how much of it is counted."""
        return tuple((p.index, p.counted) for p in self.pipeline.engine.window.panes.values())

    def fill(self, window: WindowSnapshot, live_panes: int, window_panes: int) -> float:
        """How full the window is: transactions over ``engine.window_size`` (count-based), or
        live panes over the panes of a full window (time-based); at most 1."""
        engine = self.config.engine
        if engine.window_seconds is None:
            return min(1.0, window.transactions / engine.window_size)
        return min(1.0, live_panes / max(1, window_panes))

    def build(self, previous: View | None, window: WindowSnapshot | None = None) -> View:
        """The view now; ``window`` is the snapshot of a pane close just evaluated (else the
        window is taken, or reused from ``previous`` when nothing counted changed)."""
        engine = self.pipeline.engine
        counted = self.window_key()
        now = time.monotonic()
        if counted != self._counted_key:
            self._counted_key, self.counted_at = counted, now
        # a buffer left uncounted for a while is shown as an exact overlay
        stale = engine.window.buffered > 0 and now - self.counted_at >= OVERLAY_SECONDS
        key = (*counted, (-1, engine.window.buffered if stale else 0))
        fresh = stale
        if window is None:
            # the window changes only when a batch is counted (or the overlay changes);
            # statistics change with every transaction buffered, so a view is rebuilt without
            # re-summing unchanged panes
            if previous is not None and previous.window_key == key:
                window, fresh = previous.window, previous.status.get("overlay", False)
            else:
                window = engine.fresh_snapshot() if stale else engine.snapshot()
        else:
            fresh = False
        stats = replace(
            engine.statistics(),
            window_transactions=window.transactions,
            window_max_error=window.max_error,
        )
        monitor = self.pipeline.monitor
        listed = monitor.listing.active() if monitor is not None else []
        rules: tuple[Rule, ...] = tuple(s.rule for s in listed)
        rules_window = self.pipeline.rules_window
        budget = monitor.budget if monitor is not None else None
        if fresh and rules:
            # the active rules re-measured with the overlay (the list changes at pane closes)
            rules = tuple(measure_rules(window, [r.key for r in rules], config=self.config.rules))
            rules_window = window.window_dict()
        alerts = tuple(self.pipeline.alert_history)
        closes = self.pipeline.closes
        as_of = {"pane_close": closes, "last_seq": int(window.last_seq)}
        rules_seq = window.last_seq if rules_window is None else rules_window["last_seq"]
        history = self.history.view
        status = {
            "version": __version__,
            "window": window.window_dict(),
            "transactions_seen": stats.transactions_seen,
            "rejected": dict(self.pipeline.rejected_counts),
            "buffered_transactions": stats.buffered_transactions,
            "tracked_itemsets": {str(k + 1): n for k, n in enumerate(stats.tracked_itemsets)},
            "held_bytes": stats.held_bytes,
            "live_panes": stats.live_panes,
            "window_panes": stats.window_panes,
            "warm": engine.window_full,
            "active_rules": len(rules),
            "alerts": dict(self.pipeline.alert_counts),
            "vocabulary_items": stats.vocabulary_items,
            "last_checkpoint_unix": self.last_checkpoint(),
            "max_event_ts": stats.max_event_ts,
            "rules_window": rules_window,
            "overlay": fresh,
            "sources": [source_status(source) for source in self.sources()],
            "alerts_budget": None if budget is None else budget.as_dict(),
            "as_of": as_of,
            "fill": self.fill(window, stats.live_panes, stats.window_panes),
            "min_support": self.config.rules.min_support,
            "checkpoints": bool(self.config.checkpoint.checkpoint_dir),
            "sinks": {
                name: {"sent": st.sent, "failed": st.failed, "dropped": st.dropped}
                for name, st in self.sinks.stats_by_sink().items()
            },
            "history": history.summary(),
            "catalogue": self.pipeline.catalogue_status(),
        }
        self.extensions.add_status(status)
        return View(
            window,
            stats,
            rules,
            alerts,
            status,
            rules_window,
            key,
            as_of=as_of,
            history=history,
            rule_notes=rule_notes(listed, alerts),
            rules_version=f"{closes}.{rules_seq}",
        )
