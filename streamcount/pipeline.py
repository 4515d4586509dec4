"""The counting pipeline: decoded transactions in; window counts, rules and alerts out.

One :class:`Pipeline` owns the engine, the rule monitor and the alert sinks, and evaluates
every pane close the same way wherever it runs: the live service, ``streamcount replay`` and
the demo differ only in their sources and sinks. At each pane close the monitor sees the
window exactly as it is at that moment; the alerts it raises go to the sinks, into a bounded
history for the API, and to the listeners registered with :meth:`Pipeline.on_alerts`.

Rejections are collected in one place: :meth:`Pipeline.add` returns every record or
transaction set aside (by the decoder, by the future-time guard, by the engine) as a
:class:`~streamcount.errors.ParseError`, and keeps the counts by reason.
"""

from __future__ import annotations

import logging
from collections import Counter, deque
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamcount.alerts.monitor import RuleMonitor
from streamcount.alerts.record import Alert
from streamcount.alerts.sinks import Sink
from streamcount.catalogue.state import (
    CatalogueState,
    ReloadOutcome,
    catalogue_configured,
    check_saved_levels,
)
from streamcount.config.settings import Config
from streamcount.engine.engine import AddResult, Engine
from streamcount.engine.pane import Pane
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import ParseError
from streamcount.intake.records import Decoded

__all__ = ["AlertAmender", "Intake", "PaneListener", "Pipeline"]

logger = logging.getLogger(__name__)

#: alert records kept in a checkpoint (the API's history restarts from them)
_CHECKPOINT_ALERTS = 100

AlertListener = Callable[[list[dict[str, Any]]], None]
#: called at every pane close, alerts on or off: (the closed pane, the engine's item names by
#: id at that moment; the pane's ids index them)
PaneListener = Callable[[Pane, Sequence[str]], None]
#: given the alerts a pane close raised (before they are recorded or sent), returns them,
#: amended (e.g. the merger names the workers missing from the panes they rest on)
AlertAmender = Callable[[list[Alert]], list[Alert]]
#: called at every evaluated pane close: (the pane-close number, the window evaluated, the
#: alert records raised there)
CloseListener = Callable[[int, WindowSnapshot, list[dict[str, Any]]], None]


@dataclass(slots=True)
class Intake:
    """What became of one :meth:`Pipeline.add`: transactions accepted and every record or
    transaction set aside (each with its reason, offset and raw bytes)."""

    accepted: int = 0
    rejected: list[ParseError] = field(default_factory=list)
    panes_closed: int = 0

    def by_reason(self) -> Counter[str]:
        """The rejections counted by reason."""
        return Counter(e.reason for e in self.rejected)


