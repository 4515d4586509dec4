"""Alert sinks against real files and a real HTTP server on 127.0.0.1."""

from __future__ import annotations

import json
import logging
import random
import threading
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

import pytest

from streamcount.alerts.sinks import (
    JsonlSink,
    LogSink,
    MemorySink,
    Sink,
    SinkFanout,
    SinkStats,
    WebhookSink,
    build_sinks,
)
from streamcount.config.settings import SinksConfig, WebhookConfig
from streamcount.errors import ConfigError, SinkError


def record(i: int) -> dict:
    return {"id": f"{i:016x}", "kind": "emerged", "seq": i, "items": ["fig tart", "oat loaf"]}


class Receiver:
    """A real HTTP server in a thread; ``plan`` gives the status per request (then 200)."""

    def __init__(self, plan: list[int] | None = None, *, gate: threading.Event | None = None):
        self.plan = list(plan or [])
        self.gate = gate
        self.bodies: list[dict] = []
        self.attempts = 0
        self.first_request = threading.Event()
        self.lock = threading.Lock()
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self):
                body = self.rfile.read(int(self.headers["Content-Length"]))
                receiver.first_request.set()
                if receiver.gate is not None:
                    receiver.gate.wait(10)  # a slow receiver, released by the test
                with receiver.lock:
                    receiver.attempts += 1
                    status = receiver.plan.pop(0) if receiver.plan else 200
                    if status == 200:
                        receiver.bodies.append(json.loads(body))
                self.send_response(status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args):
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.server.daemon_threads = True
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)
        self.thread.start()
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hook"

    def close(self):
        if self.gate is not None:
            self.gate.set()
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(5)


@pytest.fixture
def receivers():
    made: list[Receiver] = []

    def make(*args, **kwargs) -> Receiver:
        r = Receiver(*args, **kwargs)
        made.append(r)
        return r

    yield make
    for r in made:
        r.close()


def webhook(url: str, **kw) -> WebhookSink:
    cfg = WebhookConfig(
        url=url,
        timeout_seconds=kw.pop("timeout_seconds", 5.0),
        max_retries=kw.pop("max_retries", 3),
        backoff_seconds=0.01,
        max_backoff_seconds=0.05,
        queue_size=kw.pop("queue_size", 100),
    )
    return WebhookSink(cfg, rng=random.Random(0))


def test_webhook_delivers(receivers):
    rx = receivers()
    sink = webhook(rx.url)
    for i in range(5):
        sink.emit(record(i))
    sink.close(10)
    assert sink.stats() == SinkStats(sent=5, failed=0, dropped=0, retries=0)
    assert [b["seq"] for b in rx.bodies] == [0, 1, 2, 3, 4]
    with pytest.raises(SinkError, match="closed"):
        sink.emit(record(9))


def test_webhook_retries_then_recovers(receivers, caplog):
    rx = receivers(plan=[500, 500])
    sink = webhook(rx.url)
    with caplog.at_level(logging.INFO, logger="streamcount.alerts.sinks"):
        sink.emit(record(1))
        sink.close(10)
    assert [b["seq"] for b in rx.bodies] == [1]
    assert rx.attempts == 3
    assert sink.stats() == SinkStats(sent=1, failed=0, dropped=0, retries=2)
    levels = [(r.levelname, r.getMessage()) for r in caplog.records]
    assert sum(lv == "WARNING" for lv, _ in levels) == 1  # once, not per attempt
    assert any(lv == "INFO" and "recovered" in msg for lv, msg in levels)


def test_webhook_gives_up_after_retries(receivers):
    rx = receivers(plan=[503] * 10)
    sink = webhook(rx.url, max_retries=2)
    sink.emit(record(1))
    sink.close(10)
    assert rx.attempts == 3
    assert sink.stats() == SinkStats(sent=0, failed=1, dropped=0, retries=2)


def test_webhook_does_not_retry_client_errors(receivers):
    rx = receivers(plan=[400])
    sink = webhook(rx.url)
    sink.emit(record(1))
    sink.close(10)
    assert rx.attempts == 1
    assert sink.stats().failed == 1


def test_webhook_slow_server_does_not_block_emit(receivers):
    gate = threading.Event()
    rx = receivers(gate=gate)
    sink = webhook(rx.url)
    sink.emit(record(0))
    assert rx.first_request.wait(10)
    # the receiver is holding the first request; emitting more returns at once
    for i in range(1, 4):
        sink.emit(record(i))
    assert not gate.is_set()
    assert rx.bodies == []  # nothing answered yet, yet every emit has returned
    gate.set()
    sink.close(10)
    assert [b["seq"] for b in rx.bodies] == [0, 1, 2, 3]
    assert sink.stats().sent == 4


def test_webhook_queue_overflow_drops_oldest(receivers):
    gate = threading.Event()
    rx = receivers(gate=gate)
    sink = webhook(rx.url, queue_size=2)
    sink.emit(record(0))
    assert rx.first_request.wait(10)  # record 0 is in flight, the queue is empty
    for i in range(1, 6):
        sink.emit(record(i))
    assert sink.queued() == 2
    assert sink.stats().dropped == 3
    gate.set()
    sink.close(10)
    assert [b["seq"] for b in rx.bodies] == [0, 4, 5]  # 1, 2, 3 were the oldest
    assert sink.stats() == SinkStats(sent=3, failed=0, dropped=3, retries=0)


