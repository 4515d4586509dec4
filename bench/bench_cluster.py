"""Two workers and a merger against one process consuming the same JetStream stream.

Run from the repository root (Debian's ``nats-server`` must be installed: ``make tools``)::

    python3 bench/bench_cluster.py            # prints the figures (a few minutes)
    python3 bench/bench_cluster.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_cluster.py --size 20000 --repeat 1 --live-seconds 10   # quick

The parent starts a private ``nats-server -js`` on a free port of 127.0.0.1 (the server shares
the machine's cores with everything measured), turns T10I4D100K into JSON orders one
millisecond apart and publishes them with the publisher of ``streamcount generate`` to the
subjects ``orders.0`` and ``orders.1`` (``crc32(order id) mod 2``, ``--orders-per-message`` per
message), each partition ending with an order a pane later that closes its last pane.
Publishing is not timed. Settings: itemsets up to 3, epsilon 0.001, a time-based window of 50
s in panes of 5 s (5,000 orders a pane, as the count-based benchmarks), rules and alerts on.

* **Throughput** (the backlog read from the stream's first message, ``--repeat`` times, each
  run in fresh processes): ``one process`` is a :class:`~streamcount.service.loop.Service`
  reading both subjects (``orders.*``) until it closed the last pane; ``two workers + merger``
  starts three processes, each a ``Service`` (``cluster.role`` worker w1, w2 and the merger, a
  fresh summaries stream per run), let go at once when all three have started (interpreter
  start and imports are not timed, in either set-up), and is timed to the merger closing the
  last pane. Orders per second = orders / that time. Target: the cluster >= 1.3 x one process.
* **CPU seconds** of each process over the timed interval (user + system, every thread;
  ``nats-server`` not included): what the cluster costs beside one process, whatever the
  other load on the machine does to the wall clock.
* **Merge cost per pane close**: the merger's own timings of each close, the merge alone
  (decoding done, ``merge_parts``) and the merge plus rules and alerts.
* **Delay from publish to alert**: a live feed (``generate --pace``, ``--live-rate`` orders/s
  stamped with the wall clock, ``--live-seconds`` long, panes of 1 s), and for every pane the
  time from its end (when its last order was published) to its evaluation at the merger (or
  in one process), the moment its alerts go to the sinks; median and p99.
"""

from __future__ import annotations

import argparse
import gzip
import json
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path
import natsbench

SCRIPT = Path(__file__).resolve()
TARGET_SPEEDUP = 1.3
_START_TS = 1_735_689_600.0
_SPACING = 0.001  # seconds of event time between two orders
_ENGINE = {
    "epsilon": 0.001,
    "max_itemset_size": 3,
    "window_seconds": 50.0,
    "pane_seconds": 5.0,
    "batch_size": 5000,
}


# -- the children -------------------------------------------------------------------------------


