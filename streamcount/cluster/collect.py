"""The merger's bookkeeping: summaries in, the panes to close out, in order.

:class:`PaneCollector` takes the summary messages of the summaries stream one at a time (in
stream order), rebuilds chunked payloads (:class:`~streamcount.engine.wire.Reassembler`),
checks each summary, keeps the parts of every open pane by worker, and says which panes are
due. It never touches the engine: :mod:`streamcount.cluster.merger` merges the parts it hands
out and closes the panes.

When a pane is complete
    A worker publishes its closed panes in index order, and an empty summary at its
    watermark when nothing else moved it; the stream keeps each worker's messages in that
    order. So a summary of pane ``j`` from worker ``w`` also says that ``w`` holds nothing for
    the panes below ``j`` it did not send. Pane ``k`` is complete when every expected worker
    has sent ``k`` or a later pane; every pane up to the lowest of the workers' newest panes
    (the *frontier*) closes at once, in order.

The timeout
    When the next pane is not complete and ``timeout`` seconds (wall clock) have passed since
    the first summary beyond the last closed pane arrived, the lowest pane holding a summary
    closes without the workers still missing, together with the empty panes before it; those
    runs of panes and the missing workers are kept (:attr:`PaneCollector.incomplete`). The
    clock runs only while the merger has read everything the stream holds (``caught_up``), so
    a backlog read after a restart never closes a pane early.

Late, duplicate, refused
    A summary of a pane already closed is a *duplicate* when that worker's summary of it was
    merged (a republish after a restart: dropped), else *late* (its pane closed by the timeout
    without it, or a worker that counted the pane differently the second time): never added,
    dead-lettered with its pane and worker. Damaged payloads (``bad_summary``), and summaries
    of another fingerprint or from a worker not expected (``foreign_summary``), are refused.
"""

from __future__ import annotations

import json
import logging
from collections import Counter
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from streamcount.engine.counters import Level
from streamcount.engine.wire import PaneMeta, Reassembler, WireError, decode_pane

__all__ = ["Close", "PaneCollector", "Part", "Received"]

logger = logging.getLogger(__name__)

#: closed panes whose merged workers are remembered (to tell a duplicate from a late summary)
_HORIZON_PANES = 10000
#: runs of incomplete panes remembered (for /v1/status and the evidence of alerts)
_INCOMPLETE_RUNS = 1000
#: chunks of a payload that never completes are dropped after this many pane timeouts
_HELD_TIMEOUTS = 10.0
#: bytes of the chunk header before the payload's SHA-256 (magic, version, flags)
_DIGEST_AT = 8


@dataclass(frozen=True, slots=True)
class Part:
    """One worker's summary of one pane, decoded, with the payload it came in."""

    meta: PaneMeta
    levels: tuple[Level, ...]
    names: list[str]
    payload: bytes
    arrived: float

    @property
    def worker(self) -> str:
        return self.meta.worker


@dataclass(frozen=True, slots=True)
class Received:
    """What became of one message.

    ``result``: ``held`` (a chunk waiting for the others), ``merged`` (kept for its pane),
    ``duplicate``, ``late`` or ``refused``; for ``late`` and ``refused``, the dead-letter
    ``reason``, a ``detail`` and a ``raw`` description (JSON) naming the pane and worker.
    """

    result: str
    reason: str | None = None
    detail: str = ""
    raw: str = ""
    worker: str | None = None
    pane: int | None = None


@dataclass(frozen=True, slots=True)
class Close:
    """A pane to close: its ``index``, the parts held for it, the workers missing (none when
    complete) and the runs of panes up to it closed incomplete (``(first, last, missing)``)."""

    index: int
    parts: tuple[Part, ...]
    how: str
    missing: tuple[str, ...] = ()
    runs: tuple[tuple[int, int, tuple[str, ...]], ...] = ()


@dataclass(slots=True)
class _Totals:
    received: Counter[str] = field(default_factory=Counter)
    closed: Counter[str] = field(default_factory=Counter)
    missing: Counter[str] = field(default_factory=Counter)
    late: Counter[str] = field(default_factory=Counter)
    #: panes merged from parts counted under different catalogue versions
    mixed_catalogue: int = 0


