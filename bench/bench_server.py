"""The HTTP server under slow clients and bursts: /metrics latency, and who gets answered.

Run from the repository root::

    python3 bench/bench_server.py            # prints the figures (about a minute)
    python3 bench/bench_server.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_server.py --slow 50 --scrapes 50 --seconds 5   # quick

The server runs in a child process (so the load generator never shares its interpreter):
:func:`streamcount.service.server.start_server` with its default limits and a token, over a
backend whose ``/metrics`` is a real registry with 20 per-rule gauges (about 16 kB, like a
service with ``metrics.top_rules: 20``). The parent then measures:

* ``baseline``: ``GET /metrics`` with the token, one new connection per scrape, nothing else
  connected: median, p95 and max latency over ``--scrapes`` scrapes;
* ``slow``: the same while ``--slow`` clients (200) each send a request one byte per second,
  spread over ten loopback addresses (127.0.0.2-11) so the per-address cap (64) holds them;
  a client cut off by the request deadline (408) connects again at once, so the 200 are held
  for the whole measurement. Target: p95 < 50 ms;
* ``burst``: ``--burst`` connections (200) opened at the same moment from the ten addresses,
  each sending ``GET /healthz``: how many got 200, 503 (over a cap, with Retry-After) or
  nothing (reset, timeout), and the time until the last answer. Target: every client answered
  200 (the listen backlog holds the burst; the caps are not reached).

The scrapes of each measurement are spread over ``--seconds`` (20 s), longer than the request
deadline (10 s), so the slow clients are cut off and reconnect during the measurement.
"""

from __future__ import annotations

import argparse
import contextlib
import http.client
import json
import socket
import statistics
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path

SCRIPT = Path(__file__).resolve()
TOKEN = "bench-token-0123456789abcdef"
TARGET_P95_MS = 50.0
_SOURCES = [f"127.0.0.{i}" for i in range(2, 12)]


# --- the server (child process) -----------------------------------------------------------------


def serve() -> int:
    """Start the server, print its port, serve until standard input closes."""
    from prometheus_client import CONTENT_TYPE_LATEST, CollectorRegistry, generate_latest

    from streamcount.engine.snapshot import EngineStatistics
    from streamcount.service.metrics import Metrics, RuleSample, ServiceState
    from streamcount.service.server import ServerOptions, start_server

    registry = CollectorRegistry()
    stats = EngineStatistics(
        250_000, {}, 50_000, 50, (900, 4000, 2500), 4 << 20, 10, 10, 0, None, 900
    )
    rules = tuple(
        RuleSample((f"oat-loaf-{i}", "plum-jam"), (f"scone-{i}",), 0.01, 0.6, 2.0 + i / 10)
        for i in range(20)
    )
    metrics = Metrics(
        registry,
        statistics=lambda: stats,
        state=lambda: ServiceState(active_rules=20, top_rules=rules),
        top_rules=20,
    )
    metrics.observe_batch(250_000, {"malformed": 12}, 0.02)

    class Backend:
        def metrics_payload(self) -> tuple[bytes, str]:
            return generate_latest(registry), CONTENT_TYPE_LATEST

        def healthy(self) -> bool:
            return True

        def ready(self) -> bool:
            return True

        def status(self) -> dict[str, Any]:
            return {"transactions_seen": stats.transactions_seen}

        def itemsets(self, *args: Any) -> dict[str, Any]:
            return {"itemsets": []}

        def rules(self, *args: Any) -> dict[str, Any]:
            return {"rules": []}

        def alerts(self, *args: Any) -> dict[str, Any]:
            return {"alerts": []}

        def ingest_enabled(self) -> bool:
            return False

        def ingest(self, body: bytes, content_type: str) -> dict[str, Any]:
            raise AssertionError("ingest is off")

    server, thread = start_server(
        "127.0.0.1:0",
        Backend(),
        token=TOKEN,
        max_request_bytes=1 << 20,
        request_timeout_seconds=10.0,
        options=ServerOptions(),
    )
    metrics.watch_server(server.stats)
    print(server.server_port, flush=True)
    sys.stdin.read()
    server.shutdown()
    server.server_close()
    thread.join(15)
    return 0


# --- the load (parent process) -------------------------------------------------------------------


def _scrape(port: int) -> float:
    started = time.perf_counter()
    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=30)
    try:
        conn.request("GET", "/metrics", headers={"Authorization": f"Bearer {TOKEN}"})
        answer = conn.getresponse()
        body = answer.read()
        if answer.status != 200 or b"streamcount_rule_lift" not in body:
            raise RuntimeError(f"scrape answered {answer.status}")
    finally:
        conn.close()
    return (time.perf_counter() - started) * 1000.0


def _latencies(port: int, scrapes: int, seconds: float) -> dict[str, float]:
    values = []
    start = time.monotonic()
    for i in range(scrapes):
        values.append(_scrape(port))
        time.sleep(max(0.0, start + (i + 1) * seconds / scrapes - time.monotonic()))
    values.sort()
    return {
        "median_ms": statistics.median(values),
        "p95_ms": values[min(len(values) - 1, round(0.95 * (len(values) - 1)))],
        "max_ms": values[-1],
        "n": len(values),
    }