def _config(case: dict[str, Any]) -> Any:
    from streamcount.config.load import config_from_mapping

    engine = dict(_ENGINE)
    if case.get("live"):
        engine.update(window_seconds=10.0, pane_seconds=1.0)
    data: dict[str, Any] = {
        "input": {
            "source": "nats",
            "format": "jsonl",
            "dead_letter_path": None,
            "start_at": "beginning",
            "max_future_seconds": None,
            "idle_seconds": 3600.0,
            "nats": {
                "servers": [case["url"]],
                "stream": case["stream"],
                "subject": case["subject"],
                "durable": case["role_name"],
            },
        },
        "engine": engine,
        "server": {"listen": None},
        "sinks": {"log": False},
    }
    if case["role"] in ("worker", "merger"):
        data["cluster"] = {
            "role": case["role"],
            "stream": case["panes"],
            "subject": case["panes"].lower() + ".{worker}",
            "durable": "merger",
        }
        if case["role"] == "worker":
            data["cluster"]["worker"] = case["role_name"]
        else:
            data["cluster"]["workers"] = ["w1", "w2"]
    return config_from_mapping(data)


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    """One process of a run: a worker, the merger or one process alone, until ``last`` is
    closed (and, for a worker, published)."""
    from streamcount.service.loop import Service

    config = _config(case)
    last = int(case["last_pane"])
    delays: list[float] = []
    barrier = Path(case["barrier"])  # every process of a run starts counting at once
    (barrier / f"{case['role_name']}.ready").touch()
    while not (barrier / "go").exists():
        time.sleep(0.005)
    started = time.time()
    cpu_before = _cpu_seconds()
    service = Service(config, fresh=True)
    engine_of = lambda: service.pipeline.engine  # noqa: E731 - the engine is replaced on restore
    pane_seconds = float(config.engine.pane_seconds)

    def closed(number: int, window: Any, records: list[Any]) -> None:
        pane = engine_of().last_closed
        if pane is not None:
            delays.append(time.time() - (pane.index + 1) * pane_seconds)

    service.pipeline.on_close(closed)
    extension: Any = service.extensions.items[0] if service.extensions else None

    def going(svc: Service) -> bool:
        if case["role"] == "worker":
            assert extension is not None
            return not (
                (extension.last_published or 0) >= last and extension.publisher.pending == 0
            )
        return svc.pipeline.engine.window.closed_through < last

    deadline = time.monotonic() + float(case.get("timeout", 1800))
    service.run(
        install_signals=False,
        on_turn=lambda svc: going(svc) and time.monotonic() < deadline,
        turn_timeout=0.05,
    )
    ended = time.time()
    out: dict[str, Any] = {
        "role": case["role_name"],
        "start": started,
        "end": ended,
        "transactions": int(service.pipeline.engine.transactions_seen),
        "closed_through": int(service.pipeline.engine.window.closed_through),
        "delays": delays,
        "cpu_seconds": _cpu_seconds() - cpu_before,
        "peak_rss_mb": machine.peak_rss_mb(),
    }
    if case["role"] == "merger":
        assert extension is not None
        out["merge_seconds"] = list(extension.merge_seconds)
        out["close_seconds"] = list(extension.close_seconds)
    return out


def _cpu_seconds() -> float:
    """User plus system CPU time of this process, every thread."""
    import resource

    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


# -- the parent ---------------------------------------------------------------------------------


def _orders(size: int | None) -> list[tuple[float, tuple[str, ...]]]:
    out = []
    with gzip.open(machine.data_path("T10I4D100K.dat.gz"), "rt", encoding="utf-8") as fh:
        for n, line in enumerate(fh):
            if size is not None and n >= size:
                break
            items = tuple(dict.fromkeys(line.split()))
            if items:
                out.append((_START_TS + len(out) * _SPACING, items))
    return out


