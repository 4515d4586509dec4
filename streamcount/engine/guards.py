"""What sets a transaction aside before it is counted: no items, too many distinct items, and
for a time-based window a missing, implausible or too late event time.

Pure functions of the chunk and a few numbers of the engine's state, so the engine can ask
what it would accept without changing anything (:meth:`~streamcount.engine.Engine.screen`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from streamcount.config.settings import MAX_TIMESTAMP

__all__ = ["AddResult", "Rejection", "size_guards", "time_guards"]


@dataclass(frozen=True, slots=True)
class Rejection:
    """A transaction the engine set aside: its position in the call's input, reason, detail."""

    index: int
    reason: str
    detail: str


@dataclass(frozen=True, slots=True)
class AddResult:
    """What one call that adds transactions (or a counted pane) to the engine did."""

    accepted: int
    rejections: tuple[Rejection, ...] = ()
    panes_closed: int = 0
    #: sequence number of the last accepted transaction after this call
    last_seq: int = 0
    rejected_by_reason: dict[str, int] = field(default_factory=dict)


def size_guards(
    lengths_raw: np.ndarray, distinct: np.ndarray, cap: int, rejections: list[Rejection]
) -> np.ndarray:
    """Empty baskets (``empty``) and baskets of more than ``cap`` distinct items
    (``too_many_items``); returns the rows left.

    >>> rej = []
    >>> size_guards(np.array([0, 2, 3]), np.array([0, 2, 3]), 2, rej).tolist()
    [False, True, False]
    >>> [(r.index, r.reason) for r in rej]
    [(0, 'empty'), (2, 'too_many_items')]
    """
    ok = lengths_raw > 0
    for i in np.flatnonzero(~ok).tolist():
        rejections.append(Rejection(i, "empty", "transaction has no items"))
    for i in np.flatnonzero(ok & (distinct > cap)).tolist():
        ok[i] = False
        rejections.append(
            Rejection(
                i,
                "too_many_items",
                f"{int(distinct[i])} distinct items > max_basket_items={cap}; "
                "raise max_basket_items to count such baskets",
            )
        )
    return ok


def time_guards(
    t: int,
    timestamps: Sequence[float | None] | np.ndarray | None,
    ok: np.ndarray,
    rejections: list[Rejection],
    *,
    pane_seconds: float | None,
    watermark: float | None,
    lateness: float,
    closed_through: int,
    expired_through: int,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Event times as floats (NaN: none) and, for a time-based window (``pane_seconds``
    set), each row's pane; clears ``ok`` for rows without a usable time (``missing_field``,
    ``wrong_type``) or whose pane already closed (``too_late``: at or before
    ``closed_through``, behind the running watermark, or at or before ``expired_through``)."""
    ts = np.full(t, np.nan)
    if timestamps is not None:
        ts = np.array(timestamps, dtype=np.float64)  # None becomes NaN
    if pane_seconds is None:
        return ts, None
    missing = ok & np.isnan(ts)
    for i in np.flatnonzero(missing).tolist():
        rejections.append(Rejection(i, "missing_field", "a time-based window needs a timestamp"))
    ok &= ~missing
    with np.errstate(invalid="ignore"):
        odd = ok & ~(np.abs(ts) < MAX_TIMESTAMP)
    for i in np.flatnonzero(odd).tolist():
        rejections.append(
            Rejection(
                i,
                "wrong_type",
                f"event time {float(ts[i])!r} is not epoch seconds below "
                f"{MAX_TIMESTAMP:.0e} (milliseconds?)",
            )
        )
    ok &= ~odd
    pane_idx = np.zeros(t, dtype=np.int64)
    pane_idx[ok] = np.floor(ts[ok] / pane_seconds).astype(np.int64)
    # watermark seen by each transaction = running max of earlier event times
    prev = -np.inf if watermark is None else watermark
    filled = np.where(ok, ts, -np.inf)
    running = np.maximum.accumulate(np.concatenate(([prev], filled)))[:-1]
    closed_limit = np.floor((running - lateness) / pane_seconds) - 1
    late = ok & (
        (pane_idx <= np.maximum(closed_limit, closed_through)) | (pane_idx <= expired_through)
    )
    for i in np.flatnonzero(late).tolist():
        rejections.append(
            Rejection(
                i,
                "too_late",
                f"event time {float(ts[i])!r} falls in pane {int(pane_idx[i])}, "
                f"already closed (allowed_lateness_seconds={lateness})",
            )
        )
    ok &= ~late
    return ts, pane_idx