class Pipeline:
    """Engine + rule monitor + alert sinks, and what happens at each pane close.

    Parameters
    ----------
    config:
        The whole configuration (engine, rules, alerts, input guards).
    sinks:
        Where alert records go (any :class:`~streamcount.alerts.sinks.Sink`, e.g. a
        ``SinkFanout``); ``None`` keeps them in the history only.
    alerts:
        Evaluate rules and alerts at pane closes (``False``: counting only, as a plain
        ``replay`` of itemsets).
    clock:
        Wall clock for the future-time guard (``input.max_future_seconds``); ``None`` turns
        the guard off (replay of old files).
    """

    def __init__(
        self,
        config: Config,
        *,
        sinks: Sink | None = None,
        alerts: bool = True,
        clock: Callable[[], float] | None = None,
    ) -> None:
        self.config = config
        self.sinks = sinks
        self.clock = clock
        #: the catalogue in force (filters, renames, levels), or ``None`` when not configured;
        #: a bad catalogue file raises CatalogueError here (file, line, column)
        self.catalogue = (
            CatalogueState(config.items, nfc=config.input.normalize == "nfc")
            if catalogue_configured(config.items)
            else None
        )
        self.engine = Engine(
            config.engine, on_pane_closed=self._on_pane_closed, items=self._items()
        )
        self.engine.on_remap = self._on_remap
        self.monitor = (
            RuleMonitor(
                config.rules,
                config.alerts,
                max_itemset_size=config.engine.max_itemset_size,
                window_panes=self.engine.window_panes,
                item_details=config.items.catalogue is not None,
            )
            if alerts
            else None
        )
        #: the most recent alert records, oldest first (``alerts.history`` of them)
        self.alert_history: deque[dict[str, Any]] = deque(maxlen=max(1, config.alerts.history))
        self.alert_counts: Counter[str] = Counter()
        #: records and transactions set aside since the state began, by reason
        self.rejected_counts: Counter[str] = Counter()
        #: the window the rules were last evaluated on (at the last pane close)
        self.last_close: WindowSnapshot | None = None
        #: pane closes evaluated so far (an id that grows with every evaluation)
        self.closes = 0
        self._listeners: list[AlertListener] = []
        self._close_listeners: list[CloseListener] = []
        self._pane_listeners: list[PaneListener] = []
        self._amenders: list[AlertAmender] = []

    # -- catalogue ----------------------------------------------------------------------------

    def _items(self) -> Any:
        return None if self.catalogue is None else self.catalogue.catalogue

    def poll_catalogue(self) -> ReloadOutcome | None:
        """Reload the catalogue when asked (``catalogue.requested``, set on SIGHUP) or when its
        file changed; a new version maps items from the next transaction on, and what was
        counted stays. ``None`` when nothing was tried."""
        if self.catalogue is None:
            return None
        outcome = self.catalogue.poll(self.engine.next_seq)
        if outcome is not None and outcome.changed:
            self.engine.set_items(self.catalogue.catalogue)
        return outcome

    def catalogue_status(self) -> dict[str, Any] | None:
        """The ``catalogue`` object of ``/v1/status`` (``None`` without a catalogue)."""
        if self.catalogue is None:
            return None
        return self.catalogue.status(self._pane_spans())

    def _pane_spans(self) -> list[tuple[int, int, int]]:
        return [(p.index, *p.seq_range()) for p in self.engine.window.panes.values()]

    # -- intake -------------------------------------------------------------------------------

    def on_alerts(self, listener: AlertListener) -> None:
        """Call ``listener`` with the records raised at each pane close that raises some."""
        self._listeners.append(listener)

    def on_close(self, listener: CloseListener) -> None:
        """Call ``listener`` after every evaluated pane close (history, views), whether it
        raised alerts or not; the monitor's active rules are current then."""
        self._close_listeners.append(listener)

    def on_pane(self, listener: PaneListener) -> None:
        """Call ``listener`` with every closed pane and the item names its ids index, right
        after it closed and before rules and alerts are evaluated (a cluster worker publishes
        its summary there); called with alerts off too."""
        self._pane_listeners.append(listener)

    def amend_alerts(self, amender: AlertAmender) -> None:
        """Pass the alerts of every pane close through ``amender`` before they are recorded
        and sent (a merger adds the workers missing from the panes they rest on)."""
        self._amenders.append(amender)

    def add(self, decoded: Decoded) -> Intake:
        """Count decoded transactions; returns what was accepted and everything set aside."""
        out = Intake(rejected=list(decoded.errors))
        limit = self.config.input.max_future_seconds
        if decoded.ts is not None and len(decoded) and limit is not None and self.clock:
            decoded = self._drop_future(decoded, limit, out.rejected)
        if len(decoded):
            result = self._count(decoded)
            out.accepted = result.accepted
            out.panes_closed = result.panes_closed
            offsets = decoded.offsets
            for rej in result.rejections:
                out.rejected.append(
                    ParseError(
                        rej.reason,
                        rej.detail,
                        offset=None if offsets is None else offsets[rej.index],
                        raw=decoded.raw(rej.index),
                    )
                )
        self.rejected_counts.update(out.by_reason())
        return out

    def _count(self, decoded: Decoded) -> AddResult:
        """Hand the transactions to the engine: interned in bulk when the decoder gave
        :class:`~streamcount.intake.records.Tokens` (one vocabulary lookup per distinct name,
        :meth:`Engine.add_ids`), as lists of names otherwise.

        A time-based window takes the names (:meth:`Engine.add` interns only the items of the
        transactions its time guards accept, and the ids must follow that).
        """
        tokens = decoded.tokens
        engine = self.engine
        if tokens is None or engine.time_based:
            return engine.add(decoded.baskets, decoded.ts)
        table = engine.vocabulary.encode_table(tokens.names, tokens.codes)
        return engine.add_ids(table[tokens.codes], tokens.lengths, decoded.ts)

    def _drop_future(self, decoded: Decoded, limit: float, rejected: list[ParseError]) -> Decoded:
        """Set aside transactions stamped more than ``limit`` seconds ahead of the clock."""
        assert self.clock is not None and decoded.ts is not None
        now = self.clock()
        ts = np.array(decoded.ts, dtype=np.float64)  # None becomes NaN, never ahead
        with np.errstate(invalid="ignore"):
            ahead = ts > now + limit
        if not ahead.any():
            return decoded
        offsets = decoded.offsets
        for i in np.flatnonzero(ahead).tolist():
            rejected.append(
                ParseError(
                    "too_early",
                    f"event time {decoded.ts[i]!r} is more than input.max_future_seconds="
                    f"{limit:g} ahead of the clock ({now:.0f}); check the sender's clock",
                    offset=None if offsets is None else offsets[i],
                    raw=decoded.raw(i),
                )
            )
        keep = np.flatnonzero(~ahead).tolist()

        def pick(values: list[Any] | None) -> list[Any] | None:
            return None if values is None else [values[i] for i in keep]

        if decoded.tokens is not None:
            return Decoded(
                None,
                pick(decoded.ts),
                pick(decoded.offsets),
                [],
                decoded.source,
                pick(decoded.raws),
                tokens=decoded.tokens.select(~ahead),
            )
        return Decoded(
            [decoded.baskets[i] for i in keep],
            pick(decoded.ts),
            pick(decoded.offsets),
            [],
            decoded.source,
            pick(decoded.raws),
        )

    def count_rejected(self, errors: list[ParseError]) -> None:
        """Count records set aside before they reached :meth:`add` (e.g. by a source)."""
        self.rejected_counts.update(e.reason for e in errors)

    def flush(self) -> None:
        """Count every buffered transaction now (end of a finite input)."""
        self.engine.flush()

    # -- pane close ---------------------------------------------------------------------------

    def _on_pane_closed(self, engine: Engine) -> None:
        if self._pane_listeners and engine.last_closed is not None:
            for pane_listener in self._pane_listeners:
                pane_listener(engine.last_closed, engine.vocabulary.names)
        if self.monitor is None:
            return
        fired, window = self.monitor.evaluate_close(engine)
        for amender in self._amenders:
            fired = amender(fired)
        self.last_close = window
        self.closes += 1
        records = [a.as_dict() for a in fired]
        if records:
            self.alert_history.extend(records)
            self.alert_counts.update(str(r["kind"]) for r in records)
            if self.sinks is not None:
                for record in records:
                    self.sinks.emit(record)
            for listener in self._listeners:
                listener(records)
        for close_listener in self._close_listeners:
            close_listener(self.closes, window, records)

    def _on_remap(self, mapping: np.ndarray) -> None:
        if self.monitor is not None:
            self.monitor.remap(mapping)

    # -- views --------------------------------------------------------------------------------

    @property
    def rules_window(self) -> dict[str, Any] | None:
        """The window the rules were last evaluated on, as in every API answer."""
        return None if self.last_close is None else self.last_close.window_dict()

    def window(self) -> WindowSnapshot:
        """The current window's counts (counted transactions)."""
        return self.engine.snapshot()

    # -- persistence --------------------------------------------------------------------------

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """The whole counting state: engine, monitor, alert history and counts."""
        engine_meta, arrays = self.engine.state()
        monitor_meta = None
        if self.monitor is not None:
            monitor_meta, monitor_arrays = self.monitor.state()
            arrays.update(monitor_arrays)
        meta = {
            "engine": engine_meta,
            "monitor": monitor_meta,
            "alerts": list(self.alert_history)[-_CHECKPOINT_ALERTS:],
            "alert_counts": dict(self.alert_counts),
            "rejected_counts": dict(self.rejected_counts),
            "closes": self.closes,
            "catalogue": None if self.catalogue is None else self.catalogue.state(),
        }
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: dict[str, np.ndarray]) -> None:
        """Restore what :meth:`state` returned (into a fresh pipeline of the same settings).

        Raises ``KeyError``, ``ValueError`` or ``TypeError`` (or a
        :class:`~streamcount.errors.CheckpointError`) when the state does not fit.
        """
        self.engine = Engine.from_state(
            self.config.engine,
            meta["engine"],
            arrays,
            on_pane_closed=self._on_pane_closed,
            items=self._items(),
        )
        self.engine.on_remap = self._on_remap
        if self.catalogue is not None:
            self.catalogue.load_state(
                meta.get("catalogue"), self.engine.next_seq, self._pane_spans()
            )
        else:
            check_saved_levels(meta.get("catalogue"), self.config.items)
        if self.monitor is not None:
            self.monitor.load_state(meta.get("monitor") or {}, arrays)
        self.alert_history.clear()
        self.alert_history.extend(meta.get("alerts", []))
        self.alert_counts = Counter(meta.get("alert_counts", {}))
        self.rejected_counts = Counter(meta.get("rejected_counts", {}))
        self.closes = int(meta.get("closes", 0))

    def check_invariants(self) -> None:
        """Assert the engine's invariants (the monitor's own come with the detectors)."""
        self.engine.check_invariants()
