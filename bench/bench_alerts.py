"""Alerts people can trust, measured: the false-alert promise, detection delays, a real pass,
and the cost of detection.

Run from the repository root::

    python3 bench/bench_alerts.py --quick                     # about a minute, prints only
    nice -n 19 python3 bench/bench_alerts.py --parts calibration,delays,retail --jobs 2 --record
    python3 bench/bench_alerts.py --parts cost --record       # a timing: on a quiet machine

Parts (``--parts``, comma-separated; default all):

``calibration``
    The promise itself. Stationary feeds (``bench/alert_feeds.py``: the generator with no
    drift; the open retail dataset in a seeded random order, cycled) at budgets of 100, 1,000
    and 10,000 false alerts per million transactions and windows 5,000/500, 10,000/1,000,
    20,000/2,000 and 50,000/5,000 (``min_support`` 0.01, epsilon 0.001, K = 3), every alert
    after warm-up counted as false, its rate per million with an exact Poisson 95 % upper bound
    (``bench/alert_report.py``); then the default budget (1 per million) over 3,000,000
    transactions after warm-up per window size on both feeds; then an overdispersed feed
    (repeated orders) at the same windows, to show how far the guarantee breaks.
``delays``
    Planted changes on the generator feed against an exact recount of the window at every
    pane close (window 10,000/1,000, default budget, 20 seeds): a pair of new products at
    rates 0.015, 0.02, 0.04 (emerged delay after the exact window support first reaches
    ``min_support``); an existing pair rising 0.01 -> 0.03, 0.02 -> 0.04, 0.03 -> 0.05 (first
    emerged or surged alert after the change starts); a pair at 0.04 that stops (faded delay
    after the stop). Misses and the alerts on other itemsets are counted too.
``retail``
    One pass over the open retail dataset in file order (window 20,000/2,000, ``min_support``
    0.01, default budget): alerts per pane close by kind and the ten strongest alerts
    (statistic / threshold) with their evidence and an exact recount of the itemset before and
    since the estimated change.
``cost``
    A timing: ``replay_file`` of T10I4D100K (K = 3, epsilon 0.001, window 50,000/5,000) with
    report ``itemsets`` against ``itemsets,rules,alerts``, each run in a fresh process, the
    two interleaved, ``--cost-runs`` of each; medians and min-max, target <= 15 % end to end.

Every case runs in a fresh process (``--case``); the count parts are seeded and do not depend
on timing, so they may run side by side (``--jobs``) and their results are kept in
``bench/.cache/alerts/`` (``--resume`` reuses the ones made by the same code). The cost part
always runs alone, after the others, and is never cached. Alerts are signals for a person to
review, not decisions: these figures say how often such a person would be bothered for
nothing, and how late a real change reaches them.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
import time
from concurrent.futures import ThreadPoolExecutor, as_completed
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import alert_parts  # bench/ is not a package: neighbours are imported by path
import alert_realdata
import machine

__all__ = ["main", "run_all", "run_cost", "run_parent"]

SCRIPT = Path(__file__).resolve()
CACHE_DIR = machine.BENCH_DIR / ".cache" / "alerts"
PARTS = ("calibration", "delays", "retail", "cost")
WINDOWS = "5000/500,10000/1000,20000/2000,50000/5000"
#: what a child process runs besides streamcount (a cached result depends on them)
_CHILD_MODULES = ("alert_feeds.py", "alert_recount.py", "alert_runs.py", "machine.py")


def _code_hash() -> str:
    """Hash of the code a cached result depends on (streamcount and the child modules)."""
    h = hashlib.sha256()
    files = sorted((machine.REPO_DIR / "streamcount").rglob("*.py"))
    files += [machine.BENCH_DIR / n for n in _CHILD_MODULES]
    for path in files:
        h.update(path.relative_to(machine.REPO_DIR).as_posix().encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:16]


def _run(case: dict[str, Any], *, resume: bool, code: str) -> dict[str, Any]:
    key = hashlib.sha256(json.dumps([case, code], sort_keys=True).encode()).hexdigest()[:24]
    path = CACHE_DIR / f"{key}.json"
    if resume and path.exists() and case["kind"] != "cost":
        out: dict[str, Any] = json.loads(path.read_text(encoding="utf-8"))
        out["cached"] = True
        return out
    start = time.perf_counter()
    out = machine.run_case(SCRIPT, case)
    out["wall_seconds"] = time.perf_counter() - start
    if case["kind"] != "cost":
        CACHE_DIR.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(out), encoding="utf-8")
    return out


def run_all(cases: list[dict[str, Any]], args: argparse.Namespace) -> list[dict[str, Any]]:
    """Run the count cases ``--jobs`` at a time (longest first); results in case order."""
    code = _code_hash()
    order = sorted(range(len(cases)), key=lambda i: -alert_parts.work(cases[i]))
    results: list[dict[str, Any] | None] = [None] * len(cases)
    with ThreadPoolExecutor(max_workers=max(1, args.jobs)) as pool:
        futures = {pool.submit(_run, cases[i], resume=args.resume, code=code): i for i in order}
        for done, fut in enumerate(as_completed(futures), 1):
            i = futures[fut]
            results[i] = fut.result()
            took = f"{results[i].get('wall_seconds', 0):.0f} s"
            if results[i].get("cached"):
                took += " (cached)"
            print(f"  [{done}/{len(cases)}] {alert_parts.label(cases[i])}: {took}", flush=True)
    return [r for r in results if r is not None]


def run_cost(args: argparse.Namespace) -> list[dict[str, Any]]:
    """Fresh processes, the two reports interleaved (ABBA...), never in parallel."""
    code = _code_hash()
    out = []
    for r in range(args.cost_runs):
        pair = alert_realdata.COST_REPORTS if r % 2 == 0 else alert_realdata.COST_REPORTS[::-1]
        for report in pair:
            case = alert_realdata.cost_case(args, report)
            res = _run(case, resume=False, code=code)
            res["round"] = r
            out.append(res)
            print(f"  cost round {r + 1}: {','.join(report)} {res['tps'][0]:,.0f} tx/s", flush=True)
    return out


def run_parent(args: argparse.Namespace) -> int:
    parts = [p for p in args.parts.split(",") if p]
    unknown = set(parts) - set(PARTS)
    if unknown:
        raise SystemExit(f"--parts: unknown {sorted(unknown)}; choose from {','.join(PARTS)}")
    info = machine.machine_info()
    print(f"# streamcount alerts benchmark, {info['date']}")
    print(machine.format_machine(info))
    raw: dict[str, Any] = {"machine": info, "settings": alert_parts.settings(args, parts)}
    md: list[str] = []
    if set(parts) - {"cost"}:
        md += [
            "Calibration, delays and the retail pass are counts: they depend on the seeds and "
            "the code alone, not on the machine's load ('run s' is wall time on a shared "
            "machine, for information). Cases run in fresh processes, two at a time; "
            "with `--resume` finished cases come from `bench/.cache/alerts/`, reused only "
            "for the same code (streamcount and the child modules hashed).",
        ]
    builders = {
        "calibration": (alert_parts.calibration_cases, alert_parts.calibration_md),
        "delays": (alert_parts.delay_cases, alert_parts.delays_md),
        "retail": (alert_realdata.retail_cases, alert_realdata.retail_md),
    }
    for part in parts:
        if part == "cost":
            continue
        make, report = builders[part]
        cases = make(args)
        print(f"\n## {part}: {len(cases)} cases, {args.jobs} at a time", flush=True)
        results = run_all(cases, args)
        lines, summary = report(args, results)
        print("\n".join(lines), flush=True)
        md += ["", *lines]
        if part == "retail":
            results = alert_realdata.compact_retail(results)
        else:
            results = alert_parts.compact(part, results)
        raw[part] = {"summary": summary, "results": results}
    if "cost" in parts:
        print(f"\n## cost: {args.cost_runs} rounds, interleaved, one process per run", flush=True)
        results = run_cost(args)
        lines, summary = alert_realdata.cost_md(args, results)
        print("\n".join(lines))
        md += ["", *lines]
        raw["cost"] = {"summary": summary, "results": results}
    info["load_average_at_end"] = machine.load_average()
    print(f"\n# load average at end {info['load_average_at_end']}")
    if args.record:
        title = f"alerts: {', '.join(parts)} (bench_alerts.py)"
        md_path, json_path = machine.record("alerts", title, "\n".join(md), raw)
        print(f"recorded: {md_path} and {json_path}")
    return 0


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    ap.add_argument("--parts", default=",".join(PARTS), help=f"subset of {','.join(PARTS)}")
    ap.add_argument("--quick", action="store_true", help="small sizes: about a minute")
    ap.add_argument("--jobs", type=int, default=1, help="count cases run side by side")
    ap.add_argument("--resume", action="store_true", help="reuse cached count cases")
    ap.add_argument("--windows", default=WINDOWS, help="WINDOW/PANE list (calibration)")
    ap.add_argument("--budgets", default="100,1000,10000", help="per million (calibration)")
    ap.add_argument("--feeds", default="generator,retail", help="stationary feeds")
    ap.add_argument(
        "--calib-transactions", type=int, default=1_000_000, help="after warm-up, per case"
    )
    ap.add_argument("--default-feeds", default="generator,retail", help="at the default budget")
    ap.add_argument(
        "--default-transactions", type=int, default=3_000_000, help="after warm-up, per window"
    )
    ap.add_argument("--burst-budgets", default="1,100,1000,10000", help="overdispersed feed")
    ap.add_argument("--k", type=int, default=3, help="largest itemset size")
    ap.add_argument("--epsilon", type=float, default=0.001)
    ap.add_argument("--min-support", type=float, default=0.01)
    ap.add_argument("--seed", type=int, default=1, help="first seed")
    ap.add_argument("--seeds", type=int, default=20, help="seeds per delay scenario")
    ap.add_argument("--horizon", type=int, default=20, help="panes after a planted change")
    ap.add_argument("--top", type=int, default=10, help="strongest retail alerts shown")
    ap.add_argument("--cost-runs", type=int, default=5, help="runs of each report (cost)")
    ap.add_argument("--cost-repeat", type=int, default=1, help="timed runs per process (cost)")
    ap.add_argument("--cost-size", type=int, default=None, help="T10I4D100K prefix (cost)")
    ap.add_argument("--cost-min-support", type=float, default=0.005, help="min_support (cost)")
    ap.add_argument("--case", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.case:
        import alert_runs

        print(json.dumps(alert_runs.run_case(json.loads(args.case))))
        return 0
    if args.quick:
        args.windows = "10000/1000"
        args.calib_transactions = args.default_transactions = 10_000
        args.burst_budgets = "1,1000"
        args.seeds, args.horizon, args.top = 1, 8, 5
        args.cost_runs, args.cost_size = 1, 20_000
    return run_parent(args)


if __name__ == "__main__":
    sys.exit(main())
