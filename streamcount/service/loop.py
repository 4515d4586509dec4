"""The long-running service: source -> decoder -> engine -> rules/alerts -> sinks, with the
HTTP listener, metrics, dead-letter file and checkpoints around it. Wiring only.

One loop owns all mutable state. Each turn reads what the source has (up to a batch),
decodes it (bad records go to the dead-letter file and ``streamcount_records_rejected_total``),
hands the transactions to the engine in one call, and publishes an immutable view for the HTTP
threads. Rules and alerts are evaluated inside the engine's pane-close callback, so they see
the window exactly at each close. A checkpoint (engine, decoder, rule states, source offset,
all taken between two turns, so consistent) is written every ``checkpoint_interval_seconds``
and at shutdown; after a crash the service resumes at the saved offset, so a followed file is
counted exactly once.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import queue
import signal
import sys
import threading
import time
from collections import Counter, deque
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

from streamcount import __version__
from streamcount.alerts.monitor import RuleMonitor
from streamcount.alerts.sinks import Sink, SinkFanout, build_sinks
from streamcount.config.load import describe, fingerprint, fingerprint_settings
from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import EngineStatistics, WindowSnapshot
from streamcount.errors import CheckpointError, InputError, ParseError
from streamcount.intake.deadletter import DeadLetterFile
from streamcount.intake.formats import (
    BasketDecoder,
    JsonlDecoder,
    decode_basket_records,
    decode_raw,
    make_decoder,
)
from streamcount.intake.sources import FollowedFile, IterableSource, RawRecord, StdinSource
from streamcount.rules.derive import Rule
from streamcount.service.checkpoint import load_latest_checkpoint, save_checkpoint
from streamcount.service.metrics import Metrics, RuleSample, ServiceState

__all__ = ["Service", "run_main"]

logger = logging.getLogger(__name__)

_READ_RECORDS = 20000  # records taken from the source per turn
_PUBLISH_SECONDS = 0.5  # the HTTP view is refreshed at most this often (and at pane close)


@dataclass(frozen=True, slots=True)
class _View:
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


class Service:
    """streamcount's service: build it from a :class:`Config`, then :meth:`run` (blocking).

    ``source`` replaces the configured input (tests and the demo pass an in-memory one);
    ``extra_sinks`` receive every alert record too; ``clock`` gives wall time (event lag,
    checkpoint timing) and is the only place wall time is read.
    """

    def __init__(
        self,
        config: Config,
        *,
        fresh: bool = False,
        registry: CollectorRegistry | None = None,
        source: Any | None = None,
        extra_sinks: tuple[Sink, ...] = (),
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.config = config
        self.clock = clock
        self.registry = registry if registry is not None else CollectorRegistry()
        self._stop = threading.Event()
        # HTTP ingest -> loop: (baskets, timestamps, records the HTTP decoder rejected)
        self._ingest: queue.Queue[tuple[list[list[str]], list[float | None], list[ParseError]]] = (
            queue.Queue(maxsize=1000)
        )
        self._fingerprint = fingerprint(config)
        self._last_checkpoint_unix: float | None = None
        self._last_checkpoint_mono = time.monotonic()
        self._last_publish = 0.0
        self._unpublished = False  # counted since the view was last built
        self._last_turn = time.monotonic()
        self._alerts: deque[dict[str, Any]] = deque(maxlen=max(1, config.alerts.history))
        self._alert_counts: Counter[str] = Counter()
        #: records set aside since the state began, by reason (decoder and engine alike)
        self._rejected_counts: Counter[str] = Counter()
        self._ready = False
        self._rules_window: dict[str, Any] | None = None
        self.turns = 0

        self.decoder = make_decoder(
            config.input,
            config.engine.max_basket_items,
            require_ts=config.engine.window_seconds is not None,
        )
        self.monitor = RuleMonitor(config.rules, config.alerts)
        self.engine = Engine(config.engine, on_pane_closed=self._on_pane_closed)
        restored = None if fresh else self._restore()
        self.source = source if source is not None else self._open_source(restored)
        self.source_name = (
            "memory" if source is not None else ("stdin" if config.input.path == "-" else "file")
        )
        self.dead_letter = DeadLetterFile(config.input.dead_letter_path)

        configured = build_sinks(config.sinks)
        self.sinks = SinkFanout((*configured.sinks, *extra_sinks))

        self.metrics = Metrics(
            self.registry,
            statistics=lambda: self._view.statistics,
            state=self._service_state,
            top_rules=config.metrics.top_rules,
        )
        self._view = self._build_view()
        self.server: Any = None
        self._server_thread: threading.Thread | None = None

    # -- set-up ------------------------------------------------------------------------------

    def _restore(self) -> dict[str, Any] | None:
        directory = self.config.checkpoint.checkpoint_dir
        if not directory:
            return None
        loaded = load_latest_checkpoint(
            directory, fingerprint=self._fingerprint, settings=fingerprint_settings(self.config)
        )
        if loaded is None:
            logger.info("no checkpoint in %s; starting fresh", directory)
            return None
        meta, arrays = loaded
        try:
            self.engine = Engine.from_state(
                self.config.engine, meta["engine"], arrays, on_pane_closed=self._on_pane_closed
            )
            self.decoder.load_state(meta.get("decoder") or {})
            self.monitor.load_state(meta.get("monitor") or {})
        except (KeyError, ValueError, TypeError) as exc:
            raise CheckpointError(
                f"checkpoint in {directory} cannot be restored: {exc}; start with --fresh to "
                "discard it"
            ) from exc
        self._alert_counts.update(meta.get("alert_counts", {}))
        self._rejected_counts.update(meta.get("rejected_counts", {}))
        for record in meta.get("alerts", []):
            self._alerts.append(record)
        self._last_checkpoint_unix = float(meta.get("written_at", self.clock()))
        logger.info(
            "checkpoint restored from %s: %d transactions seen, resuming at %s",
            directory,
            self.engine.transactions_seen,
            meta.get("source"),
        )
        return meta

    def _open_source(self, restored: Mapping[str, Any] | None) -> Any:
        cfg = self.config.input
        if cfg.path is None:
            if not cfg.http_ingest:
                raise InputError(
                    "input.path = None: no input; set input.path (a file or -) or "
                    "input.http_ingest: true"
                )
            return IterableSource([])
        if cfg.path == "-":
            return StdinSource(max_record_bytes=cfg.max_record_bytes)
        kwargs: dict[str, Any] = {
            "poll_interval_seconds": cfg.poll_interval_seconds,
            "max_record_bytes": cfg.max_record_bytes,
            "start_at": cfg.start_at,
            "follow": cfg.follow,
        }
        position = (restored or {}).get("source")
        if position:
            return FollowedFile.from_position(cfg.path, position, **kwargs)
        return FollowedFile(cfg.path, **kwargs)

    # -- the loop ----------------------------------------------------------------------------

    def request_stop(self, *_: object) -> None:
        """Stop after the current turn (signal handlers call this)."""
        self._stop.set()

    def start_server(self) -> tuple[str, int] | None:
        listen = self.config.server.listen
        if not listen:
            return None
        from streamcount.service.server import start_server

        token = None
        if self.config.server.token_env:
            token = os.environ.get(self.config.server.token_env) or None
            if token is None:
                raise InputError(
                    f"server.token_env = {self.config.server.token_env!r}: that environment "
                    "variable is not set or empty"
                )
        limit = self.config.server.max_request_bytes
        if self.config.input.http_ingest:
            # input.max_body_bytes caps the bodies of POST /v1/transactions
            limit = min(limit, self.config.input.max_body_bytes)
        self.server, self._server_thread = start_server(
            listen,
            self,
            token=token,
            max_request_bytes=limit,
            request_timeout_seconds=self.config.server.request_timeout_seconds,
        )
        host, port = self.server.server_address[:2]
        logger.info("listening on http://%s:%d (metrics at /metrics)", host, port)
        return str(host), int(port)

    def run(self, *, install_signals: bool = True) -> int:
        """Run until stopped (signal, :meth:`request_stop`) or a finite input ends."""
        if install_signals and threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.request_stop)
            signal.signal(signal.SIGINT, self.request_stop)
        if self.server is None:
            self.start_server()
        logger.info("streamcount %s started: %s", __version__, describe(self.config))
        self._ready = True
        clean = False
        try:
            while not self._stop.is_set():
                self.turn(timeout=self.config.input.poll_interval_seconds)
                if self._finished():
                    # count the last partial batch, as replay does at the end of a file
                    self.engine.flush()
                    logger.info("input exhausted; stopping")
                    break
            clean = True
        finally:
            self.shutdown(clean=clean)
        return 0

    def _finished(self) -> bool:
        if not getattr(self.source, "exhausted", False) or not self._ingest.empty():
            return False
        return not self.config.input.follow or self.source_name == "stdin"

    def turn(self, timeout: float = 0.0, *, read_source: bool = True) -> int:
        """One turn of the loop: read, decode, count, publish, maybe checkpoint."""
        started = time.perf_counter()
        self._last_turn = time.monotonic()
        records: list[RawRecord] = (
            self.source.read(max_records=_READ_RECORDS, timeout=timeout) if read_source else []
        )
        baskets: list[list[str]] = []
        stamps: list[float | None] = []
        origin: list[RawRecord | None] = []
        rejected: Counter[str] = Counter()
        if isinstance(self.decoder, BasketDecoder):
            # stateless and timestamp-free: decode the whole read in one pass
            baskets, origins, errors = decode_basket_records(self.decoder, records)
            origin.extend(origins)
            stamps = [None] * len(baskets)
            for exc in errors:
                self._reject(exc, rejected)
        else:
            for rec in records:
                try:
                    txs = decode_raw(self.decoder, rec, self.config.input.max_record_bytes)
                except ParseError as exc:
                    self._reject(exc, rejected)
                    continue
                for tx in txs:
                    baskets.append(list(tx.items))
                    stamps.append(tx.ts)
                    origin.append(rec)
        if self.config.input.format == "csv":
            latest = max((s for s in stamps if s is not None), default=None)
            due = self.decoder.flush_due(latest) if latest is not None else []
            if getattr(self.source, "exhausted", False) and not self.config.input.follow:
                due = due + self.decoder.flush_all()
            for tx in due:
                baskets.append(list(tx.items))
                stamps.append(tx.ts)
                origin.append(None)
        # an exhausted source (HTTP ingest only) returns at once: wait on the ingest queue
        # instead, or the loop would spin
        exhausted = not records and getattr(self.source, "exhausted", False)
        wait = timeout if exhausted and self.config.input.http_ingest else 0.0
        while True:
            try:
                if wait > 0:
                    more, more_ts, more_errors = self._ingest.get(timeout=wait)
                    wait = 0.0
                else:
                    more, more_ts, more_errors = self._ingest.get_nowait()
            except queue.Empty:
                break
            for exc in more_errors:
                self._reject(exc, rejected, source="http")
            baskets.extend(more)
            stamps.extend(more_ts)
            origin.extend([None] * len(more))
        accepted = 0
        limit = self.config.input.max_future_seconds
        if baskets and limit is not None and any(t is not None for t in stamps):
            baskets, stamps, origin = self._drop_future(baskets, stamps, origin, limit, rejected)
        if baskets:
            result = self.engine.add(baskets, stamps)
            accepted = result.accepted
            for rej in result.rejections:
                rec = origin[rej.index]
                raw = rec.data if rec is not None else " ".join(baskets[rej.index]).encode()
                self._reject(
                    ParseError(rej.reason, rej.detail, offset=rec.offset if rec else None, raw=raw),
                    rejected,
                )
        if records or baskets or rejected:
            self.dead_letter.flush()
            self.metrics.observe_batch(accepted, rejected, time.perf_counter() - started)
        self.turns += 1
        now = time.monotonic()
        if baskets or rejected:
            self._unpublished = True
        if self._unpublished and now - self._last_publish >= _PUBLISH_SECONDS:
            self._publish()
        self._observe_sinks()
        interval = self.config.checkpoint.checkpoint_interval_seconds
        if self.config.checkpoint.checkpoint_dir and now - self._last_checkpoint_mono >= interval:
            self.checkpoint()
        return accepted

    def _drop_future(
        self,
        baskets: list[list[str]],
        stamps: list[float | None],
        origin: list[RawRecord | None],
        limit: float,
        rejected: Counter[str],
    ) -> tuple[list[list[str]], list[float | None], list[RawRecord | None]]:
        """Set aside transactions stamped more than ``limit`` seconds ahead of the clock."""
        horizon = self.clock() + limit
        ahead = [i for i, t in enumerate(stamps) if t is not None and t > horizon]
        if not ahead:
            return baskets, stamps, origin
        for i in ahead:
            rec = origin[i]
            self._reject(
                ParseError(
                    "too_early",
                    f"event time {stamps[i]!r} is more than input.max_future_seconds={limit:g} "
                    f"ahead of the clock ({horizon - limit:.0f}); check the sender's clock",
                    offset=rec.offset if rec is not None else None,
                    raw=rec.data if rec is not None else " ".join(baskets[i]).encode(),
                ),
                rejected,
            )
        drop = set(ahead)
        keep = [i for i in range(len(baskets)) if i not in drop]
        return [baskets[i] for i in keep], [stamps[i] for i in keep], [origin[i] for i in keep]

    def _reject(self, exc: ParseError, rejected: Counter[str], source: str | None = None) -> None:
        rejected[exc.reason] += 1
        self._rejected_counts[exc.reason] += 1
        self.dead_letter.write(exc, source=source or self.source_name)

    def _on_pane_closed(self, engine: Engine) -> None:
        fired, window = self.monitor.evaluate_close(
            engine, recent_panes=self.config.alerts.recent_panes
        )
        self._rules_window = window.window_dict()
        records = [a.as_dict() for a in fired]
        if records:
            self._alerts.extend(records)
            counts = Counter(str(r["kind"]) for r in records)
            self._alert_counts.update(counts)
            self.metrics.observe_alerts(counts)
            self.sinks.emit_all(records)
        self._publish(window)

    def _observe_sinks(self) -> None:
        stats = self.sinks.stats_by_sink()
        self.metrics.observe_sinks(
            {name: s.failed for name, s in stats.items()},
            {name: s.dropped for name, s in stats.items()},
        )

    # -- published view ----------------------------------------------------------------------

    def _build_view(self, window: WindowSnapshot | None = None) -> _View:
        if window is None:
            # the window changes only when a batch is counted; statistics change with every
            # transaction buffered, so a view is rebuilt without re-summing unchanged panes
            previous = getattr(self, "_view", None)
            if previous is not None and previous.window_key == self._window_key():
                window = previous.window
            else:
                window = self.engine.snapshot()
        stats = self.engine.statistics()
        rules = tuple(self.monitor.active_rules)
        status = {
            "version": __version__,
            "window": window.window_dict(),
            "transactions_seen": stats.transactions_seen,
            "rejected": dict(self._rejected_counts),
            "buffered_transactions": stats.buffered_transactions,
            "tracked_itemsets": {str(k + 1): n for k, n in enumerate(stats.tracked_itemsets)},
            "held_bytes": stats.held_bytes,
            "live_panes": stats.live_panes,
            "window_panes": stats.window_panes,
            "warm": self.engine.window_full,
            "active_rules": len(rules),
            "alerts": dict(self._alert_counts),
            "vocabulary_items": stats.vocabulary_items,
            "last_checkpoint_unix": self._last_checkpoint_unix,
            "max_event_ts": stats.max_event_ts,
            "rules_window": self._rules_window,
        }
        return _View(
            window,
            stats,
            rules,
            tuple(self._alerts),
            status,
            self._rules_window,
            self._window_key(),
        )

    def _window_key(self) -> tuple[tuple[int, int], ...]:
        """What the window's counts depend on: each live pane and how much of it is counted."""
        return tuple((p.index, p.counted) for p in self.engine.window.panes.values())

    def _publish(self, window: WindowSnapshot | None = None) -> None:
        self._view = self._build_view(window)
        self._last_publish = time.monotonic()
        self._unpublished = False

    def _service_state(self) -> ServiceState:
        view = self._view
        lag = None
        if view.statistics.max_event_ts is not None:
            lag = max(0.0, self.clock() - view.statistics.max_event_ts)
        return ServiceState(
            active_rules=len(view.rules),
            last_checkpoint_unix=self._last_checkpoint_unix,
            event_lag_seconds=lag,
            top_rules=tuple(
                RuleSample.from_rule(r) for r in view.rules[: self.config.metrics.top_rules]
            ),
        )

    # -- checkpoints and shutdown -------------------------------------------------------------

    def checkpoint(self) -> None:
        """Write the whole state atomically; a failure is logged and counted, never fatal."""
        directory = self.config.checkpoint.checkpoint_dir
        if not directory:
            return
        engine_meta, arrays = self.engine.state()
        now = self.clock()
        meta = {
            "engine": engine_meta,
            "decoder": self.decoder.state_dict(),
            "monitor": self.monitor.state_dict(),
            "source": self.source.position() if self.source_name == "file" else None,
            "alerts": list(self._alerts)[-100:],
            "alert_counts": dict(self._alert_counts),
            "rejected_counts": dict(self._rejected_counts),
            "written_at": now,
        }
        try:
            path = save_checkpoint(
                directory,
                meta=meta,
                arrays=arrays,
                fingerprint=self._fingerprint,
                settings=fingerprint_settings(self.config),
            )
        except (OSError, ValueError, CheckpointError) as exc:
            logger.warning("checkpoint to %s failed: %s", directory, exc)
            self.metrics.observe_checkpoint(False, now)
        else:
            self._last_checkpoint_unix = now
            self.metrics.observe_checkpoint(True, now)
            self._unpublished = True  # /v1/status shows the checkpoint time
            logger.info("checkpoint written: %s (seq %d)", path, self.engine.next_seq - 1)
        self._last_checkpoint_mono = time.monotonic()

    def shutdown(self, *, clean: bool = True) -> None:
        """Stop serving, count what HTTP ingest already acknowledged, write the final
        checkpoint and release everything.

        After an unexpected error (``clean=False``) no checkpoint is written: the state may be
        half-updated, so the last good checkpoint is kept and a restart re-reads from it.
        """
        self._ready = False
        if self.server is not None:  # no new ingest from here on
            self.server.shutdown()
            self.server.server_close()
        if clean:
            while not self._ingest.empty():
                self.turn(read_source=False)
            self.checkpoint()
            self._publish()
        else:
            logger.warning("stopping after an error; the last good checkpoint is kept")
        self.sinks.close(timeout=5.0)
        self.dead_letter.close()
        self.source.close()
        logger.info("stopped after %d transactions", self.engine.transactions_seen)

    # -- ApiBackend (called from HTTP threads; reads only the published view) ------------------

    def ingest_enabled(self) -> bool:
        return bool(self.config.input.http_ingest)

    def metrics_payload(self) -> tuple[bytes, str]:
        return generate_latest(self.registry), CONTENT_TYPE_LATEST

    def healthy(self) -> bool:
        return time.monotonic() - self._last_turn < 30.0 + self.config.input.poll_interval_seconds

    def ready(self) -> bool:
        return self._ready

    def status(self) -> dict[str, Any]:
        return self._view.status

    def itemsets(self, min_support: float | None, size: int | None, limit: int) -> dict[str, Any]:
        view = self._view
        support = self.config.rules.min_support if min_support is None else min_support
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
        keys = {
            "lift": lambda r: r.lift.value,
            "confidence": lambda r: r.confidence.value,
            "support": lambda r: r.support.value,
        }
        if sort not in keys:
            raise InputError(f"sort = {sort!r}: must be one of {sorted(keys)}")
        chosen.sort(key=keys[sort], reverse=True)
        return {
            # rules are evaluated at pane close: this is the window they were measured on
            "window": view.rules_window or view.window.window_dict(),
            "rules": [r.as_dict() for r in chosen[:limit]],
        }

    def alerts(self, since: int | None, limit: int) -> dict[str, Any]:
        items = [a for a in self._view.alerts if since is None or int(a["seq"]) > since]
        return {"alerts": items[-limit:]}

    def ingest(self, body: bytes, content_type: str) -> dict[str, Any]:
        """Decode a JSON object or NDJSON body now (in the HTTP thread); count it next turn.

        Rejected lines go to the loop too, which dead-letters and counts them (the HTTP
        threads never write the dead-letter file themselves).
        """
        if not self.ingest_enabled():
            raise InputError("HTTP ingest is off (input.http_ingest: false)")
        decoder = JsonlDecoder(
            self.config.input.jsonl,
            self.config.engine.max_basket_items,
            self.config.input.max_record_bytes,
            self.config.input.encoding,
        )
        lines = [ln for ln in body.splitlines() if ln.strip()]
        if not lines:
            raise InputError("empty body: send one JSON object or NDJSON lines")
        baskets: list[list[str]] = []
        stamps: list[float | None] = []
        errors = []
        rejected: list[ParseError] = []
        offset = 0
        for n, line in enumerate(lines, start=1):
            try:
                for tx in decoder.feed(line, offset, offset + len(line)):
                    baskets.append(list(tx.items))
                    stamps.append(tx.ts)
            except ParseError as exc:
                errors.append({"line": n, "reason": exc.reason, "detail": exc.detail})
                rejected.append(exc)
            offset += len(line) + 1
        try:
            self._ingest.put((baskets, stamps, rejected), timeout=5.0)
        except queue.Full:
            raise InputError("ingest queue is full; retry later") from None
        if errors and not baskets:
            first = errors[0]
            raise InputError(
                f"no valid transaction in the body; line {first['line']}: {first['reason']}: "
                f"{first['detail']}"
            )
        return {"accepted": len(baskets), "rejected": errors}


class _JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        return json.dumps(
            {
                "time": self.formatTime(record),
                "level": record.levelname,
                "logger": record.name,
                "message": record.getMessage(),
            }
        )


def setup_logging(level: str, fmt: str) -> None:
    handler = logging.StreamHandler(sys.stderr)
    if fmt == "json":
        handler.setFormatter(_JsonFormatter())
    else:
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root = logging.getLogger("streamcount")
    root.handlers[:] = [handler]
    root.setLevel(level)
    root.propagate = False


def run_main(args: argparse.Namespace) -> int:
    """``streamcount run``: build the config from the file and flags, then run."""
    from streamcount.cli import config_from_args

    extra: dict[str, object] = {}
    if args.input is not None:
        extra["input.path"] = args.input
    if args.listen is not None:
        extra["server.listen"] = args.listen
    if args.checkpoint_dir is not None:
        extra["checkpoint.checkpoint_dir"] = args.checkpoint_dir
    if args.no_follow:
        extra["input.follow"] = False
    config = config_from_args(args, extra)
    setup_logging(config.logging.level, config.logging.format)
    service = Service(config, fresh=args.fresh)
    return service.run()
