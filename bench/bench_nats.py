"""One service consuming a NATS JetStream stream against replay of the same orders.

Run from the repository root (Debian's ``nats-server`` must be installed: ``make tools``)::

    python3 bench/bench_nats.py            # prints the figures (a few minutes)
    python3 bench/bench_nats.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_nats.py --size 20000 --repeat 1   # quick

The parent starts a private ``nats-server -js`` on a free port of 127.0.0.1 with its store in
a temporary folder, turns T10I4D100K into orders (``--format jsonl``: ``{"id", "ts",
"items"}``, one a second; or ``basket`` lines) and publishes them twice with the publisher of
``streamcount generate``: to stream ``ONE``, one order per message, and to stream ``BATCHED``,
``--orders-per-message`` orders per message as lines of one message. It writes the same
orders, one per line, to a file. Publishing is not timed.

Each case runs in a fresh process with one warm-up and ``--repeat`` timed runs:

* ``replay``: :func:`streamcount.replay.replay_file` on the file with rules and alerts, the
  work the service does at every pane close (K=3, epsilon 0.001, window 50,000 in panes of
  5,000);
* ``nats one`` / ``nats batched``: :class:`~streamcount.service.loop.Service` with
  ``input.source: nats`` on that stream (``start_at: beginning``, no checkpoints, so each run
  re-creates the consumer and reads the stream from its first message; no listener, no
  dead-letter file, no log sink), timed from construction until ``run()`` returns after the
  last order is counted (shutdown included);
* ``source only``: the ``nats`` source read to the end with nothing counted, for the share the
  bus takes (one order per message).

The NATS server runs beside the measured process on the same cores. Targets: ``nats one`` >=
50,000 orders/s; ``nats batched`` >= 80 % of replay.
"""

from __future__ import annotations

import argparse
import gc
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
TARGET_ONE = 50_000
TARGET_RATIO = 0.8
_START_TS = 1_735_689_600.0


def _config(
    fmt: str, *, path: str | None = None, url: str | None = None, stream: str = "ONE"
) -> Any:
    from streamcount.config.load import config_from_mapping

    return config_from_mapping(
        {
            "input": {
                "source": "nats" if url else "file",
                "path": path,
                "format": fmt,
                "follow": False,
                "dead_letter_path": None,
                "start_at": "beginning",
                "max_future_seconds": None,
                "nats": {"servers": [url or "nats://127.0.0.1:4222"], "stream": stream},
            },
            "engine": {
                "epsilon": 0.001,
                "max_itemset_size": 3,
                "window_size": 50_000,
                "pane_size": 5_000,
                "batch_size": 5_000,
            },
            "server": {"listen": None},
            "checkpoint": {"checkpoint_dir": None},
            "sinks": {"log": False},
        }
    )


def _replay_once(case: dict[str, Any]) -> tuple[float, int]:
    from streamcount.replay import replay_file

    cfg = _config(case["format"], path=case["path"])
    start = time.perf_counter()
    res = replay_file(case["path"], cfg, report=["itemsets", "rules", "alerts"], progress=None)
    return time.perf_counter() - start, int(res.engine.transactions_seen)


def _nats_once(case: dict[str, Any]) -> tuple[float, int]:
    from streamcount.service.loop import Service

    cfg = _config(case["format"], url=case["url"], stream=case["stream"])
    total = int(case["orders"])
    start = time.perf_counter()
    service = Service(cfg, fresh=True)
    service.run(
        install_signals=False,
        on_turn=lambda s: s.pipeline.engine.transactions_seen < total,
    )
    return time.perf_counter() - start, int(service.pipeline.engine.transactions_seen)


def _source_once(case: dict[str, Any]) -> tuple[float, int]:
    from streamcount.intake.sources.nats import JetStreamSource

    cfg = _config(case["format"], url=case["url"], stream=case["stream"])
    total = int(case["orders"])
    start = time.perf_counter()
    source = JetStreamSource.from_config(cfg, None)
    seen = 0
    try:
        while seen < total:
            for batch in source.read(20_000, 0.2):
                seen += len(batch)
                assert batch.on_done is not None
                batch.on_done(len(batch), [])  # acknowledges, as the loop would
    finally:
        source.close()
    return time.perf_counter() - start, seen


_KINDS = {"replay": _replay_once, "nats": _nats_once, "source": _source_once}


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    once = _KINDS[case["kind"]]
    once(case)
    gc.collect()
    times, n = [], 0
    for _ in range(int(case["repeat"])):
        seconds, n = once(case)
        times.append(seconds)
        gc.collect()
    return {
        "case": case,
        "transactions": n,
        "seconds": times,
        "tps": [n / t for t in times],
        "peak_rss_mb": machine.peak_rss_mb(),
    }


# -- the parent: server, data, cases ----------------------------------------------------------


def _orders(size: int | None) -> list[tuple[float, tuple[str, ...]]]:
    out = []
    with gzip.open(machine.data_path("T10I4D100K.dat.gz"), "rt", encoding="utf-8") as fh:
        for n, line in enumerate(fh):
            if size is not None and n >= size:
                break
            items = tuple(dict.fromkeys(line.split()))
            if items:
                out.append((_START_TS + len(out), items))
    return out


