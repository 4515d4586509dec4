"""The page's cost: its size, the bytes and server time of its refreshes, and what 10 open pages
take from counting.

Run from the repository root::

    python3 bench/bench_page.py            # prints the figures (a few minutes)
    python3 bench/bench_page.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_page.py --copies 1 --repeat 1 --quiet-seconds 5   # quick

Cases (each service in a fresh process; the simulated pages run in this process, so their own
CPU is not charged to the service):

* **size**: the bytes of the page's files (``/``, script, style sheet, icon), as served
  (no compression).
* **throughput**: :class:`~streamcount.service.loop.Service` counting T10I4D100K written
  ``--copies`` times into one file (basket, K=3, epsilon 0.001, window 50,000 in panes of
  5,000, follow off, listener on 127.0.0.1, no checkpoints, no sinks), timed from construction
  until :meth:`run` returns; once with no client (``base``) and once with ``--pages`` simulated
  pages (``pages``), alternated, ``--repeat`` times each. Target: the median with pages is at
  most 2 % below the median without.
* **refresh**: the same pages against a service that has counted the file and stays up
  (follow on), for ``--quiet-seconds``: the steady state of a page left open on a quiet feed.

A simulated page makes exactly the page's requests at the page's cadence (``--every`` seconds,
the pages staggered evenly over one period): on opening, the four page files, then
``/v1/status``, ``/v1/rules?limit=10000``, ``/v1/alerts?limit=500`` and ``/v1/history`` of the
first rule; then at each refresh the same four API requests with the page's cursors
(``since=`` the rules version, the last alert seq, the last pane close). It does not draw; the
drawing is the browser's cost, not the service's. Server time per request is the time from
sending a request to having read its answer, on loopback (a new connection per request, as the
page's browser may use).
"""

from __future__ import annotations

import argparse
import gzip
import http.client
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any
from urllib.parse import quote

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path

SCRIPT = Path(__file__).resolve()
TARGET_DROP = 0.02
PAGE_FILES = ("/", "/page/app.js", "/page/style.css", "/page/icon.svg")


# ---------------------------------------------------------------------------------------------
# the service (child process)


def _config(path: str, follow: bool) -> Any:
    from streamcount.config.settings import (
        CheckpointConfig,
        Config,
        EngineConfig,
        InputConfig,
        ServerConfig,
        SinksConfig,
    )

    return Config(
        input=InputConfig(path=path, format="basket", follow=follow, dead_letter_path=None),
        engine=EngineConfig(
            epsilon=0.001, max_itemset_size=3, window_size=50_000, pane_size=5_000, batch_size=5_000
        ),
        server=ServerConfig(listen="127.0.0.1:0"),
        checkpoint=CheckpointConfig(checkpoint_dir=None),
        sinks=SinksConfig(log=False),
    )


def run_child(case: dict[str, Any]) -> int:
    """Start the service, say its port on stdout, run; then print the figures as JSON."""
    from streamcount.service.loop import Service

    cfg = _config(case["path"], case["follow"])
    start = time.perf_counter()
    service = Service(cfg, fresh=True)
    _, port = service.start_server() or ("", 0)
    print(json.dumps({"port": port}), flush=True)
    if case["follow"]:
        # until the parent closes our stdin
        threading.Thread(
            target=lambda: (sys.stdin.read(), service.request_stop()), daemon=True
        ).start()
    service.run(install_signals=False)
    seconds = time.perf_counter() - start
    n = int(service.pipeline.engine.transactions_seen)
    print(json.dumps({"transactions": n, "seconds": seconds, "tps": n / seconds}), flush=True)
    return 0


# ---------------------------------------------------------------------------------------------
# simulated pages (this process)


