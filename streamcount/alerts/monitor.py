"""The rule monitor: at each pane close, the rule list, the change tests and the alerts.

:class:`RuleMonitor` is called once per pane close. It

1. re-derives the rules on the window (:class:`~.listing.RuleListing`: the active rules, with
   hysteresis; joining or leaving the list is not an alert);
2. feeds the closed pane's counts of every candidate itemset to the change tests
   (:class:`~.tracker.ChangeTracker`: Page's CUSUM, up and down, per itemset);
3. splits the false-alert budget over the tests that could alert at this pane and asks each
   detector (:mod:`.detectors`: emerged, surged, faded) for its alerts.

The false-alert budget
----------------------
``alerts.false_alerts_per_million`` (``B``, default 1) is the expected number of false alerts
per million transactions on a stationary feed, shared by every kind. At a pane of ``n``
transactions, ``M`` tests could alert (the itemsets each detector finds eligible, times the
alternatives): each test fires at ``S >= h`` with ``h = ln(10^6 M / (B n))``, so its false-alarm
chance per pane is at most ``exp(-h) = B n / (10^6 M)`` (Ville's inequality, when the reference
rate is right) and the expected false alerts per million transactions at most ``B``, whatever
the dependence between tests (a union bound). It holds for count- and time-based panes (``n``
varies) and assumes independent baskets and rates that stay constant between changes; daily
seasonality and bulk or repeated orders break it (the README says how far, measured). Every
alert record and ``/v1/status`` carry the budget, the number of tests and the threshold in force.

Warm-up: until the first window is full the rules and tests advance but no alert is sent; a test
that fires then is restarted silently, so what is already there when warm-up ends is the
starting state. Alerts are signals for a person to review, not decisions.

References
----------
Page, E. S. Continuous inspection schemes. Biometrika 41, 1954.
Lorden, G. Procedures for reacting to a change in distribution. Ann. Math. Statist. 42, 1971.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from dataclasses import replace
from typing import Any, Protocol

import numpy as np

from streamcount.alerts.cusum import threshold
from streamcount.alerts.detectors import (
    Budget,
    Detector,
    EmergedDetector,
    FadedDetector,
    PaneClose,
    Raised,
    SurgedDetector,
)
from streamcount.alerts.listing import RuleListing
from streamcount.alerts.record import Alert
from streamcount.alerts.tracker import CANDIDATE_SHARE, ChangeTracker
from streamcount.catalogue.view import ItemDetails, item_details
from streamcount.config.settings import AlertsConfig, RulesConfig
from streamcount.engine.pane import Pane
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import CheckpointError
from streamcount.rules.derive import Rule

__all__ = ["RuleMonitor"]

logger = logging.getLogger(__name__)

_STATE_VERSION = 2


class _EngineView(Protocol):
    """What :meth:`RuleMonitor.evaluate_close` needs of the engine (no import of it here)."""

    @property
    def window_full(self) -> bool: ...

    @property
    def window_panes(self) -> int: ...

    @property
    def last_closed(self) -> Pane | None: ...

    def split_snapshot(
        self, recent_panes: int
    ) -> tuple[WindowSnapshot, WindowSnapshot, WindowSnapshot]: ...

    def pane_snapshot(self, pane: Pane) -> WindowSnapshot: ...

    def pane_start_time(self, pane: Pane) -> float | None: ...


class RuleMonitor:
    """Rules, change tests and alerts, from pane close to pane close.

    Parameters
    ----------
    rules:
        The rule thresholds (the practical floor) and the list's hysteresis.
    alerts:
        The false-alert budget, surge settings, families, reference length.
    max_itemset_size:
        Largest itemset size counted (change tests run on sizes 2 and up).
    window_panes:
        Panes in a full window (a followed surge is let go after one window).
    item_details:
        A catalogue file is configured (``items.catalogue``): each alert carries the level and
        display name of its items (:func:`~streamcount.catalogue.view.item_details`).
    """

    def __init__(
        self,
        rules: RulesConfig,
        alerts: AlertsConfig,
        *,
        max_itemset_size: int = 3,
        window_panes: int = 10,
        item_details: bool = False,
    ) -> None:
        self.rules_config = rules
        self.alerts_config = alerts
        self.listing = RuleListing(rules)
        self.tracker = ChangeTracker(max_itemset_size, baseline_panes=alerts.baseline_panes)
        self.surged = SurgedDetector(alerts, window_panes)
        self.detectors: list[Detector] = [EmergedDetector(alerts), FadedDetector(alerts)]
        if alerts.surge:
            self.detectors.insert(1, self.surged)
        self.window_panes = int(window_panes)
        self.item_details = bool(item_details)
        self._evaluations = 0
        self._warm_done = False
        #: first sequence number and start time of recent panes (for change points)
        self._pane_starts: dict[int, tuple[int, float | None]] = {}
        self.budget: Budget | None = None

    # ------------------------------------------------------------------ views
    @property
    def evaluations(self) -> int:
        """Evaluations so far (pane closes seen)."""
        return self._evaluations

    @property
    def active_rules(self) -> list[Rule]:
        """Active rules with their latest measures, best lift (low end) first."""
        return [s.rule for s in self.listing.active()]

    # ------------------------------------------------------------------ evaluation
    def evaluate_close(self, engine: _EngineView) -> tuple[list[Alert], WindowSnapshot]:
        """:meth:`evaluate` on an engine right after a pane closed; returns the alerts and the
        window they were evaluated on."""
        pane = engine.last_closed
        assert pane is not None, "evaluate_close is called after a pane closed"
        window, recent, _ = engine.split_snapshot(self.alerts_config.recent_panes)
        alerts = self.evaluate(
            window,
            engine.pane_snapshot(pane),
            recent,
            pane=pane.index,
            pane_first_seq=pane.first_seq,
            pane_start_time=engine.pane_start_time(pane),
            warm=engine.window_full,
        )
        return alerts, window

    def evaluate(
        self,
        window: WindowSnapshot,
        pane_counts: WindowSnapshot,
        recent: WindowSnapshot,
        *,
        pane: int,
        pane_first_seq: int = 0,
        pane_start_time: float | None = None,
        warm: bool = True,
    ) -> list[Alert]:
        """Update the rule list and the change tests with one closed pane; the alerts.

        Parameters
        ----------
        window:
            The whole window at this close.
        pane_counts:
            The closed pane alone.
        recent:
            The ``alerts.recent_panes`` newest panes (surge minimum count).
        pane, pane_first_seq, pane_start_time:
            The closed pane's index (increasing), first sequence number and start time.
        warm:
            False until the first window is full: state advances, no alert is returned.
        """
        self._evaluations += 1
        seq = int(window.last_seq)
        self._pane_starts[pane] = (int(pane_first_seq), pane_start_time)
        horizon = pane - 4 * (self.window_panes + int(self.alerts_config.baseline_panes))
        for old in [p for p in self._pane_starts if p < horizon]:
            del self._pane_starts[old]
        entry = self.listing.update(window, seq=seq, pane=pane)
        tracker = self.tracker
        tracker.rekey(len(window.item_names))
        keep = self._keep(window)
        floor = CANDIDATE_SHARE * self.rules_config.min_support * window.transactions
        tracker.sync(window, pane_counts, floor_count=floor, keep=keep)
        close = PaneClose(
            seq,
            window.last_ts,
            pane,
            window,
            pane_counts,
            recent,
            entry,
            self.listing,
            tracker,
            self._pane_starts,
        )
        for size, keys in self.surged.expire(close).items():
            tracker.rebase(size, keys[tracker.banks[size].contains(keys)], "up")
        eligible = {det.kind: self._candidates(det.eligible(close)) for det in self.detectors}
        tests = tracker.n_alternatives * sum(
            int(k.size) for keys in eligible.values() for k in keys.values()
        )
        n = int(pane_counts.transactions)
        h = float(threshold(self.alerts_config.false_alerts_per_million, tests, n))
        self.budget = Budget(self.alerts_config.false_alerts_per_million, tests, h)
        alarms = tracker.update(pane_counts, pane_index=pane, threshold=h)
        if not warm:
            # warm-up: what changes now is the starting state, restarted silently
            for size, found in alarms.items():
                for direction in ("up", "down"):
                    tracker.rebase(size, found.of(direction), direction)
            return []
        if not self._warm_done:
            self._warm_done = True
            logger.info(
                "alert warm-up over at seq %d: %d rules active, %d itemsets followed for "
                "changes (starting state, not alerted)",
                seq,
                len(self.listing.active()),
                tracker.candidates(),
            )
        raised: list[Raised] = []
        for det in self.detectors:
            raised.extend(det.fire(close, eligible[det.kind], alarms, self.budget))
        return self._notify(raised, window)

    def _candidates(self, keys: Mapping[int, np.ndarray]) -> dict[int, np.ndarray]:
        """Keep only keys the tracker follows (the others have no test to charge)."""
        out = {}
        for size, k in keys.items():
            bank = self.tracker.banks.get(size)
            if bank is not None and k.size:
                out[size] = k[bank.contains(k)]
        return out

    def _keep(self, window: WindowSnapshot) -> dict[int, np.ndarray]:
        """Itemsets followed whatever their counts: followed rules and latched surges."""
        index = {name: i for i, name in enumerate(window.item_names)}
        rows: dict[int, list[list[int]]] = {}
        for state in self.listing.rules.values():
            names = state.rule.items
            if len(names) >= 2 and all(name in index for name in names):
                rows.setdefault(len(names), []).append(sorted(index[name] for name in names))
        out = {
            k: self.tracker.keys_of(np.array(v, dtype=np.int32))
            for k, v in rows.items()
            if k in self.tracker.banks
        }
        for size, keys in self.surged.keep(self.tracker).items():
            out[size] = np.concatenate([out.get(size, np.zeros(0, dtype=np.int64)), keys])
        return out

    def _notify(self, raised: list[Raised], window: WindowSnapshot) -> list[Alert]:
        """One notification per itemset (an itemset that emerges and surges at once is one
        ``emerged`` alert that also names ``surged``); restart the tests of what was sent.
        With a catalogue, each alert carries the level and display name of its items
        (``item_details``, read from ``window``)."""
        merged: dict[tuple[int, int], Raised] = {}
        for r in raised:
            key = (r.size, r.key)
            first = merged.get(key)
            if first is None:
                merged[key] = r
            elif r.alert.kind not in first.alert.also and r.alert.kind != first.alert.kind:
                also = (*first.alert.also, r.alert.kind)
                merged[key] = Raised(
                    replace(first.alert, also=also), first.size, first.key, first.rebase
                )
        for r in merged.values():
            if r.rebase is not None:
                self.tracker.rebase(r.size, np.array([r.key]), r.rebase)
        out = [r.alert for r in merged.values()]
        if out and self.item_details:
            details = ItemDetails(window, catalogue=True)
            out = [replace(a, item_details=item_details(details, a.items)) for a in out]
        out.sort(key=lambda a: (a.kind, len(a.items), a.items))
        if out:
            logger.debug("pane close at seq %d: %d alerts", out[0].seq, len(out))
        return out

    def remap(self, mapping: np.ndarray) -> None:
        """The engine compacted its vocabulary: renumber every id the monitor holds."""
        self.tracker.remap(mapping)
        self.surged.remap(mapping)

    # ------------------------------------------------------------------ checkpoints
    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able state plus the change tests' arrays."""
        tracker_meta, arrays = self.tracker.state()
        meta = {
            "version": _STATE_VERSION,
            "evaluations": self._evaluations,
            "warm_done": self._warm_done,
            "listing": self.listing.state_dict(),
            "tracker": tracker_meta,
            "surged": self.surged.state_dict(),
            "pane_starts": [[p, s, t] for p, (s, t) in sorted(self._pane_starts.items())],
        }
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        """Restore what :meth:`state` wrote; :class:`CheckpointError` when unusable."""
        if not isinstance(meta, Mapping) or meta.get("version") != _STATE_VERSION:
            found = meta.get("version") if isinstance(meta, Mapping) else type(meta).__name__
            raise CheckpointError(
                f"alert monitor state: version {found!r} is not {_STATE_VERSION}; "
                "start with --fresh or use the streamcount version that wrote it"
            )
        try:
            self.listing.load_state(meta["listing"])
            self.tracker.load_state(meta["tracker"], arrays)
            self.surged.load_state(meta["surged"])
            self._evaluations = int(meta["evaluations"])
            self._warm_done = bool(meta["warm_done"])
            self._pane_starts = {int(p): (int(s), t) for p, s, t in meta["pane_starts"]}
        except (KeyError, TypeError, ValueError) as exc:
            raise CheckpointError(f"alert monitor state is malformed: {exc!r}") from exc

    def check_invariants(self) -> None:
        self.listing.check_invariants()
        self.tracker.check_invariants()
        for det in self.detectors:
            det.check_invariants()
