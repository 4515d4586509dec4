"""The long-running service: sources -> decoders -> pipeline -> sinks, with the HTTP listener,
metrics, dead-letter file and checkpoints around it. Wiring only.

One loop owns all mutable state. Each turn reads what the sources have, decodes it (one
decoder per source), hands it to the :class:`~streamcount.pipeline.Pipeline` (bad records go
to the dead-letter file and ``streamcount_records_rejected_total``) and publishes an immutable
view for the HTTP threads. Rules and alerts are evaluated inside the pipeline at each pane
close. A checkpoint (pipeline, decoders, every source's position, all taken between two turns,
so consistent) is written every ``checkpoint_interval_seconds`` and at shutdown; after it, each
source is told it may acknowledge what the checkpoint holds. After a crash the service resumes
at the saved positions, so a followed file is counted exactly once.
"""

from __future__ import annotations

import dataclasses
import logging
import signal
import threading
import time
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    ProcessCollector,
    generate_latest,
)

from streamcount import __version__
from streamcount.alerts.sinks import Sink, SinkFanout, build_sinks
from streamcount.config.load import describe, fingerprint, fingerprint_settings
from streamcount.config.settings import Config
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.errors import CheckpointError, InputError, describe_os_error
from streamcount.intake.deadletter import DeadLetterFile
from streamcount.intake.formats import Decoder, make_decoder
from streamcount.intake.records import Decoded, RecordBatch
from streamcount.intake.sources import SOURCES, Source, build_sources
from streamcount.pipeline import Pipeline
from streamcount.service.api import ServiceApi
from streamcount.service.checkpoint import load_latest_checkpoint, save_checkpoint
from streamcount.service.extension import BatchHandler, Extensions, ServiceExtension
from streamcount.service.history import HistoryStore
from streamcount.service.metrics import Metrics, RuleSample, ServiceState
from streamcount.service.published import OVERLAY_SECONDS, ViewBuilder

__all__ = ["STATE_VERSION", "Service"]

logger = logging.getLogger(__name__)

#: version of the checkpoint's contents (the container has its own format version); 3 adds
#: the history behind /v1/history. A checkpoint of an older version is refused with a message
#: (start with --fresh, or keep running the version that wrote it)
STATE_VERSION = 3

_READ_RECORDS = 20000  # records taken from the sources per turn
_PUBLISH_SECONDS = 0.5  # the HTTP view is refreshed at most this often (and at pane close)


@dataclass(slots=True)
class _Input:
    """One source with its own decoder (or an extension's handler of its batches)."""

    source: Source
    decoder: Decoder
    handler: BatchHandler | None = None


