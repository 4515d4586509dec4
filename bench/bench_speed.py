"""Parse-only, count-only and end-to-end rates of streamcount beside the C reference kernel.

Run from the repository root::

    python3 bench/bench_speed.py                 # full run, prints the tables (several minutes)
    python3 bench/bench_speed.py --record        # ... and appends them to bench/RESULTS.md
    python3 bench/bench_speed.py --datasets T10I4D100K --repeat 1 --workers 1   # a quick look

The settings of the speed issue: T10I4D100K repeated 10 times (1,000,000 orders), epsilon
0.001, window 50,000 in panes of 5,000, batch 5,000, report itemsets at min_support 0.01;
retail (x 3) and the kosarak prefix (x 10: longer, sparser baskets) beside it. For every
dataset and K = 2, 3, in the same run:

* **parse-only**: basket lines to integer baskets. streamcount: read the plain file in
  batches, decode each (the replay's decoder), intern the names to ids with the
  vocabulary and sort each basket's ids, as ``replay`` does before counting. The C kernel:
  its own parse (read + split + sort/de-duplicate into integer arrays).
* **count-only**: integer baskets parsed beforehand into the windowed counting: streamcount's
  ``Engine.add_ids`` chunk by chunk (the replay's chunks), ``flush`` and the final snapshot;
  the kernel's panes fed the parsed arrays.
* **end to end**: ``streamcount replay`` (:func:`streamcount.replay.replay_file`) on the plain
  file, report itemsets; the kernel reading and parsing the file and counting. Neither side
  decompresses: the ``.gz`` data is written once as plain text to ``bench/.cache/``.
* **replay --workers N**: the same replay with N worker processes (itemsets, rules and alerts
  reports), against one process in the same run.
* **the floor**: the naive exact counter (``collections.Counter`` over ``itertools.combinations``
  of sizes 1..K, parse included; baskets of more than 200 distinct items set aside, as the
  engine and the kernel do) on a prefix of the same file (``--naive-size``; at K = 3 on
  retail and the kosarak prefix only ``--naive-size-long`` orders: their long baskets hold
  millions of triples, more than a Counter can hold in memory). A naive run that fails is
  reported as such; the rest of the run goes on.

Each streamcount case runs in a fresh interpreter (one warm-up, then ``--repeat`` timed runs);
the kernel runs ``--repeat`` times in fresh processes. Rates are orders per second: median
[min..max]. Peak RSS is the child's ``ru_maxrss`` (for workers, the largest of any worker and
the parent).
"""

from __future__ import annotations

import argparse
import gc
import json
import sys
import time
from collections import Counter
from itertools import combinations
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_ckernel  # bench/ is not a package: the scripts import their neighbours by path
import machine

SCRIPT = Path(__file__).resolve()
#: dataset -> times the file is fed (T10I4D100K x 10 = 1,000,000 orders)
DATASETS = {"T10I4D100K": 10, "retail": 3, "kosarak_prefix": 10}
SIZES = (2, 3)
EPSILON = 0.001
WINDOW_SIZE = 50_000
PANE_SIZE = 5_000
BATCH_SIZE = 5_000
MIN_SUPPORT = 0.01
NAIVE_SIZE = 50_000
NAIVE_SIZE_LONG = 5_000
#: targets of the speed issue, on T10I4D100K x 10 (ratios are streamcount / C kernel)
TARGETS = {
    "parse_tps": 1_500_000,
    "count_k2": 0.9,
    "e2e_k2": 0.7,
    "e2e_k3": 1.3,
    "workers2_k3": 1.6,
    "workers2_k2": 1.3,
    "rss_mb": 200.0,
}


def plain_repeated(dataset: str, times: int) -> Path:
    """``bench/.cache/<dataset>-x<times>.dat``: the dataset's plain text ``times`` over
    (written once; the kernel reads the single plain copy ``times`` over instead)."""
    single = bench_ckernel.plain_text(machine.data_path(f"{dataset}.dat.gz"))
    if times == 1:
        return single
    out = bench_ckernel.CACHE_DIR / f"{single.stem}-x{times}.dat"
    if out.exists() and out.stat().st_mtime >= single.stat().st_mtime:
        return out
    data = single.read_bytes()
    if not data.endswith(b"\n"):
        data += b"\n"
    tmp = out.with_suffix(".tmp")
    with tmp.open("wb") as fh:
        for _ in range(times):
            fh.write(data)
    tmp.replace(out)
    return out


# ---------------------------------------------------------------------------------------------
# child side: one case per process


def _config(k: int, workers: int = 1) -> Any:
    from streamcount.config.settings import Config, EngineConfig, RulesConfig

    return Config(
        engine=EngineConfig(
            epsilon=EPSILON,
            max_itemset_size=k,
            window_size=WINDOW_SIZE,
            pane_size=PANE_SIZE,
            batch_size=BATCH_SIZE,
        ),
        rules=RulesConfig(min_support=MIN_SUPPORT),
    )


