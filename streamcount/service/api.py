"""The JSON API's answers, computed from an immutable view the service loop publishes.

:class:`ServiceApi` implements :class:`~streamcount.service.server.ApiBackend`. HTTP threads
only read the latest :class:`View` (swapped by reference, never mutated) and hand ingest bodies
to the ``http`` source's queue, so a request never blocks counting and never sees a half-made
state. Every answer that describes counts names the window it was computed on.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from concurrent.futures import Future
from concurrent.futures import TimeoutError as FutureTimeout
from dataclasses import dataclass, field
from typing import Any

from streamcount.engine.snapshot import EngineStatistics, WindowSnapshot
from streamcount.errors import InputError
from streamcount.intake.sources import IngestReceipt
from streamcount.rules.derive import Rule
from streamcount.service.server import RULE_SORTS

__all__ = ["ServiceApi", "View"]


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


_SORT_KEYS: dict[str, Callable[[Rule], float]] = {
    "lift": lambda r: r.lift.value,
    "confidence": lambda r: r.confidence.value,
    "support": lambda r: r.support.value,
}
assert tuple(_SORT_KEYS) == RULE_SORTS


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

    # -- called by the loop -------------------------------------------------------------------

    def publish(self, view: View) -> None:
        """Make ``view`` the one requests read (an atomic reference swap)."""
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

    # -- ApiBackend ---------------------------------------------------------------------------

    def ingest_enabled(self) -> bool:
        return self._ingest is not None

    def metrics_payload(self) -> tuple[bytes, str]:
        return self._metrics_payload()

    def healthy(self) -> bool:
        return time.monotonic() - self._last_turn < self._stale

    def ready(self) -> bool:
        return self._ready and self._sources_ready

    def status(self) -> dict[str, Any]:
        return self._view.status

    def itemsets(self, min_support: float | None, size: int | None, limit: int) -> dict[str, Any]:
        view = self._view
        support = self._min_support if min_support is None else min_support
        out = []
        for s in view.window.frequent(support, sizes=None if size is None else [size]):
            out.append(s.as_dict())
            if len(out) >= limit:
                break
        return {"window": view.window.window_dict(), "min_support": support, "itemsets": out}

    def rules(
        self,
        sort: str,
        limit: int,
        min_confidence: float | None,
        min_lift: float | None,
        min_support: float | None,
    ) -> dict[str, Any]:
        view = self._view
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
        return {
            # rules are evaluated at pane close: this is the window they were measured on
            "window": view.rules_window or view.window.window_dict(),
            "rules": [r.as_dict() for r in chosen[:limit]],
        }

    def alerts(self, since: int | None, limit: int) -> dict[str, Any]:
        items = [a for a in self._view.alerts if since is None or int(a["seq"]) > since]
        return {"alerts": items[-limit:]}

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
