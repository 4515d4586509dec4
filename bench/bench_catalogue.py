"""The cost of catalogue levels: replay throughput, tracked entries and peak RSS when counting
SKUs only, SKUs + products, and SKUs + products + categories; and the share of rules the
R-interest measure prunes.

Run from the repository root::

    python3 bench/bench_catalogue.py            # prints the figures (a few minutes)
    python3 bench/bench_catalogue.py --record   # ... and appends them to bench/RESULTS.md
    python3 bench/bench_catalogue.py --transactions 30000 --repeat 1   # quick

The feed is generated (seeded) before any timing: an Agrawal & Srikant (1994) stream over
``--products`` products (``streamcount.demo.generator``, T10.I4 parameters), in which each
product is sold as one of its SKUs (1 to 6 per product, uniformly) and each product belongs to
one of ``--products / 20`` categories; the catalogue file lists them all. A case without any
catalogue shows what the mapping itself costs when it maps nothing. Both go to a temporary
folder as a basket file and a CSV. Each case runs in a fresh process (its peak RSS is its own),
with one warm-up and ``--repeat`` timed runs of :func:`streamcount.replay.replay_file` (read,
map through the catalogue, count, final window), epsilon 0.001, window 50,000 in panes of 5,000.

Targets (issue 13): two levels (SKU + product) at most 3x slower than SKUs only at K = 2; peak
RSS <= 200 MB. The share of rules pruned is measured on the final window of the 2- and 3-level
cases: rules with every threshold below, with ``rules.min_interest`` null and 1.1.
"""

from __future__ import annotations

import argparse
import csv
import gc
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
LEVELS: dict[str, list[str] | None] = {
    "no catalogue (items as read)": None,
    "1 level (sku)": ["sku"],
    "2 levels (sku, product)": ["sku", "product"],
    "3 levels (sku, product, category)": ["sku", "product", "category"],
}
TARGET_SLOWDOWN = 3.0
TARGET_RSS_MB = 200.0
#: thresholds of the rule counts (low, so that there are rules to prune)
RULES = {
    "min_support": 0.002,
    "min_confidence": 0.1,
    "min_lift": 1.2,
    "max_p_value": None,
    "max_rules": 100_000,
}


