"""Where alert records go: JSON lines, the log, a webhook, memory; fanned out in isolation.

Every sink follows the :class:`Sink` protocol: ``emit(record)`` hands over one JSON-ready
alert record (:meth:`streamcount.alerts.Alert.as_dict`) and never blocks counting for long,
``close(timeout)`` flushes and releases resources, ``stats()`` returns a :class:`SinkStats`.

- :class:`JsonlSink` appends one JSON object per line to a file (or standard output) and
  flushes after every record.
- :class:`LogSink` logs each record at INFO on the ``streamcount.alerts`` logger.
- :class:`WebhookSink` POSTs each record as JSON from a background thread. ``emit`` only
  appends to a bounded queue; when the queue is full the *oldest* record is dropped and
  counted (``dropped``). A delivery that fails (connection error, timeout, HTTP 5xx, 408 or
  429) is retried up to ``max_retries`` times after an exponential backoff with full jitter,
  ``uniform(0, min(max_backoff_seconds, backoff_seconds * 2**attempt))``; other 4xx answers
  are not retried. One WARNING is logged when deliveries start failing and one INFO when they
  recover, never one per record.
- :class:`MemorySink` keeps the records in a list (tests, demos).
- :class:`SinkFanout` sends each record to every sink; an exception in one sink is counted
  and logged (once per failure streak) and never reaches the others or the caller.

Alerts are signals for a person to review, not decisions.
"""

from __future__ import annotations

import json
import logging
import os
import random
import sys
import threading
import urllib.error
import urllib.request
from collections import deque
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import IO, Any, Protocol, runtime_checkable

from streamcount.config.settings import SinksConfig, WebhookConfig
from streamcount.errors import ConfigError, SinkError, describe_os_error

__all__ = [
    "JsonlSink",
    "LogSink",
    "MemorySink",
    "Sink",
    "SinkFanout",
    "SinkStats",
    "WebhookSink",
    "build_sinks",
]

logger = logging.getLogger(__name__)
alert_logger = logging.getLogger("streamcount.alerts")

Record = Mapping[str, Any]


@dataclass(frozen=True, slots=True)
class SinkStats:
    """Delivery counters of one sink."""

    #: records delivered
    sent: int = 0
    #: records given up on (after the retries, or on a permanent error)
    failed: int = 0
    #: records dropped without a delivery attempt (queue full, or still queued at close)
    dropped: int = 0
    #: delivery attempts repeated after a failure
    retries: int = 0


@runtime_checkable
class Sink(Protocol):
    """An alert destination."""

    name: str

    def emit(self, record: Record) -> None: ...

    def close(self, timeout: float | None = None) -> None: ...

    def stats(self) -> SinkStats: ...


