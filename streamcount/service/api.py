"""The JSON API's answers, computed from an immutable view the service loop publishes.

:class:`ServiceApi` implements :class:`~streamcount.service.server.ApiBackend`. HTTP threads
only read the latest :class:`View` (swapped by reference, never mutated) and hand ingest bodies
to the ``http`` source's queue, so a request never blocks counting and never sees a half-made
state. Every answer that describes counts names the window it was computed on, and every
answer the page uses carries ``as_of``: the pane-close number and the window's last sequence
number of the view it was read from, so a reader combines only answers of one view.

With a catalogue (``items.catalogue`` / ``items.levels``), the answers that name items
(``/v1/rules``, ``/v1/itemsets``, ``/v1/history``) carry one top-level ``item_details`` map for
the items they name (:func:`streamcount.catalogue.view.item_details`: level and display name,
only for items the catalogue knows), so a name that appears in many rules is described once;
without a catalogue the key is left out. Alert records carry their own (made when raised).
"""

from __future__ import annotations

import time
from collections import deque
from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import Future
from concurrent.futures import TimeoutError as FutureTimeout
from dataclasses import dataclass, field
from typing import Any

from streamcount.alerts.listing import ListedRule, RuleKey
from streamcount.catalogue.view import ItemDetails, item_details
from streamcount.config.settings import PageConfig
from streamcount.engine.snapshot import EngineStatistics, WindowSnapshot
from streamcount.errors import InputError
from streamcount.intake.sources import IngestReceipt
from streamcount.rules.derive import Rule
from streamcount.service.history import HistoryView
from streamcount.service.server import RULE_SORTS

__all__ = ["ServiceApi", "View", "rule_notes"]


@dataclass(frozen=True, slots=True)
class View:
    """What the HTTP threads read: built by the loop, never changed afterwards."""

    window: WindowSnapshot
    statistics: EngineStatistics
    rules: tuple[Rule, ...]
    alerts: tuple[dict[str, Any], ...]
    status: dict[str, Any] = field(default_factory=dict)
    #: the window the rules were last evaluated on (at the last pane close)
    rules_window: dict[str, Any] | None = None
    #: the panes (index, counted) the window was summed from
    window_key: tuple[tuple[int, int], ...] = ()
    #: ``{"pane_close", "last_seq"}``: pane closes evaluated and the window's last sequence
    #: number; every answer read from this view carries it
    as_of: Mapping[str, int] = field(default_factory=lambda: {"pane_close": 0, "last_seq": 0})
    #: the per-pane-close history (``None``: none kept)
    history: HistoryView | None = None
    #: per active rule (by key): ``since_seq``, ``since_pane``, ``last_change``
    rule_notes: Mapping[tuple[tuple[str, ...], tuple[str, ...]], Mapping[str, Any]] = field(
        default_factory=dict
    )
    #: names the rules' content: the pane close and last sequence number they were measured on
    rules_version: str = "0.0"


_SORT_KEYS: dict[str, Callable[[Rule], float]] = {
    "lift": lambda r: r.lift.value,
    "confidence": lambda r: r.confidence.value,
    "support": lambda r: r.support.value,
}
assert tuple(_SORT_KEYS) == RULE_SORTS


#: ``orders_per_second`` in ``/v1/status``: accepted transactions over about this many seconds
_RATE_SECONDS = 10.0