def _parse(path: Path, cfg: Any) -> tuple[Any, list[tuple[Any, Any]]]:
    """Basket lines to integer baskets, as replay does before counting: (vocabulary, chunks
    of (flat ids, lengths)), ids ascending and distinct within each basket (as the kernel's
    parse leaves them)."""
    from streamcount.engine.rows import sort_dedupe
    from streamcount.engine.vocab import ItemVocabulary
    from streamcount.replay import decode_file

    vocab = ItemVocabulary()
    chunks = []
    for decoded in decode_file(str(path), cfg):
        tokens = decoded.tokens
        if tokens is not None:  # interned in bulk, as the pipeline does
            flat = vocab.encode_table(tokens.names, tokens.codes)[tokens.codes]
            lengths = tokens.lengths
        else:
            flat, lengths = vocab.encode_baskets(decoded.baskets)
        chunks.append(sort_dedupe(flat, lengths, len(vocab)))
    return vocab, chunks


def _parse_once(path: Path, cfg: Any) -> tuple[float, int]:
    gc.disable()  # as replay does while it reads
    try:
        start = time.perf_counter()
        _, chunks = _parse(path, cfg)
        seconds = time.perf_counter() - start
    finally:
        gc.enable()
    return seconds, sum(int(lengths.shape[0]) for _, lengths in chunks)


def _count_once(vocab: Any, chunks: list[tuple[Any, Any]], cfg: Any) -> tuple[float, int, Any]:
    from streamcount.engine.engine import Engine

    start = time.perf_counter()
    engine = Engine(cfg.engine)
    engine.vocabulary = vocab
    # the ids were interned beforehand: the vocabulary stays as it is (no compaction)
    engine.auto_compact = False
    for flat, lengths in chunks:
        engine.add_ids(flat, lengths)
    engine.flush()
    list(engine.snapshot().frequent(MIN_SUPPORT))
    return time.perf_counter() - start, engine.transactions_seen, engine


def _replay_once(path: Path, cfg: Any, report: list[str], workers: int) -> tuple[float, Any]:
    from streamcount.replay import replay_file

    start = time.perf_counter()
    result = replay_file(str(path), cfg, report=report, progress=None, workers=workers)
    return time.perf_counter() - start, result


def _naive_once(path: Path, k: int, size: int) -> tuple[float, int]:
    start = time.perf_counter()
    counter: Counter[tuple[str, ...]] = Counter()
    n = 0
    with path.open(encoding="ascii") as fh:
        for line in fh:
            if n >= size:
                break
            items = sorted(set(line.replace(",", " ").split()))
            if not items or len(items) > 200:
                continue
            n += 1
            for j in range(1, k + 1):
                counter.update(combinations(items, j))
    return time.perf_counter() - start, n


def _timed(fn: Any, repeat: int) -> tuple[list[float], Any]:
    """One warm-up, then ``repeat`` timed calls of ``fn() -> (seconds, *rest)``."""
    fn()
    gc.collect()
    times, rest = [], None
    for _ in range(repeat):
        seconds, *rest = fn()
        times.append(seconds)
        gc.collect()
    return times, rest


def run_child(case: dict[str, Any]) -> dict[str, Any]:
    kind = case["kind"]
    path = Path(case["path"])
    repeat = int(case["repeat"])
    k = int(case.get("k", 2))
    cfg = _config(k)
    out: dict[str, Any] = {"case": case}
    if kind == "parse":
        times, (n,) = _timed(lambda: _parse_once(path, cfg), repeat)
    elif kind == "count":
        vocab, chunks = _parse(path, cfg)
        times, (n, engine) = _timed(lambda: _count_once(vocab, chunks, cfg), repeat)
        out["tracked"] = list(engine.statistics().tracked_itemsets)
    elif kind == "replay":
        report = case.get("report", ["itemsets"])
        workers = int(case.get("workers", 1))
        times, (result,) = _timed(lambda: _replay_once(path, cfg, report, workers), repeat)
        n = result.report["input"]["transactions"]
        out["tracked"] = list(result.engine.statistics().tracked_itemsets)
        out["report_items"] = {p: len(result.report.get(p, [])) for p in report}
        out["worker_peak_rss_mb"] = result.stats.get("worker_peak_rss_mb")
        out["parts"] = result.stats.get("parts")
    elif kind == "naive":
        times, (n,) = _timed(lambda: _naive_once(path, k, int(case["size"])), repeat)
    else:
        raise ValueError(f"unknown case kind {kind!r}")
    out.update(orders=n, seconds=times, tps=[n / t for t in times])
    out["peak_rss_mb"] = machine.peak_rss_mb()
    return out


