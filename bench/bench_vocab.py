"""Memory over a feed whose item names keep changing (issue "Safe to expose, bounded in memory").

Run from the repository root::

    python3 bench/bench_vocab.py            # 1,000,000 baskets, prints
    python3 bench/bench_vocab.py --record   # and appends to bench/RESULTS.md

A seeded feed in the shape of click-stream baskets: each basket holds a few items of a stable
popular set (2,000 names, Zipf-like) and a few of a sliding range that moves by one name every
two baskets, so about 500,000 distinct names pass through 1,000,000 baskets and old ones never
come back. Each case runs in a fresh process through the pipeline the service uses (engine,
rules and alerts; K = 2, epsilon 0.001, window 50,000 in panes of 5,000), and samples the
resident set size, the vocabulary and the tracked entries every 100,000 baskets. The
baseline, in the same run, is the same feed with the release of unused names turned off
(``Engine.auto_compact = False``, what round 1 did). Target: RSS from 100,000 to 1,000,000
baskets flat within +20 % once the window is full.
"""

from __future__ import annotations

import argparse
import gc
import json
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path
import numpy as np

CHUNK = 5_000
SAMPLE_EVERY = 100_000
TARGET = 1.2


def _feed(n: int, seed: int) -> Any:
    """Chunks of ``CHUNK`` baskets (lists of names) of the churning feed."""
    rng = np.random.default_rng(seed)
    popular = [f"p{i}" for i in range(2_000)]
    weights = 1.0 / np.arange(1, 2_001)
    weights /= weights.sum()
    for start in range(0, n, CHUNK):
        size = min(CHUNK, n - start)
        stable_k = rng.integers(1, 5, size)
        churn_k = rng.integers(1, 6, size)
        chunk = []
        for j in range(size):
            t = start + j
            base = t // 2
            stable = rng.choice(2_000, int(stable_k[j]), p=weights)
            churn = base + rng.integers(0, 5_000, int(churn_k[j]))
            chunk.append([popular[i] for i in stable.tolist()] + [f"s{c}" for c in churn.tolist()])
        yield chunk


def run_case(n: int, compact: bool, seed: int) -> dict[str, Any]:
    """One case in this process: the samples and the time."""
    from streamcount.config.load import config_from_mapping
    from streamcount.intake.records import Decoded
    from streamcount.pipeline import Pipeline

    config = config_from_mapping(
        {
            "engine": {
                "epsilon": 0.001,
                "max_itemset_size": 2,
                "window_size": 50_000,
                "pane_size": 5_000,
                "batch_size": 5_000,
            }
        }
    )
    pipeline = Pipeline(config)
    pipeline.engine.auto_compact = compact
    samples = []
    seen = 0
    counting = 0.0
    gc.collect()
    for chunk in _feed(n, seed):
        started = time.perf_counter()
        pipeline.add(Decoded(baskets=chunk, source="bench"))
        counting += time.perf_counter() - started
        seen += len(chunk)
        if seen % SAMPLE_EVERY == 0:
            stats = pipeline.engine.statistics()
            samples.append(
                {
                    "baskets": seen,
                    "rss_mb": round(machine.current_rss_mb(), 1),
                    "names": stats.vocabulary_items,
                    "tracked": sum(stats.tracked_itemsets),
                    "held_bytes": stats.held_bytes,
                }
            )
    return {
        "compact": compact,
        "samples": samples,
        "peak_rss_mb": round(machine.peak_rss_mb(), 1),
        "counting_seconds": round(counting, 2),
    }


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--baskets", type=int, default=1_000_000, help="baskets per case")
    ap.add_argument("--seed", type=int, default=7, help="seed of the feed")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case is not None:
        print(json.dumps(run_case(args.baskets, args.case == "release", args.seed)))
        return 0
    info = machine.machine_info()
    print(f"# streamcount vocabulary-churn memory benchmark, {info['date']}")
    print(machine.format_machine(info))
    results = {}
    for case in ("release", "keep"):
        cmd = [sys.executable, __file__, "--case", case, "--baskets", str(args.baskets)]
        cmd += ["--seed", str(args.seed)]
        out = subprocess.run(cmd, check=True, capture_output=True, text=True, cwd=machine.REPO_DIR)
        results[case] = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"  {case}: done", flush=True)
    info["load_average_at_end"] = machine.load_average()
    lines = [
        f"{args.baskets:,} baskets of a feed whose names keep changing (about one new name "
        "every two baskets, old ones never back; seed "
        f"{args.seed}); the service's pipeline (rules and alerts), K = 2, epsilon 0.001, window "
        "50,000 in panes of 5,000; each case in a fresh process. `release`: unused names are "
        "released at pane closes (the default); `keep`: release turned off (round 1).",
        "",
        "| baskets | release: RSS MB | names held | tracked | keep: RSS MB | names held |",
        "|---|---|---|---|---|---|",
    ]
    for a, b in zip(results["release"]["samples"], results["keep"]["samples"], strict=True):
        lines.append(
            f"| {a['baskets']:,} | {a['rss_mb']:.0f} | {a['names']:,} | {a['tracked']:,} | "
            f"{b['rss_mb']:.0f} | {b['names']:,} |"
        )
    verdicts = {}
    for case, res in results.items():
        rss = [s["rss_mb"] for s in res["samples"]]
        growth = max(rss) / rss[0] if rss else float("nan")
        verdicts[case] = growth
        lines.append("")
        lines.append(
            f"{case}: RSS from {SAMPLE_EVERY:,} to {args.baskets:,} baskets at most "
            f"{growth:.2f}x the first sample, peak {res['peak_rss_mb']:.0f} MB, counting "
            f"{res['counting_seconds']:.1f} s"
            + (
                f" (target <= {TARGET:.1f}x: {'PASS' if growth <= TARGET else 'MISS'})"
                if case == "release"
                else " (baseline)"
            )
        )
    body = "\n".join(lines)
    print(body)
    print(f"# load average at end {info['load_average_at_end']}")
    if args.record:
        raw = {"machine": info, "settings": vars(args), "results": results, "growth": verdicts}
        md_path, json_path = machine.record(
            "vocab", "memory under a changing vocabulary (bench_vocab.py)", body, raw
        )
        print(f"recorded: {md_path} and {json_path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