def _with_closing(
    orders: list[tuple[float, tuple[str, ...]]], pane_seconds: float
) -> tuple[list[tuple[float, tuple[str, ...]]], int]:
    """The orders plus closing orders (one per partition at least) a pane after the last
    pane; and that last pane's index."""
    from streamcount.demo.generator import order_id
    from streamcount.demo.publish import partition_of

    last = int(orders[-1][0] // pane_seconds)
    ts = (last + 1.5) * pane_seconds
    out = list(orders)
    seen: set[int] = set()
    while len(seen) < 2:
        seen.add(partition_of(order_id(len(out)), 2))
        out.append((ts, ("closing",)))
    return out, last


def _spawn(case: dict[str, Any]) -> subprocess.Popen[str]:
    return subprocess.Popen(
        [sys.executable, str(SCRIPT), "--case", json.dumps(case)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        cwd=str(machine.REPO_DIR),
    )


def _collect(proc: subprocess.Popen[str], timeout: float) -> dict[str, Any]:
    out, err = proc.communicate(timeout=timeout)
    if proc.returncode != 0:
        raise RuntimeError(f"child failed (exit {proc.returncode}):\n{err.strip()[-4000:]}")
    return json.loads([ln for ln in out.splitlines() if ln.strip()][-1])


def _start_together(cases: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """Start one process per case; once every one has imported what it needs, let them all
    go at once (interpreter start and imports are not timed)."""
    barrier = Path(tempfile.mkdtemp(prefix="streamcount-bench-barrier-"))
    procs = {name: _spawn({**case, "barrier": str(barrier)}) for name, case in cases.items()}
    try:
        deadline = time.monotonic() + 120
        while not all((barrier / f"{c['role_name']}.ready").exists() for c in cases.values()):
            if time.monotonic() > deadline or any(p.poll() is not None for p in procs.values()):
                break
            time.sleep(0.01)
        (barrier / "go").touch()
        return {name: _collect(proc, 1800) for name, proc in procs.items()}
    finally:
        shutil.rmtree(barrier, ignore_errors=True)


def _run_single(common: dict[str, Any], tag: str) -> dict[str, Any]:
    case = {**common, "role": "single", "role_name": f"single{tag}", "subject": None}
    return _start_together({"single": case})["single"]


def _run_cluster(common: dict[str, Any], tag: str) -> dict[str, dict[str, Any]]:
    panes = f"PANES{tag}"
    prefix = common["prefix"]
    cases = {
        "w1": {**common, "role": "worker", "role_name": "w1", "subject": prefix + ".0"},
        "w2": {**common, "role": "worker", "role_name": "w2", "subject": prefix + ".1"},
        "merger": {**common, "role": "merger", "role_name": "merger", "subject": None},
    }
    return _start_together({name: {**case, "panes": panes} for name, case in cases.items()})


def _cpu(results: list[dict[str, Any]]) -> str:
    return f"{machine.spread([r['cpu_seconds'] for r in results])['median']:.2f}"


def _rate(s: dict[str, float]) -> str:
    return f"{s['median']:,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def _quantile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    if not ordered:
        return float("nan")
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


def run_parent(args: argparse.Namespace) -> int:
    from streamcount.demo.publish import publish_feed

    binary = natsbench.nats_binary()
    if binary is None:
        print("nats-server not found (Debian package nats-server; `make tools`)", file=sys.stderr)
        return 2
    info = machine.machine_info()
    print(f"# streamcount cluster benchmark, {info['date']}")
    print(machine.format_machine(info))
    tmpdir = Path(tempfile.mkdtemp(prefix="streamcount-bench-cluster-"))
    server, url = natsbench.start_server(binary, tmpdir / "store")
    lines: list[str] = []
    raw: dict[str, Any] = {"machine": info, "settings": vars(args).copy()}
    try:
        orders, last = _with_closing(_orders(args.size), float(_ENGINE["pane_seconds"]))
        report = publish_feed(
            orders,
            url=url,
            subject="orders.{partition}",
            partitions=2,
            orders_per_message=args.orders_per_message,
            stream="ORDERS",
        )
        print(f"published {report.orders:,} orders in {report.messages:,} messages")
        common = {"url": url, "stream": "ORDERS", "prefix": "orders", "last_pane": last}
        singles, clusters = [], []
        for r in range(args.repeat):
            singles.append(_run_single(common, f"-{r}"))
            clusters.append(_run_cluster(common, f"_{r}"))
        n = len(orders)
        single_tps = [n / (s["end"] - s["start"]) for s in singles]
        cluster_tps = [
            n / (c["merger"]["end"] - min(c["w1"]["start"], c["w2"]["start"])) for c in clusters
        ]
        merges = [x for c in clusters for x in c["merger"]["merge_seconds"]]
        closes = [x for c in clusters for x in c["merger"]["close_seconds"]]
        s, c = machine.spread(single_tps), machine.spread(cluster_tps)
        ratio = c["median"] / s["median"]
        lines += [
            f"one process            {_rate(s)} orders/s",
            f"two workers + merger   {_rate(c)} orders/s",
            f"speed-up {ratio:.2f}x (target >= {TARGET_SPEEDUP}x): "
            f"{machine.verdict(ratio >= TARGET_SPEEDUP)}",
            f"merge per pane close   median {_quantile(merges, 0.5) * 1e3:.1f} ms, p99 "
            f"{_quantile(merges, 0.99) * 1e3:.1f} ms ({len(merges)} closes); with rules and "
            f"alerts median {_quantile(closes, 0.5) * 1e3:.1f} ms, p99 "
            f"{_quantile(closes, 0.99) * 1e3:.1f} ms",
            f"CPU seconds per run (median): one process {_cpu(singles)}; workers "
            f"{_cpu([x[w] for x in clusters for w in ('w1', 'w2')])} each, merger "
            f"{_cpu([x['merger'] for x in clusters])} (nats-server not included)",
            f"peak RSS: one process {max(x['peak_rss_mb'] for x in singles):,.0f} MB; workers "
            f"{max(x[w]['peak_rss_mb'] for x in clusters for w in ('w1', 'w2')):,.0f} MB, merger "
            f"{max(x['merger']['peak_rss_mb'] for x in clusters):,.0f} MB",
        ]
        raw["throughput"] = {"single": singles, "cluster": clusters}
        if args.live_seconds > 0:
            lines += _live(args, url, raw)
    finally:
        server.terminate()
        server.wait(timeout=30)
        shutil.rmtree(tmpdir, ignore_errors=True)
    print(
        f"\n## T10I4D100K{f' (first {args.size:,})' if args.size else ''} as JSON orders, K=3, "
        "eps 0.001, window 50 s / panes 5 s (5,000 orders), rules and alerts; nats-server on "
        f"the same cores; {args.repeat} runs"
    )
    print("\n".join(lines))
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md = [
            "### Two workers and a merger vs one process (bench_cluster.py)",
            "",
            "T10I4D100K as JSON orders 1 ms apart on two partitions of a private nats-server "
            "(file storage) on the same machine; K=3, epsilon 0.001, window 50 s in panes of "
            "5 s; rules and alerts at the merger (and in the one process). Throughput from the "
            "first process's start to the last pane closed; live delays with panes of 1 s.",
            "",
            *[f"    {ln}" for ln in lines],
        ]
        md_path, json_path = machine.record(
            "cluster", "Two workers + merger vs one process (bench_cluster.py)", "\n".join(md), raw
        )
        print(f"recorded: {md_path} and {json_path}")
    return 0


def _live(args: argparse.Namespace, url: str, raw: dict[str, Any]) -> list[str]:
    """A paced feed stamped with the wall clock: delays from a pane's end to its evaluation."""
    import threading

    from streamcount.demo.publish import publish_feed

    out = []
    for kind in ("one process", "two workers + merger"):
        prefix = "single" if kind == "one process" else "cluster"
        stream = f"LIVE_{prefix.upper()}"
        count = int(args.live_rate * args.live_seconds)
        start = time.time() + 8.0  # the processes start meanwhile
        feed = [(start + i / args.live_rate, items) for i, (_, items) in enumerate(_orders(count))]
        feed, last = _with_closing(feed, 1.0)
        publish_feed(
            feed[:0], url=url, subject=prefix + ".{partition}", partitions=2, stream=stream
        )
        common = {
            "url": url,
            "stream": stream,
            "prefix": prefix,
            "last_pane": last,
            "live": True,
            "timeout": args.live_seconds + 120,
        }
        holder: dict[str, Any] = {}

        def consume(
            kind: str = kind, common: dict[str, Any] = common, holder: dict[str, Any] = holder
        ) -> None:
            if kind == "one process":
                holder["single"] = _run_single(common, "-live")
            else:
                holder.update(_run_cluster(common, "_LIVE"))

        thread = threading.Thread(target=consume)
        thread.start()
        time.sleep(max(0.0, start - time.time()))
        publish_feed(
            feed,
            url=url,
            subject=prefix + ".{partition}",
            partitions=2,
            orders_per_message=10,
            pace=True,
        )
        thread.join()
        evaluator = holder["single"] if kind == "one process" else holder["merger"]
        delays = evaluator["delays"][1:]  # the first close waits for the feed's start
        raw.setdefault("live", {})[prefix] = holder
        out.append(
            f"publish -> evaluation ({kind}, {args.live_rate:,.0f} orders/s, panes 1 s): "
            f"median {_quantile(delays, 0.5) * 1e3:,.0f} ms, p99 "
            f"{_quantile(delays, 0.99) * 1e3:,.0f} ms ({len(delays)} panes)"
        )
    return out


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--repeat", type=int, default=3, help="throughput runs of each set-up")
    ap.add_argument("--size", type=int, default=None, help="first N transactions only (quick)")
    ap.add_argument("--orders-per-message", type=int, default=100, help="orders per message")
    ap.add_argument("--live-rate", type=float, default=5000.0, help="live feed, orders/s")
    ap.add_argument("--live-seconds", type=float, default=30.0, help="live feed length (0: none)")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