def write_inputs(folder: Path, transactions: int, products: int, seed: int) -> dict[str, Any]:
    """The feed (basket lines of SKUs) and its catalogue, generated from ``seed``."""
    import numpy as np

    from streamcount.demo.generator import GeneratorParams, SyntheticFeed

    rng = np.random.default_rng(seed)
    variants = rng.integers(1, 7, size=products)
    categories = max(1, products // 20)
    category_of = rng.integers(0, categories, size=products)
    skus = [[f"s{p}-{v}" for v in range(int(variants[p]))] for p in range(products)]
    with open(folder / "catalogue.csv", "w", encoding="utf-8", newline="") as fh:
        out = csv.writer(fh, lineterminator="\n")
        out.writerow(["sku", "product", "category"])
        for p in range(products):
            for sku in skus[p]:
                out.writerow([sku, f"p{p}", f"c{int(category_of[p])}"])
    feed = SyntheticFeed(
        GeneratorParams(
            transactions=transactions,
            items=products,
            patterns=2 * products,
            avg_transaction_size=10.0,
            avg_pattern_size=4.0,
            seed=seed,
        ),
        names=str,
    )
    picks = rng.random(transactions * 40)
    used = 0
    with open(folder / "orders.txt", "w", encoding="utf-8") as fh:
        for basket in feed.transactions():
            line = []
            for name in basket:
                choices = skus[int(name)]
                line.append(choices[int(picks[used % picks.shape[0]] * len(choices))])
                used += 1
            fh.write(" ".join(line) + "\n")
    return {
        "skus": int(variants.sum()),
        "products": products,
        "categories": categories,
        "transactions": transactions,
    }


def _config(case: dict[str, Any]) -> Any:
    from streamcount.config.load import config_from_mapping

    items = (
        {} if case["levels"] is None else {"catalogue": case["catalogue"], "levels": case["levels"]}
    )
    return config_from_mapping(
        {
            "input": {"format": "basket", "dead_letter_path": None},
            "items": items,
            "engine": {
                "epsilon": 0.001,
                "max_itemset_size": case["k"],
                "window_size": 50_000,
                "pane_size": 5_000,
                "batch_size": 5_000,
            },
            "rules": RULES,
        },
        source="bench_catalogue",
    )


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    from streamcount.config.load import apply_overrides
    from streamcount.replay import replay_file
    from streamcount.rules.derive import derive_rules

    config = _config(case)

    def once() -> tuple[float, Any]:
        start = time.perf_counter()
        result = replay_file(case["path"], config, report=["itemsets"], progress=None)
        return time.perf_counter() - start, result

    once()
    gc.collect()
    times: list[float] = []
    result: Any = None
    for _ in range(int(case["repeat"])):
        seconds, result = once()
        times.append(seconds)
        gc.collect()
    stats = result.engine.statistics()
    out: dict[str, Any] = {
        "case": case,
        "transactions": int(stats.transactions_seen),
        "seconds": times,
        "tps": [stats.transactions_seen / t for t in times],
        "tracked": list(stats.tracked_itemsets),
        "vocabulary_items": int(stats.vocabulary_items),
        "peak_rss_mb": machine.peak_rss_mb(),
    }
    if case["levels"] is not None and len(case["levels"]) > 1:
        snap = result.engine.snapshot()
        every = derive_rules(snap, apply_overrides(config, {"rules.min_interest": None}).rules)
        kept = derive_rules(snap, config.rules)
        out["rules"] = {"without_interest": len(every), "with_interest": len(kept)}
    return out


def _fmt(s: dict[str, float]) -> str:
    return f"{s['median']:,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def run_parent(args: argparse.Namespace) -> int:
    info = machine.machine_info()
    print(f"# streamcount catalogue-levels benchmark, {info['date']}")
    print(machine.format_machine(info))
    tmpdir = Path(tempfile.mkdtemp(prefix="streamcount-bench-"))
    results: dict[str, Any] = {}
    try:
        started = time.perf_counter()
        data = write_inputs(tmpdir, args.transactions, args.products, args.seed)
        print(
            f"generated {data['transactions']:,} orders over {data['skus']:,} SKUs of "
            f"{data['products']:,} products in {data['categories']} categories "
            f"({time.perf_counter() - started:.1f} s, not timed)"
        )
        for k in args.k:
            for name, levels in LEVELS.items():
                case = {
                    "path": str(tmpdir / "orders.txt"),
                    "catalogue": str(tmpdir / "catalogue.csv"),
                    "levels": levels,
                    "k": k,
                    "repeat": args.repeat,
                }
                results[f"K={k} {name}"] = machine.run_case(SCRIPT, case)
    finally:
        shutil.rmtree(tmpdir, ignore_errors=True)

    lines = []
    verdicts = []
    for label, res in results.items():
        tracked = " ".join(f"{j + 1}:{n:,}" for j, n in enumerate(res["tracked"]))
        rules = ""
        if "rules" in res:
            r = res["rules"]
            share = 1 - r["with_interest"] / r["without_interest"] if r["without_interest"] else 0
            rules = (
                f"; rules {r['without_interest']:,} -> {r['with_interest']:,} with R-interest "
                f"1.1 ({share:.0%} pruned)"
            )
        lines.append(
            f"{label:<40} {_fmt(machine.spread(res['tps']))} tx/s, peak {res['peak_rss_mb']:,.0f} "
            f"MB, tracked {tracked}{rules}"
        )
        verdicts.append(
            f"{label}: peak RSS <= {TARGET_RSS_MB:.0f} MB: "
            f"{machine.verdict(res['peak_rss_mb'] <= TARGET_RSS_MB)}"
        )
    for k in args.k:
        one = results.get(f"K={k} 1 level (sku)")
        two = results.get(f"K={k} 2 levels (sku, product)")
        if one and two:
            slowdown = machine.spread(one["tps"])["median"] / machine.spread(two["tps"])["median"]
            line = f"K={k}: 2 levels / SKUs only: {slowdown:.2f}x slower"
            if k == 2:
                line += (
                    f" (target <= {TARGET_SLOWDOWN:g}x): "
                    f"{machine.verdict(slowdown <= TARGET_SLOWDOWN)}"
                )
            verdicts.append(line)
    print(
        f"\n## generated feed, basket, epsilon 0.001, window 50,000 / panes 5,000; "
        f"{args.repeat} repeats after one warm-up"
    )
    print("\n".join(lines))
    print("\n".join(verdicts))
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        md = [
            "### Catalogue levels",
            "",
            f"Generated feed (seed {args.seed}): {data['transactions']:,} orders over "
            f"{data['skus']:,} SKUs of {data['products']:,} products in {data['categories']} "
            "categories; replay_file (basket), epsilon 0.001, window 50,000 / panes 5,000, "
            f"batch 5,000; each case in a fresh process, one warm-up, {args.repeat} timed runs "
            "(tx/s median [min..max]); rules on the final window with "
            f"{json.dumps(RULES)}, R-interest null vs 1.1.",
            "",
            *[f"    {ln}" for ln in lines + verdicts],
        ]
        raw = {
            "machine": info,
            "settings": {**vars(args), "data": data, "rules": RULES},
            "results": results,
            "verdicts": verdicts,
        }
        md_path, json_path = machine.record(
            "catalogue",
            "catalogue levels (bench_catalogue.py)",
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
    ap.add_argument("--transactions", type=int, default=200_000, help="orders generated")
    ap.add_argument("--products", type=int, default=1000, help="products in the catalogue")
    ap.add_argument("--seed", type=int, default=13)
    ap.add_argument("--k", type=int, nargs="+", default=[2, 3], help="max_itemset_size values")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