class PaneCollector:
    """The parts of every open pane, and which panes are due (module notes).

    Parameters
    ----------
    workers:
        The expected workers (``cluster.workers``).
    fingerprint:
        The merger's settings fingerprint; summaries with another are refused.
    epsilon, max_itemset_size:
        The merger's counting settings (checked again beside the fingerprint).
    timeout:
        ``cluster.pane_timeout_seconds``.
    """

    def __init__(
        self,
        workers: Sequence[str],
        *,
        fingerprint: str,
        epsilon: float,
        max_itemset_size: int,
        timeout: float,
    ) -> None:
        self.workers = tuple(workers)
        self.fingerprint = fingerprint
        self.epsilon = float(epsilon)
        self.max_itemset_size = int(max_itemset_size)
        self.timeout = float(timeout)
        #: every pane up to this one is closed (``None``: nothing yet)
        self.closed_through: int | None = None
        #: open panes: pane index -> worker -> part
        self.parts: dict[int, dict[str, Part]] = {}
        #: the newest pane each worker sent
        self.reported: dict[str, int] = {}
        #: runs ``(first, last, missing workers)`` of panes closed without some workers
        self.incomplete: list[tuple[int, int, tuple[str, ...]]] = []
        #: the latest panes whose parts came from different catalogue versions, with the
        #: version each worker sent (``none``: no catalogue)
        self.mixed_catalogue: list[tuple[int, dict[str, str]]] = []
        self.totals = _Totals()
        self._merged: dict[int, frozenset[str]] = {}
        self._reassembler = Reassembler()
        self._held: dict[bytes, tuple[float, list[bytes]]] = {}

    # -- summaries in --------------------------------------------------------------------------

    def receive(self, raw: bytes, now: float) -> Received:
        """Take one message of the summaries stream (a chunk of a payload)."""
        digest = bytes(raw[_DIGEST_AT : _DIGEST_AT + 32])
        waiting = self._held.get(digest)
        if waiting is not None and bytes(raw) in waiting[1]:
            # the same chunk published again (after a worker's restart, past the stream's
            # duplicate window) while its payload is incomplete here
            return self._count(Received("duplicate"))
        try:
            payload = self._reassembler.add(raw)
        except WireError as exc:
            return self._refuse("bad_summary", f"a summary chunk was refused: {exc}", None)
        if payload is None:
            chunks = self._held.setdefault(digest, (now, []))[1]
            chunks.append(bytes(raw))
            return self._count(Received("held"))
        self._held.pop(digest, None)
        try:
            meta, levels, names = decode_pane(payload)
        except WireError as exc:
            return self._refuse("bad_summary", f"a pane summary was refused: {exc}", None)
        problem = self._foreign(meta)
        if problem is not None:
            return self._refuse("foreign_summary", problem, meta)
        problem = _inconsistent(meta, levels)
        if problem is not None:
            return self._refuse("bad_summary", problem, meta)
        return self._keep(Part(meta, levels, names, payload, now))

    def _keep(self, part: Part) -> Received:
        pane, worker = part.meta.pane_index, part.worker
        if self.closed_through is not None and pane <= self.closed_through:
            if worker in self._merged.get(pane, ()):
                return self._count(Received("duplicate", worker=worker, pane=pane))
            self.totals.late[worker] += 1
            return self._count(
                Received(
                    "late",
                    "late_summary",
                    f"the summary of pane {pane} from worker {worker!r} ({part.meta.transactions} "
                    f"transactions) arrived after the pane was closed without it "
                    f"(cluster.pane_timeout_seconds = {self.timeout:g}); it is not counted",
                    _describe(part.meta),
                    worker,
                    pane,
                )
            )
        held = self.parts.setdefault(pane, {})
        if worker in held:
            return self._count(Received("duplicate", worker=worker, pane=pane))
        held[worker] = part
        self.reported[worker] = max(self.reported.get(worker, pane), pane)
        return self._count(Received("merged", worker=worker, pane=pane))

    def _foreign(self, meta: PaneMeta) -> str | None:
        if meta.worker not in self.workers:
            return (
                f"the summary of pane {meta.pane_index} comes from worker {meta.worker!r}, not "
                f"one of cluster.workers ({', '.join(self.workers)}); add it there to count it"
            )
        if meta.fingerprint != self.fingerprint:
            return (
                f"the summary of pane {meta.pane_index} from worker {meta.worker!r} was made "
                f"with settings fingerprint {meta.fingerprint[:12]}..., the merger's is "
                f"{self.fingerprint[:12]}...: the counting settings (engine.*, input.format) "
                "differ; give every worker and the merger the same ones"
            )
        if meta.epsilon != self.epsilon or meta.max_itemset_size != self.max_itemset_size:
            return (
                f"the summary of pane {meta.pane_index} from worker {meta.worker!r} counts "
                f"epsilon {meta.epsilon:g} and itemsets up to {meta.max_itemset_size}, the "
                f"merger {self.epsilon:g} and {self.max_itemset_size}"
            )
        return None

    def _refuse(self, reason: str, detail: str, meta: PaneMeta | None) -> Received:
        raw = _describe(meta) if meta is not None else ""
        worker = None if meta is None else meta.worker
        pane = None if meta is None else meta.pane_index
        return self._count(Received("refused", reason, detail, raw, worker, pane))

    def _count(self, received: Received) -> Received:
        if received.result != "held":
            self.totals.received[received.result] += 1
        return received

    # -- panes out -----------------------------------------------------------------------------

    def frontier(self) -> int | None:
        """The newest pane every expected worker has reached (``None``: one never reported)."""
        if any(w not in self.reported for w in self.workers):
            return None
        return min(self.reported[w] for w in self.workers)

    def _pending(self) -> list[int]:
        ct = self.closed_through
        return sorted(p for p in self.parts if ct is None or p > ct)

    def waiting_since(self) -> float | None:
        """When the first summary beyond the last closed pane arrived (``None``: none did)."""
        arrivals = [part.arrived for held in self.parts.values() for part in held.values()]
        return min(arrivals, default=None)

    def due(self, now: float, *, caught_up: bool) -> list[Close]:
        """The panes to close now, in index order (each is taken out of :attr:`parts`)."""
        out: list[Close] = []
        while True:
            ct = self.closed_through
            front = self.frontier()
            if front is not None and (ct is None or front > ct):
                for pane in self._pending():
                    if pane > front:
                        break
                    out.append(self._close(pane, "complete"))
                if self.closed_through is None or self.closed_through < front:
                    out.append(self._close(front, "complete"))  # nothing held: empty
                continue
            pending = self._pending()
            since = self.waiting_since()
            if not pending or since is None or not caught_up or now - since < self.timeout:
                break
            out.append(self._close(pending[0], "timeout"))
        self._drop_stale_chunks(now)
        return out

    def _close(self, pane: int, how: str) -> Close:
        first = pane if self.closed_through is None else self.closed_through + 1
        held = self.parts.pop(pane, {})
        self.closed_through = pane
        self._merged[pane] = frozenset(held)
        for old in [p for p in self._merged if p < pane - _HORIZON_PANES]:
            del self._merged[old]
        self.totals.closed[how] += 1
        runs: tuple[tuple[int, int, tuple[str, ...]], ...] = ()
        missing: tuple[str, ...] = ()
        if how == "timeout":
            runs = self._missing_runs(first, pane, held)
            missing = runs[-1][2] if runs and runs[-1][1] == pane else ()
            for lo, hi, workers in runs:
                for worker in workers:
                    self.totals.missing[worker] += hi - lo + 1
                self._note_incomplete(lo, hi, workers)
            logger.warning(
                "pane %d closed after %g s without the summaries of %s",
                pane,
                self.timeout,
                ", ".join(missing) or "nobody",
            )
        parts = tuple(held[w] for w in sorted(held))  # a worker since removed counts too
        self._check_catalogue(pane, parts)
        return Close(pane, parts, how, missing, runs)

    def _check_catalogue(self, pane: int, parts: Sequence[Part]) -> None:
        """Workers share one catalogue version; a pane whose parts name items under different
        ones (a reload reaching the workers at different moments, or one worker left on an
        old file) is still merged, since every part keeps its own bounds, but an item may
        count under different names or levels in it: logged, counted and listed."""
        versions = {p.worker: p.meta.catalogue for p in parts if p.meta.transactions}
        if len(set(versions.values())) < 2:
            return
        self.totals.mixed_catalogue += 1
        self.mixed_catalogue.append((pane, versions))
        del self.mixed_catalogue[:-_INCOMPLETE_RUNS]
        logger.warning(
            "pane %d merged from different catalogue versions (%s): make every worker read "
            "the same items.catalogue file",
            pane,
            ", ".join(f"{w}: {v}" for w, v in sorted(versions.items())),
        )

    def _missing_runs(
        self, first: int, last: int, held: Mapping[str, Part]
    ) -> tuple[tuple[int, int, tuple[str, ...]], ...]:
        """Runs of ``first..last`` with the workers missing from each (none held a summary
        before ``last``; a worker that reached a pane holds nothing below it)."""

        def missing_at(pane: int) -> tuple[str, ...]:
            return tuple(
                w
                for w in self.workers
                if self.reported.get(w, pane - 1) < pane and not (pane == last and w in held)
            )

        cuts = {first, last}
        cuts.update(r + 1 for r in self.reported.values() if first < r + 1 < last)
        starts = sorted(cuts)
        runs: list[tuple[int, int, tuple[str, ...]]] = []
        for i, lo in enumerate(starts):
            hi = starts[i + 1] - 1 if i + 1 < len(starts) else last
            if lo == last:
                hi = last
            elif hi >= last:
                hi = last - 1
            workers = missing_at(lo)
            if not workers or hi < lo:
                continue
            if runs and runs[-1][2] == workers and runs[-1][1] + 1 == lo:
                runs[-1] = (runs[-1][0], hi, workers)
            else:
                runs.append((lo, hi, workers))
        return tuple(runs)

    def _note_incomplete(self, lo: int, hi: int, workers: tuple[str, ...]) -> None:
        if self.incomplete and self.incomplete[-1][2] == workers:
            a, b, _ = self.incomplete[-1]
            if b + 1 == lo:
                self.incomplete[-1] = (a, hi, workers)
                return
        self.incomplete.append((lo, hi, workers))
        del self.incomplete[:-_INCOMPLETE_RUNS]

    def incomplete_between(self, lo: int, hi: int) -> tuple[tuple[int, int, tuple[str, ...]], ...]:
        """The runs of incomplete panes within ``lo..hi``, clipped to it."""
        return tuple(
            (max(a, lo), min(b, hi), workers)
            for a, b, workers in self.incomplete
            if a <= hi and b >= lo
        )

    def _drop_stale_chunks(self, now: float) -> None:
        limit = max(_HELD_TIMEOUTS * self.timeout, 60.0)
        for digest, (since, chunks) in list(self._held.items()):
            if now - since > limit:
                logger.warning(
                    "dropping %d chunks of a pane summary whose other chunks never came "
                    "(SHA-256 %s...)",
                    len(chunks),
                    digest.hex()[:16],
                )
                self._reassembler.discard(digest.hex()[:16])
                del self._held[digest]
                self.totals.received["refused"] += 1

    # -- status and checkpoints ----------------------------------------------------------------

    def open_panes(self, now: float, limit: int = 10) -> list[dict[str, Any]]:
        """The oldest open panes: who sent them, who is awaited, for how long."""
        out = []
        for pane in self._pending()[:limit]:
            held = self.parts[pane]
            waiting = [
                w for w in self.workers if w not in held and self.reported.get(w, pane - 1) < pane
            ]
            since = min(p.arrived for p in held.values())
            out.append(
                {
                    "pane": pane,
                    "reported": sorted(held),
                    "waiting_for": waiting,
                    "waiting_seconds": round(max(0.0, now - since), 3),
                }
            )
        return out

    @property
    def held_chunks(self) -> int:
        return sum(len(chunks) for _, chunks in self._held.values())

    def state(self) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
        """JSON-able meta and the payloads (parts) and chunks held, as byte arrays."""
        arrays: dict[str, np.ndarray] = {}
        parts: list[list[Any]] = []
        for pane, held in sorted(self.parts.items()):
            for worker, part in sorted(held.items()):
                arrays[f"part.{len(parts)}"] = np.frombuffer(part.payload, dtype=np.uint8)
                parts.append([pane, worker, part.arrived])
        held_meta: list[list[Any]] = []
        for digest, (since, chunks) in self._held.items():
            for j, chunk in enumerate(chunks):
                arrays[f"held.{len(held_meta)}.{j}"] = np.frombuffer(chunk, dtype=np.uint8)
            held_meta.append([digest.hex(), since, len(chunks)])
        meta = {
            "closed_through": self.closed_through,
            "reported": dict(self.reported),
            "parts": parts,
            "held": held_meta,
            "merged": [[p, sorted(ws)] for p, ws in sorted(self._merged.items())],
            "incomplete": [[a, b, list(ws)] for a, b, ws in self.incomplete],
            "mixed_catalogue": [[p, dict(v)] for p, v in self.mixed_catalogue],
        }
        return meta, arrays

    def load_state(self, meta: Mapping[str, Any], arrays: Mapping[str, np.ndarray]) -> None:
        """Restore what :meth:`state` returned (into a fresh collector); the payloads are
        decoded and checked again."""
        ct = meta["closed_through"]
        self.closed_through = None if ct is None else int(ct)
        self.reported = {str(w): int(p) for w, p in meta["reported"].items()}
        self.parts = {}
        for i, (pane, worker, arrived) in enumerate(meta["parts"]):
            payload = np.asarray(arrays[f"part.{i}"], dtype=np.uint8).tobytes()
            decoded, levels, names = decode_pane(payload)
            if (decoded.pane_index, decoded.worker) != (int(pane), worker):
                raise ValueError(f"checkpointed summary {i} is not pane {pane} of {worker!r}")
            part = Part(decoded, levels, names, payload, float(arrived))
            self.parts.setdefault(int(pane), {})[worker] = part
        self._reassembler = Reassembler()
        self._held = {}
        for i, (digest, since, count) in enumerate(meta["held"]):
            chunks = [
                np.asarray(arrays[f"held.{i}.{j}"], dtype=np.uint8).tobytes()
                for j in range(int(count))
            ]
            for chunk in chunks:
                self._reassembler.add(chunk)
            self._held[bytes.fromhex(digest)] = (float(since), chunks)
        self._merged = {int(p): frozenset(ws) for p, ws in meta["merged"]}
        self.incomplete = [(int(a), int(b), tuple(ws)) for a, b, ws in meta["incomplete"]]
        self.mixed_catalogue = [
            (int(p), {str(w): str(v) for w, v in versions.items()})
            for p, versions in meta.get("mixed_catalogue", [])
        ]


def _inconsistent(meta: PaneMeta, levels: Iterable[Level]) -> str | None:
    """What in a decoded summary breaks its own header's promises (``None``: nothing)."""
    bound = meta.absent_bound
    for k, level in enumerate(levels, start=1):
        if not len(level):
            continue
        if int(level.f.min()) < 1 or int(level.f.max()) > meta.transactions:
            return f"pane {meta.pane_index} of {meta.worker!r}: level {k} has a count outside 1..n"
        if int(level.delta.max()) > bound:
            return (
                f"pane {meta.pane_index} of {meta.worker!r}: level {k} has an error above the "
                f"pane's bound {bound}"
            )
    return None


def _describe(meta: PaneMeta) -> str:
    """What a dead-letter line keeps of a summary (its bytes are binary): the header."""
    return json.dumps(
        {
            "worker": meta.worker,
            "pane": meta.pane_index,
            "transactions": meta.transactions,
            "epsilon": meta.epsilon,
            "max_itemset_size": meta.max_itemset_size,
            "fingerprint": meta.fingerprint,
            "catalogue": meta.catalogue,
        },
        separators=(",", ":"),
    )
