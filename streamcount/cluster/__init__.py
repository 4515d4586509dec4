"""Scale-out over NATS JetStream: partitioned workers and one merger (``cluster.*``).

::

    orders.0 ──> worker w1 ──┐                       ┌──> rules, alerts, sinks,
                             ├──> PANES (panes.*) ──> merger      metrics, HTTP API
    orders.1 ──> worker w2 ──┘

Each worker is ``streamcount run`` with ``cluster.role: worker`` on one partition's subject; it
counts its orders into time-based panes on their own timestamps (so every worker's pane ``k``
covers the same span) and publishes each closed pane's Lossy Counting summary
(:mod:`streamcount.cluster.worker`). The merger, ``streamcount merge`` (``cluster.role:
merger``), merges the panes of one index as they complete and runs rules and alerts on the
merged window (:mod:`streamcount.cluster.merger`, :mod:`streamcount.cluster.collect`).
JetStream does the delivery, persistence, redelivery and partitioning; the wire format is
:mod:`streamcount.engine.wire`, the merge :mod:`streamcount.engine.merged`.

Guarantee: the merged counts keep Lossy Counting's bounds with ``max_error`` the sum of the
parts' bounds; with epsilon 0 and no pane closed by the timeout, the merged window equals one
process's on the same orders. Nothing is lost or counted twice when any process dies (input is
acknowledged only after the panes holding it are on the bus; the merger checkpoints the
summaries' stream sequence with the parts of its open panes).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from streamcount.config.settings import Config

if TYPE_CHECKING:
    from streamcount.service.extension import ServiceExtension

__all__ = ["build_extension"]


def build_extension(config: Config) -> ServiceExtension:
    """The service extension for ``cluster.role`` (``worker`` or ``merger``).

    Raises
    ------
    ValueError
        ``cluster.role`` is not set.
    """
    role = config.cluster.role
    if role == "worker":
        from streamcount.cluster.worker import WorkerExtension

        return WorkerExtension(config)
    if role == "merger":
        from streamcount.cluster.merger import MergerExtension

        return MergerExtension(config)
    raise ValueError(f"cluster.role = {role!r}: no extension for it")