class _Page(threading.Thread):
    """One open page: its requests at its cadence, with its cursors."""

    def __init__(self, port: int, every: float, offset: float, stop: threading.Event) -> None:
        super().__init__(daemon=True)
        self.port, self.every, self.offset, self.stop = port, every, offset, stop
        self.samples: list[tuple[str, float, int]] = []  # (endpoint, seconds, bytes)
        self.steady: list[tuple[str, float, int]] = []  # the same, after the first load
        self.refreshes: list[int] = []  # bytes per refresh after the first
        self.first_load = 0
        self.loaded = False
        self.rules_version: str | None = None
        self.alert_seq: int | None = None
        self.items: list[str] | None = None
        self.last_close: int | None = None

    def _get(self, path: str, name: str) -> tuple[bytes, int]:
        t = time.perf_counter()
        conn = http.client.HTTPConnection("127.0.0.1", self.port, timeout=30)
        try:
            conn.request("GET", path)
            res = conn.getresponse()
            body = res.read()
        finally:
            conn.close()
        sample = (name, time.perf_counter() - t, len(body))
        self.samples.append(sample)
        if self.loaded:
            self.steady.append(sample)
        return body, res.status

    def _refresh(self) -> int:
        total = 0
        body, _ = self._get("/v1/status", "status")
        total += len(body)
        since = "" if self.rules_version is None else f"&since={quote(self.rules_version)}"
        body, _ = self._get(f"/v1/rules?limit=10000{since}", "rules")
        total += len(body)
        rules = json.loads(body)
        if not rules.get("unchanged"):
            self.rules_version = rules["version"]
            if self.items is None and rules["rules"]:
                r = rules["rules"][0]
                self.items = r["antecedent"] + r["consequent"]
        since = "" if self.alert_seq is None else f"&since={self.alert_seq}"
        body, _ = self._get(f"/v1/alerts?limit=500{since}", "alerts")
        total += len(body)
        for a in json.loads(body)["alerts"]:
            self.alert_seq = max(self.alert_seq or 0, int(a["seq"]))
        if self.items:
            q = "&".join(f"items={quote(n)}" for n in self.items)
            since = "" if self.last_close is None else f"&since={self.last_close}"
            body, status = self._get(f"/v1/history?{q}{since}", "history")
            total += len(body)
            if status == 200:
                points = json.loads(body)["points"]
                if points:
                    self.last_close = points[-1]["pane_close"]
        return total

    def run(self) -> None:
        if self.stop.wait(self.offset):
            return
        for path in PAGE_FILES:
            body, _ = self._get(path, "page files")
            self.first_load += len(body)
        self.first_load += self._refresh()
        self.loaded = True
        next_at = time.monotonic() + self.every
        while not self.stop.wait(max(0.0, next_at - time.monotonic())):
            next_at += self.every
            try:
                self.refreshes.append(self._refresh())
            except OSError:
                return  # the service ended