class ServiceApi:
    """The API backend of a running service.

    Parameters
    ----------
    view:
        The first view (the loop replaces it with :meth:`publish`).
    metrics_payload:
        Renders ``/metrics`` (body, content type).
    min_support:
        ``rules.min_support``: the default threshold of ``/v1/itemsets``.
    ingest:
        Queues an ingest body and returns a future of what became of it (the ``http``
        source's), or ``None`` when HTTP ingest is off.
    ingest_timeout_seconds:
        How long a POST waits for the loop to count its body.
    stale_seconds:
        ``/healthz`` fails when the loop has not turned for this long.
    page:
        The page's settings (``page.*``).
    max_itemset_size:
        ``engine.max_itemset_size`` (``/v1/history`` refuses larger itemsets).
    clock:
        Wall time, for the event lag in ``/v1/status``.
    catalogue:
        A catalogue file is configured (``items.catalogue``): answers carry ``item_details``.
    """

    def __init__(
        self,
        view: View,
        *,
        metrics_payload: Callable[[], tuple[bytes, str]],
        min_support: float,
        ingest: Callable[[bytes], Future[IngestReceipt]] | None = None,
        ingest_timeout_seconds: float = 10.0,
        stale_seconds: float = 30.0,
        page: PageConfig | None = None,
        max_itemset_size: int = 3,
        clock: Callable[[], float] = time.time,
        catalogue: bool = False,
    ) -> None:
        self._view = view
        self._metrics_payload = metrics_payload
        self._min_support = min_support
        self._ingest = ingest
        self._ingest_timeout = ingest_timeout_seconds
        self._stale = stale_seconds
        self._ready = False
        self._sources_ready = True
        self._last_turn = time.monotonic()
        self._page = page if page is not None else PageConfig()
        self._max_itemset_size = int(max_itemset_size)
        self._clock = clock
        self._catalogue = bool(catalogue)
        #: (monotonic time, transactions_seen) at each publish, for orders_per_second
        self._seen: deque[tuple[float, int]] = deque(maxlen=256)
        #: the last full rules answer: (view, arguments, answer); pages open on one service
        #: ask the same question of the same view, so it is built once per view
        self._rules_cache: tuple[View, tuple[Any, ...], dict[str, Any]] | None = None
        #: the item details of the last view's window (its name index is built once)
        self._details: tuple[WindowSnapshot, ItemDetails] | None = None

    # -- called by the loop -------------------------------------------------------------------

    def publish(self, view: View) -> None:
        """Make ``view`` the one requests read (an atomic reference swap)."""
        self._seen.append((time.monotonic(), view.statistics.transactions_seen))
        self._view = view

    @property
    def view(self) -> View:
        return self._view

    def set_ready(self, ready: bool) -> None:
        self._ready = ready

    def set_sources_ready(self, ready: bool) -> None:
        """False while a source cannot deliver (a message bus that is away): /readyz says so
        while the service itself stays up."""
        self._sources_ready = ready

    def beat(self) -> None:
        """The loop is alive (one turn done)."""
        self._last_turn = time.monotonic()

    def _add_details(self, view: View, answer: dict[str, Any], names: Iterable[str]) -> None:
        """Put the ``item_details`` of ``names`` into ``answer`` when a catalogue is in force."""
        cached = self._details
        if cached is None or cached[0] is not view.window:
            cached = (view.window, ItemDetails(view.window, catalogue=self._catalogue))
            self._details = cached  # one reference swap: safe across threads
        details = item_details(cached[1], names)
        if details is not None:
            answer["item_details"] = details

    # -- ApiBackend ---------------------------------------------------------------------------

    def ingest_enabled(self) -> bool:
        return self._ingest is not None

    def metrics_payload(self) -> tuple[bytes, str]:
        return self._metrics_payload()

    def healthy(self) -> bool:
        return time.monotonic() - self._last_turn < self._stale

    def ready(self) -> bool:
        return self._ready and self._sources_ready

    def page_enabled(self) -> bool:
        """Whether ``GET /`` serves the page (``page.enabled``)."""
        return self._page.enabled

    def status(self) -> dict[str, Any]:
        view = self._view
        out = dict(view.status)
        # a time-based window tracks the newest event time; a count-based one has the newest
        # counted order's
        newest = view.statistics.max_event_ts
        if newest is None:
            newest = view.window.last_ts
        lag = None if newest is None else max(0.0, self._clock() - newest)
        out["event_lag_seconds"] = lag
        out["orders_per_second"] = self._rate()
        out["page"] = {"refresh_seconds": self._page.refresh_seconds}
        return out

    def _rate(self) -> float:
        """Transactions accepted per second over the last ``_RATE_SECONDS`` (wall clock)."""
        samples = list(self._seen)
        if not samples:
            return 0.0
        now = time.monotonic()
        newest = samples[-1][1]
        start = next((s for s in reversed(samples) if now - s[0] >= _RATE_SECONDS), samples[0])
        elapsed = now - start[0]
        return (newest - start[1]) / elapsed if elapsed > 0 else 0.0

    def itemsets(self, min_support: float | None, size: int | None, limit: int) -> dict[str, Any]:
        view = self._view
        support = self._min_support if min_support is None else min_support
        out = []
        names: set[str] = set()
        for s in view.window.frequent(support, sizes=None if size is None else [size]):
            out.append(s.as_dict())
            names.update(s.items)
            if len(out) >= limit:
                break
        answer = {
            "as_of": dict(view.as_of),
            "window": view.window.window_dict(),
            "min_support": support,
            "itemsets": out,
        }
        self._add_details(view, answer, names)
        return answer

    def rules(
        self,
        sort: str,
        limit: int,
        min_confidence: float | None,
        min_lift: float | None,
        min_support: float | None,
        since: str | None = None,
    ) -> dict[str, Any]:
        """The active rules; with ``since`` equal to the ``version`` of the current rules, only
        ``{"as_of", "version", "window", "unchanged": true}`` (the reader has them)."""
        view = self._view
        window = view.rules_window or view.window.window_dict()
        if since is not None and since == view.rules_version:
            return {
                "as_of": dict(view.as_of),
                "version": view.rules_version,
                "window": window,
                "unchanged": True,
            }
        args = (sort, limit, min_confidence, min_lift, min_support)
        cached = self._rules_cache
        if cached is not None and cached[0] is view and cached[1] == args:
            return cached[2]
        chosen = [
            r
            for r in view.rules
            if (min_confidence is None or r.confidence.value >= min_confidence)
            and (min_lift is None or r.lift.value >= min_lift)
            and (min_support is None or r.support.value >= min_support)
        ]
        if sort not in _SORT_KEYS:
            raise InputError(f"sort = {sort!r}: must be one of {list(RULE_SORTS)}")
        chosen.sort(key=_SORT_KEYS[sort], reverse=True)
        notes = view.rule_notes
        blank = {"since_seq": None, "since_pane": None, "last_change": None}
        answer = {
            "as_of": dict(view.as_of),
            "version": view.rules_version,
            # rules are evaluated at pane close: this is the window they were measured on
            "window": window,
            "rules": [{**r.as_dict(), **notes.get(r.key, blank)} for r in chosen[:limit]],
        }
        self._add_details(view, answer, (name for r in chosen[:limit] for name in r.items))
        self._rules_cache = (view, args, answer)  # one reference swap: safe across threads
        return answer

    def alerts(self, since: int | None, limit: int) -> dict[str, Any]:
        view = self._view
        items = [a for a in view.alerts if since is None or int(a["seq"]) > since]
        return {"as_of": dict(view.as_of), "alerts": items[-limit:]}

    def history(self, items: list[str], since: int | None) -> dict[str, Any]:
        """The history of one itemset after pane close ``since``; for an itemset with no
        history, ``points: []`` and ``followed: false``.

        Raises
        ------
        InputError
            For no item, an empty name or more items than ``engine.max_itemset_size``.
        """
        names = sorted(set(items))
        if not names or any(not n for n in names):
            raise InputError("items: give the itemset's names, one items= parameter per item")
        if len(names) > self._max_itemset_size:
            raise InputError(
                f"items: {len(names)} items; itemsets of at most engine.max_itemset_size = "
                f"{self._max_itemset_size} are counted"
            )
        view = self._view
        history = view.history
        key = tuple(names)
        since_seq = None if since is None or history is None else history.last_seq_of(since)
        alerts = [
            {k: a.get(k) for k in ("id", "kind", "seq", "pane", "event_time", "also")}
            for a in view.alerts
            if tuple(sorted(a["items"])) == key and (since_seq is None or int(a["seq"]) > since_seq)
        ]
        summary = history.summary() if history is not None else {}
        answer = {
            "as_of": dict(view.as_of),
            "items": names,
            "since": since,
            "followed": history is not None and key in history.followed,
            "first_close": summary.get("first_close"),
            "last_close": summary.get("last_close"),
            "max_points": summary.get("max_points"),
            "points": [] if history is None else history.points_of(names, since),
            "alerts": alerts,
        }
        self._add_details(view, answer, names)
        return answer

    def ingest(self, body: bytes, content_type: str) -> dict[str, Any]:
        """Queue a body for the loop, wait until it is counted, answer what became of it."""
        if self._ingest is None:
            raise InputError(
                "HTTP ingest is off; add 'http' to input.source (e.g. input.source: "
                "[file, http]) to accept POST /v1/transactions"
            )
        receipt_future = self._ingest(body)
        try:
            receipt = receipt_future.result(timeout=self._ingest_timeout)
        except FutureTimeout:
            return {"accepted": None, "queued": True, "rejected": []}
        if receipt.rejected and not receipt.accepted:
            first = receipt.rejected[0]
            raise InputError(
                f"no valid transaction in the body; line {first['line']}: {first['reason']}: "
                f"{first['detail']}"
            )
        return {"accepted": receipt.accepted, "rejected": receipt.rejected}


def rule_notes(
    listed: Sequence[ListedRule], alerts: Sequence[Mapping[str, Any]]
) -> dict[RuleKey, dict[str, Any]]:
    """Per active rule (by key): since when it is active and its last change, with that alert's
    evidence while the record is still held (``alerts.history``).

    Parameters
    ----------
    listed:
        The listing's active rules (read on the loop's thread, copied here).
    alerts:
        The alert records held, to find each last change's evidence by id.
    """
    by_id: dict[str, Mapping[str, Any]] | None = None
    out = {}
    for state in listed:
        change = None
        if state.last_change is not None:
            if by_id is None:
                by_id = {str(a["id"]): a for a in alerts}
            change = dict(state.last_change)
            record = by_id.get(str(change.get("id")))
            change["evidence"] = None if record is None else record.get("evidence")
        out[state.rule.key] = {
            "since_seq": int(state.since_seq),
            "since_pane": int(state.since_pane),
            "last_change": change,
        }
    return out