class Service:
    """streamcount's service: build it from a :class:`Config`, then :meth:`run` (blocking).

    Parameters
    ----------
    config:
        The validated configuration.
    fresh:
        Ignore existing checkpoints and start over.
    registry:
        Where the metrics are registered (a new one by default).
    sources:
        Replace the configured sources (the demo and tests pass in-memory ones).
    extra_sinks:
        Receive every alert record too.
    clock:
        Wall time (event lag, the future-time guard, checkpoint stamps); the only place it
        is read.
    extensions:
        What a role adds (:class:`~streamcount.service.extension.ServiceExtension`); by
        default the one ``cluster.role`` names (a cluster worker or merger), else none.
    """

    def __init__(
        self,
        config: Config,
        *,
        fresh: bool = False,
        registry: CollectorRegistry | None = None,
        sources: list[Source] | None = None,
        extra_sinks: tuple[Sink, ...] = (),
        clock: Callable[[], float] = time.time,
        extensions: Sequence[ServiceExtension] | None = None,
    ) -> None:
        self.config = config
        self.clock = clock
        self.registry = registry if registry is not None else CollectorRegistry()
        self._stop = threading.Event()
        self._fingerprint = fingerprint(config)
        self._last_checkpoint_unix: float | None = None
        self._last_checkpoint_mono = time.monotonic()
        self._last_publish = 0.0
        self._unpublished = False  # counted since the view was last built
        self._last_input = time.monotonic()  # when a record was last read
        self.turns = 0

        self.extensions = (
            Extensions(extensions) if extensions is not None else Extensions.for_role(config)
        )
        self.sinks = SinkFanout((*build_sinks(config.sinks).sinks, *extra_sinks))
        # a cluster worker counts one partition: rules and alerts belong to the merged window
        alerts = config.cluster.role != "worker"
        self.pipeline = Pipeline(config, sinks=self.sinks, clock=clock, alerts=alerts)
        self.pipeline.on_alerts(self._alerts_raised)
        self.history = HistoryStore(config.history.max_points, config.history.alerted_closes)
        self.pipeline.on_close(self._closed)
        restored = None if fresh else self._restore()
        positions = (restored or {}).get("sources") or {}
        if sources is not None:
            built = sources
        elif config.cluster.role == "merger":
            built = []  # a merger reads pane summaries (its extension's source), no orders
        else:
            built = build_sources(config, positions)
        self.inputs = [_Input(s, self._decoder_for(s.name)) for s in built]
        for source, handler in self.extensions.inputs(positions):
            self.inputs.append(_Input(source, self._decoder_for(source.name), handler))
        for item in self.inputs:
            state = ((restored or {}).get("decoders") or {}).get(item.source.name)
            if state:
                item.decoder.load_state(state)
        self.dead_letter = DeadLetterFile(config.input.dead_letter_path)
        # the process's resident memory, CPU time and open files (process_*), next to ours
        ProcessCollector(registry=self.registry)
        self.metrics = Metrics(
            self.registry,
            statistics=lambda: self.api.view.statistics,
            state=self._service_state,
            top_rules=config.metrics.top_rules,
        )
        self._views = ViewBuilder(
            config,
            self.pipeline,
            self.history,
            self.sinks,
            self.extensions,
            sources=lambda: [i.source for i in self.inputs],
            last_checkpoint=lambda: self._last_checkpoint_unix,
        )
        ingest = next((i.source.ingest for i in self.inputs if i.source.ingest), None)
        self.api = ServiceApi(
            self._views.build(None),
            metrics_payload=lambda: (generate_latest(self.registry), CONTENT_TYPE_LATEST),
            min_support=config.rules.min_support,
            ingest=ingest,
            ingest_timeout_seconds=config.server.request_timeout_seconds,
            stale_seconds=30.0 + config.input.poll_interval_seconds,
            page=config.page,
            max_itemset_size=config.engine.max_itemset_size,
            clock=clock,
            catalogue=config.items.catalogue is not None,
        )
        self.server: Any = None
        self.extensions.bind(self)

    # -- set-up ------------------------------------------------------------------------------

    def _decoder_for(self, source_name: str) -> Decoder:
        spec = SOURCES.get(source_name)
        fmt = spec.format if spec is not None else None  # e.g. HTTP ingest is JSON lines
        return make_decoder(
            self.config.input,
            self.config.engine.max_basket_items,
            require_ts=self.config.engine.window_seconds is not None,
            fmt=fmt,
        )

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
        if meta.get("state_version") != STATE_VERSION:
            found = meta.get("state_version", 1)
            raise CheckpointError(
                f"the checkpoint in {directory} holds state version {found!r} (written by an "
                f"earlier streamcount); this version reads state version {STATE_VERSION}. "
                "Start with --fresh to discard it (counting starts again from the next record), "
                "or keep running the version that wrote it"
            )
        try:
            self.pipeline.load_state(meta["pipeline"], arrays)
            self.history.load_state(meta["history"], arrays)
        except (KeyError, ValueError, TypeError) as exc:
            raise CheckpointError(
                f"checkpoint in {directory} cannot be restored: {exc}; start with --fresh to "
                "discard it"
            ) from exc
        self.extensions.load_state(meta, arrays)
        self._last_checkpoint_unix = float(meta.get("written_at", self.clock()))
        logger.info(
            "checkpoint restored from %s: %d transactions seen, resuming at %s",
            directory,
            self.pipeline.engine.transactions_seen,
            meta.get("sources"),
        )
        return meta

    # -- the loop ----------------------------------------------------------------------------

    def request_stop(self, *_: object) -> None:
        """Stop after the current turn (signal handlers call this)."""
        self._stop.set()

    def request_catalogue_reload(self, *_: object) -> None:
        """Reload the catalogue at the start of the next turn."""
        if self.pipeline.catalogue is not None:
            self.pipeline.catalogue.requested = True

    def reload_on_signal(self, *_: object) -> None:
        """The SIGHUP handler: the server re-reads its token file and TLS files, and the
        catalogue is reloaded at the start of the next turn."""
        if self.server is not None:
            self.server.request_reload()
        self.request_catalogue_reload()

    def start_server(self) -> tuple[str, int] | None:
        """Start the HTTP listener (``server.listen``); returns the bound address."""
        listen = self.config.server.listen
        if not listen:
            return None
        import os

        from streamcount.service.server import ServerOptions, start_server

        token = None
        if self.config.server.token_env:
            token = os.environ.get(self.config.server.token_env) or None
            if token is None:
                raise InputError(
                    f"server.token_env = {self.config.server.token_env!r}: that environment "
                    "variable is not set or empty"
                )
        limit = self.config.server.max_request_bytes
        if self.api.ingest_enabled():
            # input.max_body_bytes caps the bodies of POST /v1/transactions
            limit = min(limit, self.config.input.max_body_bytes)
        self.server, _ = start_server(
            listen,
            self.api,
            token=token,
            max_request_bytes=limit,
            request_timeout_seconds=self.config.server.request_timeout_seconds,
            options=ServerOptions.from_config(self.config.server),
        )
        self.metrics.watch_server(self.server.stats)
        host, port = self.server.server_address[:2]
        logger.info("listening on http://%s:%d (metrics at /metrics)", host, port)
        return str(host), int(port)

    def run(
        self,
        *,
        install_signals: bool = True,
        on_turn: Callable[[Service], bool] | None = None,
        turn_timeout: float | None = None,
    ) -> int:
        """Run until stopped (signal, :meth:`request_stop`, ``on_turn`` returning False) or
        every source has ended; then count what is pending and write the final checkpoint.

        ``on_turn`` is called after every turn (the demo draws its status line there);
        ``turn_timeout`` replaces ``input.poll_interval_seconds`` as the wait for records.
        """
        timeout = self.config.input.poll_interval_seconds if turn_timeout is None else turn_timeout
        if install_signals and threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGTERM, self.request_stop)
            signal.signal(signal.SIGINT, self.request_stop)
        if self.server is None:
            self.start_server()
        if install_signals and threading.current_thread() is threading.main_thread():
            # SIGHUP: re-read server.token_file and TLS, and the catalogue file
            signal.signal(signal.SIGHUP, self.reload_on_signal)
        logger.info("streamcount %s started: %s", __version__, describe(self.config))
        self.api.set_ready(True)
        clean = False
        saved = True
        try:
            while not self._stop.is_set():
                self.turn(timeout=timeout)
                if all(i.source.exhausted for i in self.inputs):
                    self._finish_inputs()
                    logger.info("input exhausted; stopping")
                    break
                if on_turn is not None and not on_turn(self):
                    break
            clean = True
        finally:
            saved = self.shutdown(clean=clean)
        if not saved:
            # the counting state since the last good checkpoint is lost: say so in the exit code
            logger.error(
                "the final checkpoint to %s failed (see above); a restart resumes from the last "
                "good checkpoint and counts what came after it again",
                self.config.checkpoint.checkpoint_dir,
            )
            return 1
        return 0

    def turn(self, timeout: float = 0.0) -> int:
        """One turn of the loop: read every source, decode, count, publish, maybe checkpoint.

        With one source, waits up to ``timeout`` seconds for records; with several, polls
        each and waits only when none had anything.
        """
        started = time.perf_counter()
        self.api.beat()
        reload = self.pipeline.poll_catalogue()  # SIGHUP or a changed file; next transaction on
        if reload is not None:
            self.metrics.observe_catalogue_reload(reload.error is None)
            self._unpublished = True
        accepted, rejected, seen = 0, Counter[str](), 0
        wait = timeout if len(self.inputs) == 1 else 0.0
        for item in self.inputs:
            for batch in item.source.read(max_records=_READ_RECORDS, timeout=wait):
                seen += len(batch)
                a, r = self._count(item, batch)
                accepted += a
                rejected.update(r)
        if not seen and len(self.inputs) > 1 and timeout > 0:
            self._stop.wait(timeout)
        now = time.monotonic()
        caught_up = all(i.source.caught_up for i in self.inputs)
        if seen:
            self._last_input = now
        elif now - self._last_input >= self.config.input.idle_seconds and caught_up:
            accepted += self._idle()
        extra = self.extensions.turn(caught_up=caught_up)
        accepted += extra
        if self.extensions.status_changed(self.api.view.status):
            self._unpublished = True  # e.g. a worker's summaries acknowledged since
        if seen or rejected or extra:
            self.dead_letter.flush()
            self.metrics.observe_dead_letters(self.dead_letter.failed_writes)
            self.metrics.observe_batch(accepted, rejected, time.perf_counter() - started)
            self._unpublished = True
        self.turns += 1
        if (
            not self.api.view.status.get("overlay")
            and self.pipeline.engine.window.buffered
            and now - self._views.counted_at >= OVERLAY_SECONDS
        ):
            self._unpublished = True  # a buffer left uncounted: time to show the overlay
        if self._unpublished and now - self._last_publish >= _PUBLISH_SECONDS:
            self._publish()
        self._observe_sinks()
        self._observe_sources()
        interval = self.config.checkpoint.checkpoint_interval_seconds
        if self.config.checkpoint.checkpoint_dir and now - self._last_checkpoint_mono >= interval:
            self.checkpoint()
        return accepted

    def _count(self, item: _Input, batch: RecordBatch) -> tuple[int, Counter[str]]:
        """Decode one batch, release the orders it closes, count; dead-letter what is set
        aside; tell the batch's sender (HTTP ingest) what became of it."""
        if item.handler is not None:  # an extension's own records (e.g. pane summaries)
            return item.handler(batch)
        decoded = item.decoder.decode(batch)
        if decoded.ts is not None:
            latest = max((t for t in decoded.ts if t is not None), default=None)
            if latest is not None:
                due = item.decoder.close_due(latest)
                if due:
                    decoded.extend(Decoded.from_transactions(due, source=batch.source))
        intake = self.pipeline.add(decoded)
        for error in intake.rejected:
            self.dead_letter.write(error, source=batch.source)
        if batch.on_done is not None:
            batch.on_done(intake.accepted, intake.rejected)
        return intake.accepted, intake.by_reason()

    def _idle(self) -> int:
        """The sources are caught up and quiet: close what the decoders hold (open CSV
        orders) and move a time-based window's watermark to the clock. Never in replay."""
        accepted = 0
        for item in self.inputs:
            if item.decoder.held:
                tail = item.decoder.close_all()
                decoded = Decoded.from_transactions(tail, source=item.source.name)
                intake = self.pipeline.add(decoded)
                accepted += intake.accepted
                for error in intake.rejected:
                    self.dead_letter.write(error, source=item.source.name)
        # the clock, or an extension's own watermark (a merger's: where its workers are)
        now = self.extensions.idle_watermark(self.clock)
        if self.pipeline.engine.advance_watermark(now) or accepted:
            self._unpublished = True
        return accepted

    def _finish_inputs(self) -> None:
        """Every source has ended: release what the decoders hold (open CSV orders). The last
        partial batch stays buffered (answers show it as an exact overlay), as in replay."""
        for item in self.inputs:
            tail = item.decoder.close_all()
            if tail:
                decoded = Decoded.from_transactions(tail, source=item.source.name)
                for error in self.pipeline.add(decoded).rejected:
                    self.dead_letter.write(error, source=item.source.name)
        self._unpublished = True

    def _alerts_raised(self, records: list[dict[str, Any]]) -> None:
        self.metrics.observe_alerts(Counter(str(r["kind"]) for r in records))

    def _closed(self, close: int, window: WindowSnapshot, records: list[dict[str, Any]]) -> None:
        """After every evaluated pane close: one history point per followed itemset; a close
        that raised alerts is published at once (with the window it was evaluated on)."""
        monitor = self.pipeline.monitor
        active = [s.rule.items for s in monitor.listing.active()] if monitor is not None else []
        last = self.pipeline.engine.last_closed
        self.history.record(
            close,
            window,
            active=active,
            alerted=[tuple(r["items"]) for r in records],
            pane=-1 if last is None else int(last.index),
        )
        if records:
            self._publish(window)

    def _observe_sources(self) -> None:
        """Readiness follows the sources (a bus that is away), and bus sources' totals go to
        the metrics."""
        healths = [(i.source.name, i.source.health()) for i in self.inputs]
        self.api.set_sources_ready(all(h.connected for _, h in healths) and self.extensions.ready())
        for name, health in healths:
            if health.bus is not None:
                self.metrics.observe_source(name, **dataclasses.asdict(health.bus))

    def _observe_sinks(self) -> None:
        stats = self.sinks.stats_by_sink()
        self.metrics.observe_sinks(
            {name: s.failed for name, s in stats.items()},
            {name: s.dropped for name, s in stats.items()},
        )

    # -- published view ----------------------------------------------------------------------

    def _publish(self, window: WindowSnapshot | None = None) -> None:
        self.api.publish(self._views.build(self.api.view, window))
        self._last_publish = time.monotonic()
        self._unpublished = False

    def _service_state(self) -> ServiceState:
        view = self.api.view
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

    def checkpoint(self) -> bool:
        """Write the whole state atomically; then let each source acknowledge what it holds.

        A failure is logged and counted, never fatal while running; returns whether it worked.
        """
        directory = self.config.checkpoint.checkpoint_dir
        if not directory:
            return True
        waiting = self.extensions.not_ready_for_checkpoint()
        if waiting is not None:
            # e.g. a worker's pane summaries not yet durable on the bus: its input must not be
            # acknowledged, so no checkpoint now; the next interval tries again
            logger.warning("checkpoint to %s put off: %s is not ready", directory, waiting)
            self.metrics.observe_checkpoint(False, self.clock())
            self._last_checkpoint_mono = time.monotonic()
            return False
        pipeline_meta, arrays = self.pipeline.state()
        history_meta, history_arrays = self.history.state()
        arrays.update(history_arrays)
        now = self.clock()
        positions = {i.source.name: i.source.position() for i in self.inputs}
        extension_meta, extension_arrays = self.extensions.state()
        arrays.update(extension_arrays)
        meta = {
            "state_version": STATE_VERSION,
            "pipeline": pipeline_meta,
            "history": history_meta,
            "decoders": {i.source.name: i.decoder.state_dict() for i in self.inputs},
            "sources": positions,
            "written_at": now,
        }
        if self.extensions:
            meta["extensions"] = extension_meta
        ok = False
        try:
            path = save_checkpoint(
                directory,
                meta=meta,
                arrays=arrays,
                fingerprint=self._fingerprint,
                settings=fingerprint_settings(self.config),
            )
        except (OSError, ValueError, CheckpointError) as exc:
            reason: object = exc
            if isinstance(exc, OSError):
                reason = describe_os_error("checkpoint", directory, exc)
            logger.warning("checkpoint to %s failed: %s", directory, reason)
            self.metrics.observe_checkpoint(False, now)
        else:
            ok = True
            self._last_checkpoint_unix = now
            self.metrics.observe_checkpoint(True, now)
            self._unpublished = True  # /v1/status shows the checkpoint time
            logger.info("checkpoint written: %s (seq %d)", path, self.pipeline.engine.next_seq - 1)
            for item in self.inputs:
                item.source.acknowledge(positions[item.source.name])
        self._last_checkpoint_mono = time.monotonic()
        return ok

    def shutdown(self, *, clean: bool = True) -> bool:
        """Stop serving, count what the sources already accepted from outside (HTTP ingest
        bodies), write the final checkpoint and release everything; returns whether the final
        checkpoint (if any is due) was written.

        After an unexpected error (``clean=False``) no checkpoint is written: the state may be
        half-updated, so the last good checkpoint is kept and a restart re-reads from it.
        """
        saved = True
        self.api.set_ready(False)
        if self.server is not None:  # no new requests from here on
            self.server.shutdown()
            self.server.server_close()
        if clean:
            self._drain()
            saved = self.checkpoint()
        else:
            logger.warning("stopping after an error; the last good checkpoint is kept")
        self._publish()
        self.sinks.close(timeout=5.0)
        self.dead_letter.close()
        for item in self.inputs:
            item.source.close()
        self.extensions.close()
        logger.info("stopped after %d transactions", self.pipeline.engine.transactions_seen)
        return saved

    def _drain(self) -> None:
        """Count the batches sources hold for senders already answered or waiting."""
        for item in self.inputs:
            for batch in item.source.drain():
                self._count(item, batch)
        self.dead_letter.flush()

    def positions(self) -> Mapping[str, Any]:
        """Every source's current position, by name."""
        return {i.source.name: i.source.position() for i in self.inputs}
