"""Cost and behaviour of rules and alerts evaluated at every pane close.

Run from the repository root::

    python3 bench/bench_alerts.py             # (a), (b) and (c), prints the figures
    python3 bench/bench_alerts.py --record    # ... and appends them to bench/RESULTS.md
    python3 bench/bench_alerts.py --repeat 1 --transactions 100000   # quick

(a) **Overhead**: :func:`streamcount.replay.replay_file` on T10I4D100K (K=3, epsilon 0.001,
    window 50,000 in panes of 5,000, ``min_support`` 0.005) with ``report=["itemsets"]`` and
    with ``report=["itemsets", "rules", "alerts"]``, each in a fresh process, one warm-up and
    ``--repeat`` timed runs; the overhead is the ratio of the medians (target <= 15 %).
(b) **False alerts on a stationary stream**: a seeded :class:`SyntheticFeed` (T10.I4, N = 1000
    items, 2,000 patterns, no drift) replayed with ``report=["alerts"]`` and the default rules
    and alerts settings; every alert after warm-up is counted, per 100 pane closes. The stream
    has no change in it, so every alert is a false one (alerts are signals for a person to
    review, and this is the rate at which such a person would be bothered for nothing).
(c) **Detection lag**: the same feed with one planted pair (:class:`Drift`) from a known
    transaction on; the pair's exact count over the sliding window is computed alongside,
    and the first ``emerged`` / ``surged`` alert for it is compared with the pane close at
    which the exact count first reaches ``min_support`` x N.

Generation of the synthetic feed is not timed; only (a) is a timing.
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
import time
from itertools import combinations
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path

SCRIPT = Path(__file__).resolve()
WINDOW_SIZE = 50_000
PANE_SIZE = 5_000
BATCH_SIZE = 5_000
OVERHEAD_MIN_SUPPORT = 0.005
TARGET_OVERHEAD_PCT = 15.0
FULL_REPORT = ("itemsets", "rules", "alerts")
#: drift planted in (c): a pair of existing items with support 1-3 % each and (nearly) no
#: co-occurrence, added together to this fraction of transactions from ``--drift-start`` on
DRIFT_RATE = 0.03


def _config(*, min_support: float | None = None) -> Any:
    """K=3, epsilon 0.001, window 50,000 / panes 5,000; rules and alerts at their defaults."""
    from streamcount.config.settings import Config, EngineConfig, RulesConfig

    rules = RulesConfig() if min_support is None else RulesConfig(min_support=min_support)
    return Config(
        engine=EngineConfig(
            epsilon=0.001,
            max_itemset_size=3,
            window_size=WINDOW_SIZE,
            pane_size=PANE_SIZE,
            batch_size=BATCH_SIZE,
        ),
        rules=rules,
    )


def _chunks(baskets: list[list[str]], size: int = 8192) -> list[Any]:
    from streamcount.intake.formats import Chunk

    return [Chunk(baskets[i : i + size], None, None) for i in range(0, len(baskets), size)]


def _feed(transactions: int, seed: int, drifts: tuple[Any, ...] = ()) -> list[list[str]]:
    from streamcount.demo.generator import GeneratorParams, SyntheticFeed

    params = GeneratorParams(transactions=transactions, items=1000, patterns=2000, seed=seed)
    return [list(t) for t in SyntheticFeed(params, drifts).transactions()]


# ---------------------------------------------------------------------------------------------
# child side


def _overhead_child(case: dict[str, Any]) -> dict[str, Any]:
    from streamcount.intake.formats import iter_file_chunks
    from streamcount.replay import replay_chunks, replay_file

    path = str(machine.data_path("T10I4D100K.dat.gz"))
    cfg = _config(min_support=OVERHEAD_MIN_SUPPORT)
    report = tuple(case["report"])
    size = case.get("size")

    def once() -> tuple[float, Any]:
        start = time.perf_counter()
        if size is None:
            res = replay_file(path, cfg, report=report, progress=None)
        else:
            chunks = list(iter_file_chunks(path, "basket"))
            items = [b for c in chunks for b in c.items][:size]
            res = replay_chunks(_chunks(items), cfg, report=report, progress=None)
        return time.perf_counter() - start, res

    once()
    gc.collect()
    times, res = [], None
    for _ in range(int(case["repeat"])):
        seconds, res = once()
        times.append(seconds)
        gc.collect()
    assert res is not None
    n = res.report["input"]["transactions"]
    return {
        "transactions": n,
        "seconds": times,
        "tps": [n / t for t in times],
        "itemsets": len(res.report.get("itemsets", [])),
        "rules": len(res.report.get("rules", [])),
        "alerts": len(res.report.get("alerts", [])),
    }


def _false_alerts_child(case: dict[str, Any]) -> dict[str, Any]:
    from streamcount.replay import replay_chunks

    baskets = _feed(int(case["transactions"]), int(case["seed"]))
    cfg = _config()
    start = time.perf_counter()
    res = replay_chunks(_chunks(baskets), cfg, report=("alerts",), progress=None)
    seconds = time.perf_counter() - start
    closes = len(baskets) // PANE_SIZE
    warm_closes = max(0, closes - (WINDOW_SIZE // PANE_SIZE - 1))
    kinds: dict[str, int] = {}
    for a in res.alerts:
        kinds[a["kind"]] = kinds.get(a["kind"], 0) + 1
    return {
        "transactions": len(baskets),
        "seconds": seconds,
        "pane_closes": closes,
        "pane_closes_after_warmup": warm_closes,
        "alerts_by_kind": kinds,
        "alerts": len(res.alerts),
        "per_100_closes": 100.0 * len(res.alerts) / max(warm_closes, 1),
        "examples": [
            {k: a[k] for k in ("kind", "seq", "items", "antecedent", "consequent")}
            for a in res.alerts[:10]
        ],
    }


def _pick_pair(baskets: list[list[str]]) -> tuple[tuple[str, str], dict[str, Any]]:
    """Two items with support 1-3 % and the fewest co-occurrences (ties: by name)."""
    n = len(baskets)
    where: dict[str, set[int]] = {}
    for t, basket in enumerate(baskets):
        for item in basket:
            where.setdefault(item, set()).add(t)
    band = sorted(i for i, ts in where.items() if 0.01 * n <= len(ts) <= 0.03 * n)
    best = min(combinations(band, 2), key=lambda p: (len(where[p[0]] & where[p[1]]), p))
    return best, {
        "support": {i: len(where[i]) / n for i in best},
        "co_occurrences_before_drift": len(where[best[0]] & where[best[1]]),
        "candidates": len(band),
    }


def _drift_child(case: dict[str, Any]) -> dict[str, Any]:
    from streamcount.demo.generator import Drift
    from streamcount.replay import replay_chunks

    total, seed, start_at = int(case["transactions"]), int(case["seed"]), int(case["start"])
    base = _feed(start_at, seed)  # the drift never changes base transactions
    pair, chosen = _pick_pair(base)
    del base
    drift = Drift(items=pair, start=start_at, rate=float(case["rate"]))
    baskets = _feed(total, seed, (drift,))
    cfg = _config()
    res = replay_chunks(_chunks(baskets), cfg, report=("alerts",), progress=None)

    # exact count of the pair over the sliding window at each pane close (brute force)
    both = [1 if pair[0] in b and pair[1] in b else 0 for b in baskets]
    per_pane = [sum(both[i : i + PANE_SIZE]) for i in range(0, len(both), PANE_SIZE)]
    panes = WINDOW_SIZE // PANE_SIZE
    min_support = cfg.rules.min_support
    crossing_seq = None
    exact = []
    for c in range(1, len(per_pane) + 1):
        in_window = per_pane[max(0, c - panes) : c]
        n_window = min(c, panes) * PANE_SIZE
        count = sum(in_window)
        exact.append({"seq": c * PANE_SIZE, "count": count, "transactions": n_window})
        if crossing_seq is None and c >= panes and count >= min_support * n_window:
            crossing_seq = c * PANE_SIZE

    target = set(pair)

    def first(kind: str, exact_pair: bool) -> dict[str, Any] | None:
        for a in res.alerts:
            if a["kind"] != kind:
                continue
            if kind == "surged":
                items = set(a["items"])
            else:
                items = set(a["antecedent"] or ()) | set(a["consequent"] or ())
            if (items == target) if exact_pair else target <= items:
                lag = None
                if crossing_seq is not None:
                    lag = (int(a["seq"]) - crossing_seq) / PANE_SIZE
                return {
                    "seq": a["seq"],
                    "items": a["items"],
                    "antecedent": a["antecedent"],
                    "consequent": a["consequent"],
                    "lag_panes": lag,
                    "panes_after_drift_start": (int(a["seq"]) - start_at) / PANE_SIZE,
                }
        return None

    return {
        "transactions": total,
        "pair": list(pair),
        "chosen": chosen,
        "drift": {"start": start_at, "start_seq": start_at + 1, "rate": drift.rate},
        "min_support": min_support,
        "crossing_seq": crossing_seq,
        "exact_window_counts": exact,
        "first_emerged": first("emerged", True),
        "first_surged": first("surged", True),
        "first_any_with_pair": {k: first(k, False) for k in ("emerged", "surged")},
        "alerts": len(res.alerts),
    }


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    kind = case["kind"]
    if kind == "overhead":
        out = _overhead_child(case)
    elif kind == "false_alerts":
        out = _false_alerts_child(case)
    elif kind == "drift":
        out = _drift_child(case)
    else:
        raise ValueError(f"unknown case kind {kind!r}")
    out["case"] = case
    out["peak_rss_mb"] = machine.peak_rss_mb()
    return out


# ---------------------------------------------------------------------------------------------
# parent side


def _fmt(s: dict[str, float]) -> str:
    return f"{s['median']:,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def run_parent(args: argparse.Namespace) -> int:
    info = machine.machine_info()
    print(f"# streamcount rules/alerts benchmark, {info['date']}")
    print(machine.format_machine(info))
    raw: dict[str, Any] = {
        "machine": info,
        "settings": {
            "epsilon": 0.001,
            "max_itemset_size": 3,
            "window_size": WINDOW_SIZE,
            "pane_size": PANE_SIZE,
            "batch_size": BATCH_SIZE,
            "repeat": args.repeat,
            "size": args.size,
            "transactions": args.transactions,
            "seed": args.seed,
            "drift_start": args.drift_start,
            "drift_rate": args.drift_rate,
        },
    }
    md: list[str] = []

    # (a) overhead
    print(
        f"\n## (a) overhead of rules + alerts at every pane close: T10I4D100K, K=3, eps 0.001, "
        f"min_support {OVERHEAD_MIN_SUPPORT}, {args.repeat} repeats after one warm-up"
    )
    runs = {}
    for name, report in (("itemsets", ["itemsets"]), ("full", list(FULL_REPORT))):
        runs[name] = machine.run_case(
            SCRIPT,
            {"kind": "overhead", "report": report, "repeat": args.repeat, "size": args.size},
        )
    base_s = machine.spread(runs["itemsets"]["seconds"])
    full_s = machine.spread(runs["full"]["seconds"])
    overhead = 100.0 * (full_s["median"] / base_s["median"] - 1.0)
    ok_a = overhead <= TARGET_OVERHEAD_PCT
    raw["overhead"] = {"runs": runs, "overhead_pct": overhead, "target": machine.verdict(ok_a)}
    lines_a = [
        f"report itemsets               {_fmt(machine.spread(runs['itemsets']['tps']))} tx/s, "
        f"median {base_s['median']:.3f} s, peak {runs['itemsets']['peak_rss_mb']:,.0f} MB",
        f"report itemsets,rules,alerts  {_fmt(machine.spread(runs['full']['tps']))} tx/s, "
        f"median {full_s['median']:.3f} s, peak {runs['full']['peak_rss_mb']:,.0f} MB "
        f"({runs['full']['rules']} active rules, {runs['full']['alerts']} alerts at the end)",
        f"overhead {overhead:+.1f} % (target <= {TARGET_OVERHEAD_PCT:.0f} %): "
        f"{machine.verdict(ok_a)}",
    ]
    print("\n".join(lines_a))
    md += [
        "### (a) Overhead of rules + alerts at every pane close",
        "",
        f"T10I4D100K{f' (first {args.size:,})' if args.size else ''}, K=3, epsilon 0.001, "
        f"window 50,000 / panes 5,000, min_support {OVERHEAD_MIN_SUPPORT}; each report in a "
        f"fresh process, one warm-up, {args.repeat} timed runs (tx/s median [min..max]).",
        "",
        *[f"    {ln}" for ln in lines_a],
    ]

    # (b) false alerts
    print(
        f"\n## (b) false alerts on a stationary synthetic stream ({args.transactions:,} tx, "
        f"T10.I4 N=1000 |L|=2000, seed {args.seed}, no drift; default rules and alerts, "
        "window 50,000 / panes 5,000, eps 0.001, K=3)"
    )
    fa = machine.run_case(
        SCRIPT, {"kind": "false_alerts", "transactions": args.transactions, "seed": args.seed}
    )
    raw["false_alerts"] = fa
    line_b = (
        f"{fa['alerts']} alerts after warm-up over {fa['pane_closes_after_warmup']} pane closes "
        f"= {fa['per_100_closes']:.1f} per 100 pane closes; by kind {fa['alerts_by_kind'] or '{}'}"
    )
    print(line_b)
    for ex in fa["examples"]:
        print(f"    {ex}")
    md += [
        "",
        "### (b) False-alert rate on a stationary stream",
        "",
        f"SyntheticFeed T10.I4, items 1000, patterns 2000, seed {args.seed}, "
        f"{args.transactions:,} transactions, no drift; default RulesConfig / AlertsConfig, "
        "window 50,000 / panes 5,000, epsilon 0.001, K=3. Every alert here is a false one.",
        "",
        f"    {line_b}",
    ]

    # (c) drift detection lag
    print(
        f"\n## (c) planted pair from transaction {args.drift_start:,} at rate {args.drift_rate} "
        "(same feed, same settings)"
    )
    dr = machine.run_case(
        SCRIPT,
        {
            "kind": "drift",
            "transactions": args.transactions,
            "seed": args.seed,
            "start": args.drift_start,
            "rate": args.drift_rate,
        },
    )
    raw["drift"] = dr

    def describe(hit: dict[str, Any] | None) -> str:
        if hit is None:
            return "none"
        lag = "n/a" if hit["lag_panes"] is None else f"{hit['lag_panes']:+.0f} panes"
        return (
            f"seq {hit['seq']:,} ({hit['panes_after_drift_start']:.0f} panes after the drift "
            f"starts; lag after the exact crossing {lag})"
        )

    crossing = dr["crossing_seq"]
    lines_c = [
        f"pair {dr['pair']} (supports before the drift "
        + ", ".join(f"{v:.2%}" for v in dr["chosen"]["support"].values())
        + f", {dr['chosen']['co_occurrences_before_drift']} co-occurrences in "
        f"{args.drift_start:,} transactions)",
        f"drift starts at seq {dr['drift']['start_seq']:,}; exact window count first reaches "
        f"min_support {dr['min_support']} x N at the pane close of seq "
        + (f"{crossing:,}" if crossing else "never"),
        f"first emerged (rule over exactly the pair): {describe(dr['first_emerged'])}",
        f"first surged (the pair):                    {describe(dr['first_surged'])}",
    ]
    print("\n".join(lines_c))
    md += [
        "",
        "### (c) Planted pair: detection lag",
        "",
        f"Same feed with Drift(pair, start={args.drift_start:,}, rate={args.drift_rate}); "
        "lag = (alert seq - seq of the pane close where the exact window count first reaches "
        "min_support x N) / pane_size. A surge compares the newest pane with the rest of the "
        "window, so it can fire before the window's support crosses (negative lag).",
        "",
        *[f"    {ln}" for ln in lines_c],
    ]

    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md_path, json_path = machine.record(
            "alerts", "rules and alerts (bench_alerts.py)", "\n".join(md), raw
        )
        print(f"recorded: {md_path} and {json_path}")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per report in (a)")
    ap.add_argument("--size", type=int, default=None, help="T10I4D100K transactions in (a)")
    ap.add_argument(
        "--transactions", type=int, default=300_000, help="synthetic stream length in (b), (c)"
    )
    ap.add_argument("--seed", type=int, default=7, help="seed of the synthetic feed")
    ap.add_argument(
        "--drift-start", type=int, default=None, help="0-based start of the planted pair (c)"
    )
    ap.add_argument("--drift-rate", type=float, default=DRIFT_RATE, help="planted pair's rate")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    if args.drift_start is None:
        args.drift_start = args.transactions // 2
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