# ---------------------------------------------------------------------------------------------
# parent side


def _fmt(s: dict[str, float]) -> str:
    return f"{s['median']:>11,.0f} [{s['min']:,.0f}..{s['max']:,.0f}]"


def _c_rates(path: Path, k: int, times: int, repeat: int) -> dict[str, Any]:
    runs = [
        bench_ckernel.run(
            path,
            k,
            EPSILON,
            window_size=WINDOW_SIZE,
            pane_size=PANE_SIZE,
            batch_size=BATCH_SIZE,
            repeat=times,
        )
        for _ in range(repeat)
    ]
    return {
        part: machine.spread([r[f"{part}_orders_per_s"] for r in runs])
        for part in ("parse", "count", "e2e")
    } | {"runs": runs}


def _rss(res: dict[str, Any]) -> float:
    worker = res.get("worker_peak_rss_mb") or 0.0
    return max(res["peak_rss_mb"], worker)


def run_parent(args: argparse.Namespace) -> int:
    info = machine.machine_info()
    print(f"# streamcount speed benchmark, {info['date']}")
    print(machine.format_machine(info))
    print(
        f"# epsilon {EPSILON}, window {WINDOW_SIZE:,} in panes of {PANE_SIZE:,}, batch "
        f"{BATCH_SIZE:,}, min_support {MIN_SUPPORT}; streamcount: one warm-up then "
        f"{args.repeat} timed runs per case in a fresh process; C kernel: {args.repeat} "
        "processes; orders/s median [min..max]"
    )
    raw: dict[str, Any] = {"machine": info, "settings": vars(args).copy(), "cases": []}
    md = [
        "| dataset | K | part | streamcount orders/s | C kernel orders/s | ratio | peak RSS MB |",
        "|---|---|---|---|---|---|---|",
    ]
    verdicts: dict[str, tuple[bool, str]] = {}
    bench_ckernel.build()
    for dataset in args.datasets:
        times = DATASETS[dataset] if args.times is None else args.times
        single = bench_ckernel.plain_text(machine.data_path(f"{dataset}.dat.gz"))
        path = plain_repeated(dataset, times)
        parsed = None
        print(f"\n## {dataset} x {times} ({path.name})")
        for k in args.sizes:
            c = _c_rates(single, k, times, args.repeat)
            rows: dict[str, Any] = {}
            for part, kind in (("parse", "parse"), ("count", "count"), ("e2e", "replay")):
                if part == "parse" and parsed is not None:
                    rows[part] = parsed  # parsing does not depend on K
                    continue
                res = machine.run_case(
                    SCRIPT, {"kind": kind, "path": str(path), "k": k, "repeat": args.repeat}
                )
                res["tps_summary"] = machine.spread(res["tps"])
                rows[part] = res
                if part == "parse":
                    parsed = res
            case_raw: dict[str, Any] = {"dataset": dataset, "times": times, "k": k, "c": c}
            for part, name in (("parse", "parse-only"), ("count", "count-only"), ("e2e", "e2e")):
                res = rows[part]
                s, cs = res["tps_summary"], c[part]
                ratio = s["median"] / cs["median"]
                case_raw[part] = res | {"ratio": ratio}
                print(
                    f"K={k} {name:10} streamcount {_fmt(s)}  C {_fmt(cs)}  "
                    f"ratio {ratio:.2f}x  peak {_rss(res):,.0f} MB"
                )
                md.append(
                    f"| {dataset} x {times} | {k} | {name} | {_fmt(s).strip()} | "
                    f"{_fmt(cs).strip()} | {ratio:.2f}x | {_rss(res):,.0f} |"
                )
                if dataset == "T10I4D100K":
                    verdicts.setdefault("rss", (True, ""))
                    if _rss(res) > TARGETS["rss_mb"]:
                        verdicts["rss"] = (False, f"peak RSS {_rss(res):,.0f} MB in K={k} {name}")
            raw["cases"].append(case_raw)
            if dataset == "T10I4D100K":
                if "parse" not in verdicts:
                    p = rows["parse"]["tps_summary"]["median"]
                    verdicts["parse"] = (
                        p >= TARGETS["parse_tps"],
                        f"parse-only {p:,.0f}/s >= {TARGETS['parse_tps']:,}",
                    )
                if k == 2:
                    r = case_raw["count"]["ratio"]
                    verdicts["count_k2"] = (r >= TARGETS["count_k2"], f"count K=2 {r:.2f}x >= 0.9x")
                for kk in (2, 3):
                    if k == kk:
                        r = case_raw["e2e"]["ratio"]
                        t = TARGETS[f"e2e_k{kk}"]
                        verdicts[f"e2e_k{kk}"] = (r >= t, f"e2e K={kk} {r:.2f}x >= {t}x")
            size = args.naive_size
            if k == 3 and dataset != "T10I4D100K":
                size = min(size, args.naive_size_long)
            case = {"kind": "naive", "path": str(path), "k": k, "size": size}
            try:
                naive = machine.run_case(SCRIPT, case | {"repeat": args.naive_repeat})
            except RuntimeError as exc:
                print(f"K={k} naive exact: failed ({str(exc).splitlines()[0]})")
                case_raw["naive"] = {"failed": str(exc)[:500]}
                md.append(f"| {dataset} x {times} | {k} | naive exact (floor) | failed | | | |")
                continue
            ns = machine.spread(naive["tps"])
            case_raw["naive"] = naive
            print(f"K={k} naive exact (first {naive['orders']:,} orders) {_fmt(ns)}  (the floor)")
            md.append(
                f"| {dataset} x {times} | {k} | naive exact, first {naive['orders']:,} "
                f"(floor) | {_fmt(ns).strip()} | | | {naive['peak_rss_mb']:,.0f} |"
            )

    if args.workers > 1 and "T10I4D100K" in args.datasets:
        path = plain_repeated("T10I4D100K", DATASETS["T10I4D100K"])
        print(f"\n## replay --workers {args.workers} vs one process (T10I4D100K x 10)")
        md += [
            "",
            f"| K | report | 1 process orders/s | --workers {args.workers} orders/s | "
            "speed-up | peak RSS MB (largest process) |",
            "|---|---|---|---|---|---|",
        ]
        raw["workers"] = []
        for k in args.sizes:
            for report in (["itemsets"], ["itemsets", "rules"], ["itemsets", "rules", "alerts"]):
                base = {"kind": "replay", "path": str(path), "k": k, "repeat": args.repeat}
                one = machine.run_case(SCRIPT, base | {"report": report})
                many = machine.run_case(SCRIPT, base | {"report": report, "workers": args.workers})
                s1, s2 = machine.spread(one["tps"]), machine.spread(many["tps"])
                speedup = s2["median"] / s1["median"]
                label = ",".join(report)
                raw["workers"].append({"k": k, "report": label, "one": one, "many": many})
                print(
                    f"K={k} {label:22} 1: {_fmt(s1)}  {args.workers}: {_fmt(s2)}  "
                    f"x{speedup:.2f}  peak {_rss(many):,.0f} MB"
                )
                md.append(
                    f"| {k} | {label} | {_fmt(s1).strip()} | {_fmt(s2).strip()} | "
                    f"{speedup:.2f}x | {_rss(many):,.0f} |"
                )
                if report == ["itemsets"] and args.workers == 2 and k in (2, 3):
                    t = TARGETS[f"workers2_k{k}"]
                    verdicts[f"workers2_k{k}"] = (
                        speedup >= t,
                        f"--workers 2 K={k} x{speedup:.2f} >= {t}x",
                    )
                if _rss(many) > TARGETS["rss_mb"]:
                    verdicts["rss"] = (False, f"peak RSS {_rss(many):,.0f} MB with workers")

    info["load_average_at_end"] = machine.load_average()
    lines = [f"{machine.verdict(ok)} {text}" for ok, text in verdicts.values() if text]
    print(f"\n# load average at end {info['load_average_at_end']}")
    print("\n".join(f"# {line}" for line in lines))
    md += ["", "Targets (T10I4D100K x 10):", "", *[f"- {line}" for line in lines]]
    raw["verdicts"] = {key: {"ok": ok, "text": text} for key, (ok, text) in verdicts.items()}
    if args.record:
        md_path, json_path = machine.record(
            "speed", "parse, count and end-to-end rates beside the C kernel", "\n".join(md), raw
        )
        print(f"recorded: {md_path} and {json_path}")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per case (after warm-up)")
    ap.add_argument("--datasets", nargs="+", default=list(DATASETS), choices=list(DATASETS))
    ap.add_argument("--sizes", type=int, nargs="+", default=list(SIZES), choices=SIZES)
    ap.add_argument("--times", type=int, default=None, help="feed every dataset this many times")
    ap.add_argument("--naive-size", type=int, default=NAIVE_SIZE, help="orders the naive reads")
    ap.add_argument(
        "--naive-size-long",
        type=int,
        default=NAIVE_SIZE_LONG,
        help="orders the naive reads at K=3 on retail and the kosarak prefix",
    )
    ap.add_argument("--naive-repeat", type=int, default=1, help="timed naive runs per case")
    ap.add_argument("--workers", type=int, default=2, help="replay --workers case (1: skip it)")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        print(json.dumps(run_child(json.loads(args.case))))
        return 0
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