def _dumps(record: Record) -> str:
    try:
        return json.dumps(record, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
    except (TypeError, ValueError) as exc:
        raise SinkError(f"alert record is not JSON-serialisable: {exc}") from exc


class _Counters:
    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.sent = self.failed = self.dropped = self.retries = 0

    def stats(self) -> SinkStats:
        with self.lock:
            return SinkStats(self.sent, self.failed, self.dropped, self.retries)


class JsonlSink:
    """Append each record as one JSON line to ``path`` (``None`` or ``"-"``: standard output).

    The file is opened in append mode (created if missing) and flushed after every record, so
    a reader following the file sees each alert at once.
    """

    def __init__(
        self, path: str | os.PathLike[str] | None = None, *, stream: IO[str] | None = None
    ) -> None:
        self._own = False
        self._path = None if path is None else str(path)
        if stream is not None:
            self._out: IO[str] = stream
            self.name = "stream"
        elif path is None or str(path) == "-":
            self._out = sys.stdout
            self.name = "stdout"
        else:
            try:
                self._out = open(path, "a", encoding="utf-8")  # noqa: SIM115 - held until close
            except OSError as exc:
                raise SinkError(
                    f"alert file cannot be opened: {describe_os_error('sink', path, exc)}"
                ) from exc
            self._own = True
            self.name = "file"
        self._lock = threading.Lock()
        self._c = _Counters()
        self._closed = False

    def emit(self, record: Record) -> None:
        line = _dumps(record) + "\n"
        with self._lock:
            if self._closed:
                raise SinkError(f"{self.name} sink is closed")
            try:
                self._out.write(line)
                self._out.flush()
            except OSError as exc:
                with self._c.lock:
                    self._c.failed += 1
                where = "standard output" if self.name == "stdout" else self._path
                raise SinkError(
                    f"{self.name} sink could not write: {describe_os_error('sink', where, exc)}"
                ) from exc
        with self._c.lock:
            self._c.sent += 1

    def close(self, timeout: float | None = None) -> None:
        with self._lock:
            if self._closed:
                return
            self._closed = True
            if self._own:
                self._out.close()
            else:
                self._out.flush()

    def stats(self) -> SinkStats:
        return self._c.stats()


class LogSink:
    """Log each record at ``level`` on the ``streamcount.alerts`` logger (lazy formatting)."""

    name = "log"

    def __init__(self, *, level: int = logging.INFO, log: logging.Logger | None = None) -> None:
        self._log = log or alert_logger
        self._level = level
        self._c = _Counters()

    def emit(self, record: Record) -> None:
        self._log.log(
            self._level,
            "alert %s %s: %s",
            record.get("kind"),
            record.get("id"),
            _dumps(record),
        )
        with self._c.lock:
            self._c.sent += 1

    def close(self, timeout: float | None = None) -> None:
        return None

    def stats(self) -> SinkStats:
        return self._c.stats()


class MemorySink:
    """Keep records in memory (tests and demos). ``records`` returns a copy."""

    name = "memory"

    def __init__(self) -> None:
        self._records: list[dict[str, Any]] = []
        self._lock = threading.Lock()
        self._c = _Counters()

    @property
    def records(self) -> list[dict[str, Any]]:
        with self._lock:
            return list(self._records)

    def emit(self, record: Record) -> None:
        copy = json.loads(_dumps(record))  # what a real sink would have sent
        with self._lock:
            self._records.append(copy)
        with self._c.lock:
            self._c.sent += 1

    def close(self, timeout: float | None = None) -> None:
        return None

    def stats(self) -> SinkStats:
        return self._c.stats()


_RETRY_STATUS = frozenset({408, 429})


class WebhookSink:
    """POST each record as JSON to ``config.url`` from a background thread.

    Parameters
    ----------
    config:
        ``url`` (http or https), ``timeout_seconds``, ``max_retries``, ``backoff_seconds``,
        ``max_backoff_seconds``, ``queue_size``.
    rng:
        Random source for the jitter (seed it in tests).
    opener:
        ``urllib`` opener (default: ``urllib.request.build_opener()``, which honours the
        proxy environment variables).

    Notes
    -----
    ``emit`` costs O(1) and never waits for the network. Memory: at most ``queue_size``
    records. Delivery is at-least-once per attempt sequence: a receiver that timed out after
    processing may see a record twice; the record ``id`` is stable for deduplication.
    """

    name = "webhook"

    def __init__(
        self,
        config: WebhookConfig,
        *,
        rng: random.Random | None = None,
        opener: urllib.request.OpenerDirector | None = None,
    ) -> None:
        url = config.url
        if not url or not url.lower().startswith(("http://", "https://")):
            raise ConfigError("sinks.webhook.url", url, "must be an http:// or https:// URL")
        if config.queue_size < 1:
            raise ConfigError("sinks.webhook.queue_size", config.queue_size, "must be at least 1")
        if config.max_retries < 0:
            raise ConfigError("sinks.webhook.max_retries", config.max_retries, "must be at least 0")
        self.config = config
        self._url = url
        self._rng = rng or random.Random()
        self._opener = opener or urllib.request.build_opener()
        self._queue: deque[bytes] = deque()
        self._cond = threading.Condition()
        self._closing = False
        self._abort = threading.Event()
        self._failing = False
        self._c = _Counters()
        #: records given up on because the sink was closing (queued, or between retries)
        self._abandoned = 0
        self._thread = threading.Thread(target=self._run, name="streamcount-webhook", daemon=True)
        self._thread.start()

    def emit(self, record: Record) -> None:
        body = _dumps(record).encode("utf-8")
        with self._cond:
            if self._closing:
                raise SinkError("webhook sink is closed")
            if len(self._queue) >= self.config.queue_size:
                self._queue.popleft()
                with self._c.lock:
                    self._c.dropped += 1
            self._queue.append(body)
            self._cond.notify()

    def queued(self) -> int:
        """Records waiting for delivery."""
        with self._cond:
            return len(self._queue)

    def close(self, timeout: float | None = None) -> None:
        """Stop accepting records and deliver the queued ones for up to ``timeout`` seconds.

        Records still queued when the time is up are counted as dropped, one being retried as
        failed; a WARNING says how many records were not delivered.
        """
        with self._cond:
            self._closing = True
            self._cond.notify_all()
        self._thread.join(timeout)
        if self._thread.is_alive():
            self._abort.set()
            with self._cond:
                self._cond.notify_all()
            self._thread.join(max(1.0, self.config.timeout_seconds + 1.0))
        with self._cond:
            # a worker still stuck in a request (past its own timeout) leaves its queue behind
            left = len(self._queue)
            self._queue.clear()
        with self._c.lock:
            self._c.dropped += left
            abandoned = self._abandoned + left
        if abandoned:
            logger.warning(
                "webhook sink closed with %d alert records undelivered to %s (deliveries were "
                "still failing at shutdown); counted in streamcount_sink_dropped_total and "
                "streamcount_sink_failures_total",
                abandoned,
                self._url,
            )

    def stats(self) -> SinkStats:
        return self._c.stats()

    # -------------------------------------------------------------- worker
    def _run(self) -> None:
        while True:
            with self._cond:
                while not self._queue and not self._closing:
                    self._cond.wait()
                if self._abort.is_set() or not self._queue:
                    left = len(self._queue)
                    self._queue.clear()
                    if left:
                        with self._c.lock:
                            self._c.dropped += left
                            self._abandoned += left
                    return
                body = self._queue.popleft()
            self._deliver(body)

    def _backoff(self, attempt: int) -> float:
        cap = min(self.config.max_backoff_seconds, self.config.backoff_seconds * 2.0**attempt)
        return self._rng.uniform(0.0, max(0.0, cap))

    def _post(self, body: bytes) -> tuple[bool, bool, str]:
        """One attempt: ``(delivered, retryable, reason)``."""
        req = urllib.request.Request(
            self._url,
            data=body,
            method="POST",
            headers={"Content-Type": "application/json", "User-Agent": "streamcount"},
        )
        try:
            with self._opener.open(req, timeout=self.config.timeout_seconds) as resp:
                resp.read()
                status = int(resp.status)
        except urllib.error.HTTPError as exc:
            exc.close()
            retry = exc.code >= 500 or exc.code in _RETRY_STATUS
            return False, retry, f"HTTP {exc.code}"
        except (urllib.error.URLError, OSError, ValueError) as exc:
            return False, True, f"{type(exc).__name__}: {exc}"
        if 200 <= status < 300:
            return True, False, ""
        return False, status >= 500, f"HTTP {status}"

    def _deliver(self, body: bytes) -> None:
        attempt = 0
        while True:
            ok, retryable, reason = self._post(body)
            if ok:
                with self._c.lock:
                    self._c.sent += 1
                if self._failing:
                    self._failing = False
                    logger.info("webhook sink recovered: delivering to %s again", self._url)
                return
            if not self._failing:
                self._failing = True
                logger.warning(
                    "webhook sink failing: %s from %s (retrying with backoff; further "
                    "failures are counted, not logged)",
                    reason,
                    self._url,
                )
            if not retryable or attempt >= self.config.max_retries or self._abort.is_set():
                with self._c.lock:
                    self._c.failed += 1
                    if retryable and attempt < self.config.max_retries:
                        self._abandoned += 1  # would have been retried but for the close
                return
            with self._c.lock:
                self._c.retries += 1
            if self._abort.wait(self._backoff(attempt)):
                with self._c.lock:
                    self._c.failed += 1
                    self._abandoned += 1
                return
            attempt += 1


class SinkFanout:
    """Send each record to every sink, isolating failures.

    An exception raised by one sink's ``emit`` is counted (:meth:`errors`) and logged as a
    WARNING on the first failure of a streak; the other sinks still get the record.
    """

    name = "fanout"

    def __init__(self, sinks: Iterable[Sink]) -> None:
        self.sinks: tuple[Sink, ...] = tuple(sinks)
        self._errors = [0] * len(self.sinks)
        self._failing = [False] * len(self.sinks)
        self._lock = threading.Lock()

    def emit(self, record: Record) -> None:
        self.emit_all([record])

    def emit_all(self, records: Iterable[Record]) -> None:
        for record in records:
            for i, sink in enumerate(self.sinks):
                try:
                    sink.emit(record)
                except Exception as exc:
                    with self._lock:
                        self._errors[i] += 1
                        first = not self._failing[i]
                        self._failing[i] = True
                    if first:
                        logger.warning("alert sink %s failed: %s", sink.name, exc)
                else:
                    if self._failing[i]:
                        with self._lock:
                            self._failing[i] = False
                        logger.info("alert sink %s accepts records again", sink.name)

    def errors(self) -> dict[str, int]:
        """Exceptions raised by ``emit`` per sink name."""
        with self._lock:
            return {s.name: e for s, e in zip(self.sinks, self._errors, strict=True)}

    def close(self, timeout: float | None = None) -> None:
        for sink in self.sinks:
            try:
                sink.close(timeout)
            except Exception as exc:
                logger.warning("alert sink %s failed to close: %s", sink.name, exc)

    def stats(self) -> SinkStats:
        """Totals over all sinks (``failed`` includes exceptions caught here)."""
        per = [s.stats() for s in self.sinks]
        with self._lock:
            errors = sum(self._errors)
        return SinkStats(
            sum(p.sent for p in per),
            sum(p.failed for p in per) + errors,
            sum(p.dropped for p in per),
            sum(p.retries for p in per),
        )

    def stats_by_sink(self) -> dict[str, SinkStats]:
        return {s.name: s.stats() for s in self.sinks}


def build_sinks(config: SinksConfig) -> SinkFanout:
    """The sinks named by ``config`` (stdout, file, log, webhook), in that order."""
    sinks: list[Sink] = []
    if config.stdout:
        sinks.append(JsonlSink(None))
    if config.file:
        sinks.append(JsonlSink(config.file))
    if config.log:
        sinks.append(LogSink())
    if config.webhook.url:
        sinks.append(WebhookSink(config.webhook))
    return SinkFanout(sinks)