def test_webhook_connection_refused_is_counted():
    # a port that was free a moment ago: nothing listens there now
    srv = ThreadingHTTPServer(("127.0.0.1", 0), BaseHTTPRequestHandler)
    port = srv.server_address[1]
    srv.server_close()
    sink = webhook(f"http://127.0.0.1:{port}/", max_retries=1)
    sink.emit(record(1))
    sink.close(10)
    assert sink.stats() == SinkStats(sent=0, failed=1, dropped=0, retries=1)


def test_webhook_still_failing_at_shutdown_logs_and_counts_what_was_undelivered(receivers, caplog):
    caplog.set_level(logging.WARNING, logger="streamcount.alerts.sinks")
    rx = receivers(plan=[503] * 1000)  # the receiver is down for the whole test
    cfg = WebhookConfig(
        url=rx.url,
        timeout_seconds=5.0,
        max_retries=100,
        backoff_seconds=30.0,  # the first retry waits up to 30 s: longer than the close allows
        max_backoff_seconds=30.0,
        queue_size=100,
    )
    sink = WebhookSink(cfg, rng=random.Random(3))
    for i in range(4):
        sink.emit(record(i))
    assert rx.first_request.wait(10)
    sink.close(0.3)
    # record 0 was between retries (failed), records 1-3 still queued (dropped)
    assert sink.stats() == SinkStats(sent=0, failed=1, dropped=3, retries=1)
    closing = [r.getMessage() for r in caplog.records if "undelivered" in r.getMessage()]
    assert len(closing) == 1, closing
    assert "4 alert records undelivered" in closing[0]
    assert rx.url in closing[0]


def test_webhook_closing_after_delivering_everything_says_nothing(receivers, caplog):
    caplog.set_level(logging.WARNING, logger="streamcount.alerts.sinks")
    rx = receivers()
    sink = webhook(rx.url)
    sink.emit(record(1))
    sink.close(10)
    assert sink.stats().sent == 1
    assert not [r for r in caplog.records if "undelivered" in r.getMessage()]


def test_alert_file_that_cannot_be_opened_names_role_path_and_way_out(tmp_path):
    target = tmp_path / "a-directory"
    target.mkdir()
    with pytest.raises(SinkError) as info:
        JsonlSink(target)
    message = str(info.value)
    assert f"sink {target}" in message and "sinks.file" in message


def test_webhook_config_checked():
    with pytest.raises(ConfigError, match=r"sinks\.webhook\.url"):
        WebhookSink(WebhookConfig(url=None))
    with pytest.raises(ConfigError, match=r"sinks\.webhook\.url"):
        WebhookSink(WebhookConfig(url="ftp://example.invalid/"))


def test_jsonl_file_appends(tmp_path):
    path = tmp_path / "alerts.jsonl"
    path.write_text(json.dumps({"earlier": True}) + "\n")
    sink = JsonlSink(path)
    sink.emit(record(1))
    # flushed per record: readable before close
    assert len(path.read_text().splitlines()) == 2
    sink.emit({**record(2), "event_time": None, "note": "crème fraîche"})
    sink.close()
    lines = [json.loads(x) for x in path.read_text(encoding="utf-8").splitlines()]
    assert lines[0] == {"earlier": True}
    assert [x["seq"] for x in lines[1:]] == [1, 2]
    assert lines[2]["note"] == "crème fraîche"
    assert sink.stats() == SinkStats(sent=2)
    with pytest.raises(SinkError):
        JsonlSink(tmp_path / "missing-dir" / "a.jsonl")


def test_jsonl_rejects_non_json(tmp_path):
    sink = JsonlSink(tmp_path / "a.jsonl")
    with pytest.raises(SinkError, match="JSON"):
        sink.emit({"x": float("inf")})
    sink.close()


def test_stdout_sink(capsys):
    sink = JsonlSink("-")
    sink.emit(record(3))
    sink.close()
    assert json.loads(capsys.readouterr().out) == record(3)


def test_log_and_memory_sinks(caplog):
    log = LogSink()
    mem = MemorySink()
    with caplog.at_level(logging.INFO, logger="streamcount.alerts"):
        log.emit(record(4))
    assert any('"seq":4' in r.getMessage() for r in caplog.records)
    mem.emit(record(4))
    assert mem.records == [record(4)]
    assert isinstance(log, Sink) and isinstance(mem, Sink)


class Broken:
    name = "broken"

    def emit(self, record):
        raise OSError("disk on fire")

    def close(self, timeout=None):
        raise OSError("still on fire")

    def stats(self):
        return SinkStats()


def test_fanout_isolates_errors(caplog, tmp_path):
    mem = MemorySink()
    fan = SinkFanout([Broken(), mem, JsonlSink(tmp_path / "a.jsonl")])
    with caplog.at_level(logging.WARNING, logger="streamcount.alerts.sinks"):
        fan.emit_all([record(1), record(2), record(3)])
        fan.close(1)
    assert [r["seq"] for r in mem.records] == [1, 2, 3]
    assert fan.errors() == {"broken": 3, "memory": 0, "file": 0}
    failures = [r for r in caplog.records if "failed:" in r.getMessage()]
    assert len(failures) == 1  # once per streak, not per record
    assert fan.stats().sent == 6
    assert fan.stats().failed == 3


def test_build_sinks(tmp_path, receivers):
    rx = receivers()
    cfg = SinksConfig(
        stdout=False,
        file=str(tmp_path / "out.jsonl"),
        log=True,
        webhook=WebhookConfig(url=rx.url),
    )
    fan = build_sinks(cfg)
    assert [s.name for s in fan.sinks] == ["file", "log", "webhook"]
    fan.emit(record(7))
    fan.close(10)
    assert rx.bodies == [record(7)]
    assert json.loads((tmp_path / "out.jsonl").read_text()) == record(7)