def _start_child(path: Path, follow: bool) -> tuple[subprocess.Popen[str], int]:
    case = {"path": str(path), "follow": follow}
    proc = subprocess.Popen(
        [sys.executable, str(SCRIPT), "--case", json.dumps(case)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        text=True,
        env={**os.environ, "PYTHONHASHSEED": "0"},
    )
    assert proc.stdout is not None
    port = int(json.loads(proc.stdout.readline())["port"])
    return proc, port


def _finish_child(proc: subprocess.Popen[str]) -> dict[str, Any]:
    assert proc.stdout is not None and proc.stdin is not None
    proc.stdin.close()
    out = proc.stdout.read()
    if proc.wait() != 0:
        raise RuntimeError(f"the service exited with {proc.returncode}")
    return json.loads(out.strip().splitlines()[-1])  # type: ignore[no-any-return]


def _pages(port: int, n: int, every: float) -> tuple[list[_Page], threading.Event]:
    stop = threading.Event()
    pages = [_Page(port, every, i * every / max(1, n), stop) for i in range(n)]
    for p in pages:
        p.start()
    return pages, stop


def _throughput_once(path: Path, pages: int, every: float) -> dict[str, Any]:
    proc, port = _start_child(path, follow=False)
    clients, stop = _pages(port, pages, every)
    assert proc.stdout is not None
    out = proc.stdout.read()
    stop.set()
    for c in clients:
        c.join(timeout=30)
    if proc.wait() != 0:
        raise RuntimeError(f"the service exited with {proc.returncode}")
    result = json.loads(out.strip().splitlines()[-1])
    result["requests"] = sum(len(c.samples) for c in clients)
    result["samples"] = [s for c in clients for s in c.samples]
    return result


def _latency(samples: list[tuple[str, float, int]]) -> dict[str, dict[str, float]]:
    by: dict[str, list[tuple[float, int]]] = {}
    for name, seconds, size in samples:
        by.setdefault(name, []).append((seconds, size))
    out = {}
    for name, values in sorted(by.items()):
        times = sorted(v[0] for v in values)
        out[name] = {
            "n": len(times),
            "median_ms": 1000 * statistics.median(times),
            "p90_ms": 1000 * times[int(0.9 * (len(times) - 1))],
            "max_ms": 1000 * times[-1],
            "median_bytes": statistics.median(v[1] for v in values),
        }
    return out


def _fmt_latency(lat: dict[str, dict[str, float]]) -> list[str]:
    return [
        f"  {name:<11} n={v['n']:>5,}  median {v['median_ms']:6.2f} ms  p90 {v['p90_ms']:6.2f} ms  "
        f"max {v['max_ms']:7.2f} ms  median answer {v['median_bytes']:,.0f} B"
        for name, v in lat.items()
    ]


def run_parent(args: argparse.Namespace) -> int:
    from streamcount.service.page import page_file

    info = machine.machine_info()
    print(f"# streamcount page benchmark, {info['date']}")
    print(machine.format_machine(info))
    lines: list[str] = []
    raw: dict[str, Any] = {"machine": info, "settings": vars(args).copy()}

    sizes = {path: len(page_file(path)[0]) for path in PAGE_FILES}
    lines.append(
        "page files (bytes, uncompressed): " + ", ".join(f"{p} {n:,}" for p, n in sizes.items())
    )
    lines.append(f"  total {sum(sizes.values()):,} B")
    raw["page_bytes"] = sizes

    tmpdir = Path(tempfile.mkdtemp(prefix="streamcount-bench-"))
    try:
        path = tmpdir / "T10I4D100K-x.dat"
        with path.open("wb") as dst:
            for _ in range(args.copies):
                with gzip.open(machine.data_path("T10I4D100K.dat.gz"), "rb") as src:
                    shutil.copyfileobj(src, dst)
        # throughput: base and pages alternated
        runs: dict[str, list[dict[str, Any]]] = {"base": [], "pages": []}
        for _ in range(args.repeat):
            for name, n in (("base", 0), ("pages", args.pages)):
                runs[name].append(_throughput_once(path, n, args.every))
                print(f"  {name}: {runs[name][-1]['tps']:,.0f} tx/s", flush=True)
        base = machine.spread([r["tps"] for r in runs["base"]])
        with_pages = machine.spread([r["tps"] for r in runs["pages"]])
        drop = 1 - with_pages["median"] / base["median"]
        verdict = machine.verdict(drop <= TARGET_DROP)
        busy = _latency([s for r in runs["pages"] for s in r["samples"]])
        lines.append(
            f"throughput, T10I4D100K x {args.copies} ({runs['base'][0]['transactions']:,} "
            f"transactions), {args.repeat} runs each, tx/s median [min..max]:"
        )
        lines.append(f"  no page   {base['median']:,.0f} [{base['min']:,.0f}..{base['max']:,.0f}]")
        lines.append(
            f"  {args.pages} pages  {with_pages['median']:,.0f} "
            f"[{with_pages['min']:,.0f}..{with_pages['max']:,.0f}]"
        )
        lines.append(f"  drop {drop:.1%} (target <= {TARGET_DROP:.0%}): {verdict}")
        lines.append(
            f"server time per request while counting ({args.pages} pages every {args.every:g} s):"
        )
        lines.extend(_fmt_latency(busy))
        raw["throughput"] = {
            name: [{k: v for k, v in r.items() if k != "samples"} for r in rs]
            for name, rs in runs.items()
        }
        raw["busy_latency"] = busy
        raw["drop"] = drop
        raw["target"] = verdict

        # a quiet service with the pages left open
        proc, port = _start_child(path, follow=True)
        deadline = time.monotonic() + 600
        while True:  # wait until the file is counted
            conn = http.client.HTTPConnection("127.0.0.1", port, timeout=10)
            conn.request("GET", "/v1/status")
            st = json.loads(conn.getresponse().read())
            conn.close()
            if (
                st["transactions_seen"] >= runs["base"][0]["transactions"]
                or time.monotonic() > deadline
            ):
                break
            time.sleep(0.5)
        clients, stop = _pages(port, args.pages, args.every)
        time.sleep(args.quiet_seconds)
        stop.set()
        for c in clients:
            c.join(timeout=30)
        _finish_child(proc)
        quiet = _latency([s for c in clients for s in c.steady])
        per_refresh = [b for c in clients for b in c.refreshes]
        first = [c.first_load for c in clients]
        lines.append(
            f"a quiet service, {args.pages} pages every {args.every:g} s "
            f"for {args.quiet_seconds:g} s:"
        )
        lines.append(
            f"  first load {statistics.median(first):,.0f} B per page (files and full answers); "
            f"then {statistics.median(per_refresh):,.0f} B per refresh (median of "
            f"{len(per_refresh)}, max {max(per_refresh):,} B)"
        )
        lines.extend(_fmt_latency(quiet))
        raw["quiet"] = {"first_load": first, "per_refresh": per_refresh, "latency": quiet}
    finally:
        shutil.rmtree(tmpdir, ignore_errors=True)

    print("\n".join(lines))
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md = [
            "### The page: size, refresh cost, counting with pages open",
            "",
            f"Method: bench/bench_page.py (docstring). {args.pages} simulated pages refreshing "
            f"every {args.every:g} s; T10I4D100K x {args.copies}, basket, K=3, epsilon 0.001, "
            "window 50,000 / panes 5,000.",
            "",
            *[f"    {ln}" for ln in lines],
        ]
        md_path, json_path = machine.record(
            "page", "page size and refresh cost (bench_page.py)", "\n".join(md), raw,
            places={tmpdir: "<tmpdir>"},
        )  # fmt: skip
        print(f"recorded: {md_path} and {json_path}")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--repeat", type=int, default=3, help="runs of each throughput case")
    ap.add_argument("--copies", type=int, default=5, help="copies of T10I4D100K in the file")
    ap.add_argument("--pages", type=int, default=10, help="simulated open pages")
    ap.add_argument("--every", type=float, default=2.0, help="seconds between a page's refreshes")
    ap.add_argument("--quiet-seconds", type=float, default=30.0, help="length of the quiet case")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        return run_child(json.loads(args.case))
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
