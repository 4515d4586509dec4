"""The live path (followed file -> decoder -> engine -> rules) against replay on the same data.

Run from the repository root::

    python3 bench/bench_live.py            # prints the figures (about a minute)
    python3 bench/bench_live.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_live.py --size 20000 --repeat 1   # quick

T10I4D100K is written decompressed to a temporary file. Each case runs in a fresh process with
one warm-up and ``--repeat`` timed runs:

* ``replay``: :func:`streamcount.replay.replay_file` on that file (basket, K=3, epsilon 0.001,
  window 50,000 in panes of 5,000), once with ``report=["itemsets"]`` and once with
  ``report=["itemsets", "rules", "alerts"]``, which evaluates rules and alerts at every pane
  close as the service always does;
* ``live``: :class:`streamcount.app.Service` with ``input.path`` = that file,
  ``input.follow=False``, ``server.listen=None``, checkpoints off, dead-letter file off and
  the log sink off, timed from construction until :meth:`~streamcount.app.Service.run`
  returns at the end of the input (shutdown included).

The target (live >= 80 % of replay) is judged against the replay that does the same work
(rules and alerts included); the ratio to the itemsets-only replay is printed beside it.
"""

from __future__ import annotations

import argparse
import gc
import gzip
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path

SCRIPT = Path(__file__).resolve()
TARGET_RATIO = 0.8


def _config(path: str) -> Any:
    from streamcount.config.settings import (
        CheckpointConfig,
        Config,
        EngineConfig,
        InputConfig,
        ServerConfig,
        SinksConfig,
    )

    return Config(
        input=InputConfig(path=path, format="basket", follow=False, dead_letter_path=None),
        engine=EngineConfig(
            epsilon=0.001, max_itemset_size=3, window_size=50_000, pane_size=5_000, batch_size=5_000
        ),
        server=ServerConfig(listen=None),
        checkpoint=CheckpointConfig(checkpoint_dir=None),
        sinks=SinksConfig(log=False),
    )


def _replay_once(path: str, report: list[str]) -> tuple[float, int]:
    from streamcount.replay import replay_file

    cfg = _config(path)
    start = time.perf_counter()
    res = replay_file(path, cfg, report=report, progress=None)
    return time.perf_counter() - start, int(res.engine.transactions_seen)


def _live_once(path: str) -> tuple[float, int]:
    from streamcount.service.loop import Service

    cfg = _config(path)
    start = time.perf_counter()
    service = Service(cfg, fresh=True)
    service.run(install_signals=False)
    return time.perf_counter() - start, int(service.pipeline.engine.transactions_seen)


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    path = case["path"]
    if case["kind"] == "replay":

        def once() -> tuple[float, int]:
            return _replay_once(path, case["report"])

    elif case["kind"] == "live":

        def once() -> tuple[float, int]:
            return _live_once(path)

    else:
        raise ValueError(f"unknown case kind {case['kind']!r}")
    once()
    gc.collect()
    times, n = [], 0
    for _ in range(int(case["repeat"])):
        seconds, n = once()
        times.append(seconds)
        gc.collect()
    return {
        "case": case,
        "transactions": n,
        "seconds": times,
        "tps": [n / t for t in times],
        "peak_rss_mb": machine.peak_rss_mb(),
    }


def _fmt(s: dict[str, float]) -> str:
    return f"{s['median']:,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def run_parent(args: argparse.Namespace) -> int:
    info = machine.machine_info()
    print(f"# streamcount live-path benchmark, {info['date']}")
    print(machine.format_machine(info))
    tmpdir = Path(tempfile.mkdtemp(prefix="streamcount-bench-"))
    try:
        path = tmpdir / "T10I4D100K.dat"
        source = machine.data_path("T10I4D100K.dat.gz")
        with gzip.open(source, "rb") as src, path.open("wb") as dst:
            if args.size is None:
                shutil.copyfileobj(src, dst)
            else:
                for n, line in enumerate(src):
                    if n >= args.size:
                        break
                    dst.write(line)
        cases = {
            "replay itemsets": {"kind": "replay", "report": ["itemsets"]},
            "replay itemsets,rules,alerts": {
                "kind": "replay",
                "report": ["itemsets", "rules", "alerts"],
            },
            "live (Service)": {"kind": "live"},
        }
        results: dict[str, Any] = {}
        for name, case in cases.items():
            case = {**case, "path": str(path), "repeat": args.repeat}
            try:
                results[name] = machine.run_case(SCRIPT, case)
            except RuntimeError as exc:  # the service may not run yet: say so, keep the rest
                results[name] = {"error": str(exc)}
    finally:
        shutil.rmtree(tmpdir, ignore_errors=True)

    print(
        f"\n## T10I4D100K{f' (first {args.size:,})' if args.size else ''} decompressed, basket, "
        f"K=3, eps 0.001, window 50,000 / panes 5,000; {args.repeat} repeats after one warm-up"
    )
    lines = []
    for name, res in results.items():
        if "error" in res:
            lines.append(f"{name:<30} FAILED: {res['error'].splitlines()[-1]}")
        else:
            lines.append(
                f"{name:<30} {_fmt(machine.spread(res['tps']))} tx/s, "
                f"peak {res['peak_rss_mb']:,.0f} MB ({res['transactions']:,} transactions)"
            )
    live = results["live (Service)"]
    same = results["replay itemsets,rules,alerts"]
    plain = results["replay itemsets"]
    verdict = "not measured"
    if "error" not in live and "error" not in same:
        ratio = machine.spread(live["tps"])["median"] / machine.spread(same["tps"])["median"]
        ratio_plain = machine.spread(live["tps"])["median"] / machine.spread(plain["tps"])["median"]
        verdict = machine.verdict(ratio >= TARGET_RATIO)
        lines.append(
            f"live / replay (same work: rules and alerts) = {ratio:.0%} "
            f"(target >= {TARGET_RATIO:.0%}): {verdict}; live / replay itemsets only = "
            f"{ratio_plain:.0%}"
        )
    print("\n".join(lines))
    for res in results.values():
        if "error" in res:
            print(res["error"], file=sys.stderr)
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md = [
            "### Live path vs replay",
            "",
            f"T10I4D100K{f' (first {args.size:,})' if args.size else ''} written decompressed "
            "to a temporary file; basket, K=3, epsilon 0.001, window 50,000 / panes 5,000; each "
            f"case in a fresh process, one warm-up, {args.repeat} timed runs (tx/s median "
            "[min..max]). Live = Service (follow off, no listener, no checkpoints, no "
            "dead-letter file, no log sink) from construction until run() returns.",
            "",
            *[f"    {ln}" for ln in lines],
        ]
        raw = {
            "machine": info,
            "settings": {
                "size": args.size,
                "repeat": args.repeat,
                "input": "tests/data/T10I4D100K.dat.gz written decompressed to "
                "<tmpdir>/T10I4D100K.dat (a fresh temporary folder per run)",
            },
            "results": results,
            "target": verdict,
        }
        md_path, json_path = machine.record(
            "live",
            "live path vs replay (bench_live.py)",
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
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