class SlowClients:
    """``n`` connections each sending a request one byte per second, reconnected when cut."""

    REQUEST = b"GET /v1/status HTTP/1.1\r\nHost: x\r\nX-Slow: " + b"s" * 200 + b"\r\n\r\n"

    def __init__(self, port: int, n: int) -> None:
        self.port = port
        self.n = n
        self.socks: list[tuple[socket.socket, int] | None] = [None] * n
        self.stop = threading.Event()
        self.reconnects = 0
        self.cut_408 = 0
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _open(self, i: int) -> tuple[socket.socket, int] | None:
        try:
            sock = socket.create_connection(
                ("127.0.0.1", self.port), timeout=5, source_address=(_SOURCES[i % 10], 0)
            )
        except OSError:
            return None
        sock.setblocking(False)
        return sock, 0

    def start(self) -> None:
        for i in range(self.n):
            self.socks[i] = self._open(i)
        self.thread.start()

    def held(self) -> int:
        return sum(s is not None for s in self.socks)

    def _run(self) -> None:
        while not self.stop.wait(1.0):
            for i, entry in enumerate(self.socks):
                if entry is None:
                    self.socks[i] = self._open(i)
                    self.reconnects += 1
                    continue
                sock, sent = entry
                try:
                    data = sock.recv(65536)
                    self.cut_408 += data.startswith(b"HTTP/1.1 408")
                    closed = True  # an answer (408) or EOF: the server let it go
                except BlockingIOError:
                    closed = False
                except OSError:
                    closed = True
                if not closed:
                    try:
                        sock.send(self.REQUEST[sent : sent + 1])
                        sent = (sent + 1) % len(self.REQUEST)
                    except OSError:
                        closed = True
                if closed:
                    sock.close()
                    self.socks[i] = self._open(i)
                    self.reconnects += 1
                else:
                    self.socks[i] = (sock, sent)

    def close(self) -> None:
        self.stop.set()
        self.thread.join(10)
        for entry in self.socks:
            if entry is not None:
                entry[0].close()


def _burst(port: int, n: int) -> dict[str, Any]:
    barrier = threading.Barrier(n)
    outcomes: list[str] = ["none"] * n
    finished: list[float] = [0.0] * n

    def client(i: int) -> None:
        try:
            barrier.wait(30)
            with socket.create_connection(
                ("127.0.0.1", port), timeout=30, source_address=(_SOURCES[i % 10], 0)
            ) as sock:
                sock.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
                reply = b""
                while chunk := sock.recv(65536):
                    reply += chunk
            head = reply.split(b"\r\n", 1)[0]
            outcomes[i] = head.split(b" ")[1].decode() if head else "empty"
        except Exception as exc:
            outcomes[i] = type(exc).__name__
        finished[i] = time.perf_counter()

    threads = [threading.Thread(target=client, args=(i,)) for i in range(n)]
    for t in threads:
        t.start()
    started = time.perf_counter()
    for t in threads:
        t.join(60)
    counts: dict[str, int] = {}
    for outcome in outcomes:
        counts[outcome] = counts.get(outcome, 0) + 1
    return {
        "outcomes": counts,
        "answered_200": counts.get("200", 0),
        "last_answer_s": max(finished) - started,
    }


def run(args: argparse.Namespace) -> int:
    info = machine.machine_info()
    print("# /metrics under slow clients, and a connection burst")
    print(machine.format_machine(info))
    child = subprocess.Popen(
        [sys.executable, str(SCRIPT), "--serve"],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert child.stdout is not None
        port = int(child.stdout.readline())
        _latencies(port, 10, 0.5)  # warm-up
        baseline = _latencies(port, args.scrapes, args.seconds)
        slow = SlowClients(port, args.slow)
        slow.start()
        try:
            time.sleep(2.0)
            held_before = slow.held()
            under_slow = _latencies(port, args.scrapes, args.seconds)
            held_after = slow.held()
        finally:
            slow.close()
        time.sleep(1.0)
        burst = _burst(port, args.burst)
    finally:
        if child.stdin is not None:
            child.stdin.close()
        child.wait(30)
    info["load_average_at_end"] = machine.load_average()

    def row(name: str, r: dict[str, float]) -> str:
        return (
            f"| {name} | {r['median_ms']:.1f} | {r['p95_ms']:.1f} | {r['max_ms']:.1f} | {r['n']} |"
        )

    ok_latency = under_slow["p95_ms"] < TARGET_P95_MS
    ok_burst = burst["answered_200"] == args.burst
    table = "\n".join(
        [
            "| /metrics scrape | median ms | p95 ms | max ms | scrapes |",
            "|---|---|---|---|---|",
            row("alone (baseline)", baseline),
            row(f"with {args.slow} slow clients held", under_slow),
        ]
    )
    notes = (
        f"slow clients held: {held_before} at the start, {held_after} at the end; "
        f"cut off with 408 and reconnected: {slow.cut_408} / {slow.reconnects}\n"
        f"burst of {args.burst} connections: {json.dumps(burst['outcomes'])}, last answer after "
        f"{burst['last_answer_s']:.2f} s\n"
        f"p95 under slow clients < {TARGET_P95_MS:g} ms: {machine.verdict(ok_latency)}; "
        f"every burst client answered 200: {machine.verdict(ok_burst)}"
    )
    print(table)
    print(notes)
    if args.record:
        machine.record(
            "server",
            "HTTP server: /metrics under slow clients, connection burst",
            table + "\n\n" + notes.replace("\n", "  \n"),
            {"machine": info, "baseline": baseline, "slow": under_slow, "burst": burst},
        )
    return 0 if ok_latency and ok_burst else 1


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--slow", type=int, default=200, help="slow clients held (200)")
    parser.add_argument("--scrapes", type=int, default=200, help="scrapes per measurement")
    parser.add_argument("--burst", type=int, default=200, help="connections in the burst")
    parser.add_argument(
        "--seconds", type=float, default=20.0, help="time each measurement's scrapes span"
    )
    parser.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    parser.add_argument("--serve", action="store_true", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.serve:
        return serve()
    with contextlib.suppress(KeyboardInterrupt):
        return run(args)
    return 130


if __name__ == "__main__":
    sys.exit(main())