def _fmt(s: dict[str, float]) -> str:
    return f"{s['median']:,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def run_parent(args: argparse.Namespace) -> int:
    from streamcount.demo.generator import order_id
    from streamcount.demo.publish import format_order, publish_feed

    binary = natsbench.nats_binary()
    if binary is None:
        print("nats-server not found (Debian package nats-server; `make tools`)", file=sys.stderr)
        return 2
    info = machine.machine_info()
    print(f"# streamcount NATS benchmark, {info['date']}")
    print(machine.format_machine(info))
    tmpdir = Path(tempfile.mkdtemp(prefix="streamcount-bench-nats-"))
    server, url = natsbench.start_server(binary, tmpdir / "store")
    results: dict[str, Any] = {}
    try:
        orders = _orders(args.size)
        path = tmpdir / f"orders.{args.format}"
        with path.open("wb") as fh:
            for i, (ts, basket) in enumerate(orders):
                fh.write(format_order(args.format, order_id(i), ts, basket))
        published = {}
        for stream, per_message in (("ONE", 1), ("BATCHED", args.orders_per_message)):
            report = publish_feed(
                orders,
                url=url,
                subject=f"{stream.lower()}.{{partition}}",
                fmt=args.format,
                orders_per_message=per_message,
                stream=stream,
            )
            published[stream] = {"orders": report.orders, "messages": report.messages}
            print(
                f"published {report.orders:,} orders in {report.messages:,} messages to {stream}"
                f" ({report.orders / report.seconds:,.0f} orders/s)"
            )
        common = {
            "repeat": args.repeat,
            "orders": len(orders),
            "url": url,
            "path": str(path),
            "format": args.format,
        }
        cases = {
            "replay (rules, alerts)": {"kind": "replay"},
            "nats one per message": {"kind": "nats", "stream": "ONE"},
            f"nats {args.orders_per_message} per message": {"kind": "nats", "stream": "BATCHED"},
            "source only, one per message": {"kind": "source", "stream": "ONE"},
        }
        for name, case in cases.items():
            try:
                results[name] = machine.run_case(SCRIPT, {**case, **common}, timeout=1800)
            except (RuntimeError, subprocess.TimeoutExpired) as exc:
                results[name] = {"error": str(exc)}
    finally:
        server.terminate()
        server.wait(timeout=30)
        shutil.rmtree(tmpdir, ignore_errors=True)

    print(
        f"\n## T10I4D100K{f' (first {args.size:,})' if args.size else ''} as {args.format} "
        "orders, K=3, "
        f"eps 0.001, window 50,000 / panes 5,000; {args.repeat} repeats after one warm-up; "
        "nats-server on the same cores"
    )
    lines = []
    for name, res in results.items():
        if "error" in res:
            lines.append(f"{name:<32} FAILED: {res['error'].splitlines()[-1]}")
        else:
            lines.append(
                f"{name:<32} {_fmt(machine.spread(res['tps']))} orders/s, "
                f"peak {res['peak_rss_mb']:,.0f} MB ({res['transactions']:,} orders)"
            )
    names = list(results)
    replay, one, batched = (results[n] for n in names[:3])
    verdicts = {}
    if "error" not in one:
        rate = machine.spread(one["tps"])["median"]
        verdicts["one"] = machine.verdict(rate >= TARGET_ONE)
        lines.append(f"one per message: {rate:,.0f} orders/s (target >= {TARGET_ONE:,}): "
                     f"{verdicts['one']}")  # fmt: skip
    if "error" not in batched and "error" not in replay:
        ratio = machine.spread(batched["tps"])["median"] / machine.spread(replay["tps"])["median"]
        verdicts["batched"] = machine.verdict(ratio >= TARGET_RATIO)
        lines.append(
            f"batched / replay = {ratio:.0%} (target >= {TARGET_RATIO:.0%}): {verdicts['batched']}"
        )
    print("\n".join(lines))
    for res in results.values():
        if "error" in res:
            print(res["error"], file=sys.stderr)
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md = [
            "### NATS JetStream source vs replay",
            "",
            f"T10I4D100K{f' (first {args.size:,})' if args.size else ''} as {args.format} "
            "orders published to a private nats-server (file storage) on the same machine; "
            "K=3, epsilon 0.001, window 50,000 / panes 5,000; each case in a fresh process, one "
            f"warm-up, {args.repeat} timed runs (orders/s median [min..max]). Service from "
            "construction until run() returns after the last order, re-reading the stream from "
            "its first message each run.",
            "",
            *[f"    {ln}" for ln in lines],
        ]
        raw = {
            "machine": info,
            "settings": {
                "size": args.size,
                "repeat": args.repeat,
                "orders_per_message": args.orders_per_message,
                "format": args.format,
                "published": published,
            },
            "results": results,
            "targets": verdicts,
        }
        md_path, json_path = machine.record(
            "nats",
            "NATS JetStream source vs replay (bench_nats.py)",
            "\n".join(md),
            raw,
            places={tmpdir: "<tmpdir>"},
        )
        print(f"recorded: {md_path} and {json_path}")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per case (after warm-up)")
    ap.add_argument("--size", type=int, default=None, help="first N transactions only (quick)")
    ap.add_argument(
        "--orders-per-message", type=int, default=100, help="orders per batched message"
    )
    ap.add_argument(
        "--format",
        choices=("basket", "jsonl"),
        default="jsonl",
        help="record format on the bus and in the replayed file (default jsonl)",
    )
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
