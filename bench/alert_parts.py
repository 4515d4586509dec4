"""The parts of ``bench_alerts.py``: which cases each runs, and its figures as Markdown.

Each part has ``<part>_cases(args)`` (the case dicts, run by ``alert_runs.run_case`` in fresh
processes) and ``<part>_md(args, results)`` (Markdown lines and a JSON summary). The method of
every part is written beside its figures, so a recorded section reads on its own.
"""

from __future__ import annotations

import argparse
import math
import statistics
from typing import Any

import alert_feeds as feeds
from alert_report import delay_stats, fmt_delay, md_table, rate_row

__all__ = [
    "COST_REPORTS",
    "DELAY_SCENARIOS",
    "calibration_cases",
    "calibration_md",
    "cost_case",
    "cost_md",
    "delay_cases",
    "delays_md",
    "label",
    "retail_cases",
    "retail_md",
    "settings",
    "work",
]

DEFAULT_BUDGET = 1.0
DELAY_WINDOW, DELAY_PANE = 10_000, 1_000
RETAIL_WINDOW, RETAIL_PANE = 20_000, 2_000
COST_WINDOW, COST_PANE = 50_000, 5_000
COST_REPORTS = (("itemsets",), ("itemsets", "rules", "alerts"))
TARGET_COST_PCT = 15.0
#: (scenario, rate before, rate after, pane of the change, targets {stat: max panes})
DELAY_SCENARIOS: tuple[tuple[str, float, float, int, dict[str, float]], ...] = (
    ("new", 0.0, 0.015, 20, {"median": 1, "p90": 2}),
    ("new", 0.0, 0.02, 20, {"median": 1, "p90": 2}),
    ("new", 0.0, 0.04, 20, {"median": 1, "p90": 2}),
    ("rise", 0.01, 0.03, 30, {"median": 3}),
    ("rise", 0.02, 0.04, 30, {}),
    ("rise", 0.03, 0.05, 30, {}),
    ("stop", 0.04, 0.0, 30, {"median": 2, "p90": 3}),
)
_SEEDS_PER_CASE = 10


def _windows(args: argparse.Namespace) -> list[tuple[int, int]]:
    out = []
    for part in args.windows.split(","):
        w, p = part.split("/")
        out.append((int(w), int(p)))
    return out


def _floats(text: str) -> list[float]:
    return [float(x) for x in text.split(",") if x]


def settings(args: argparse.Namespace, parts: list[str]) -> dict[str, Any]:
    return {k: v for k, v in vars(args).items() if k not in ("case", "record")} | {"parts": parts}


def work(case: dict[str, Any]) -> float:
    """A rough cost estimate, to start the longest cases first."""
    if case["kind"] == "stationary":
        per_tx = 80.0 / case["pane"] + 0.05
        return (case["window"] + case["after"]) * per_tx
    if case["kind"] == "delays":
        return 5e5 * len(case["seeds"])
    return 1e5


def label(case: dict[str, Any]) -> str:
    if case["kind"] == "stationary":
        return (
            f"{case['feed']} {case['window']}/{case['pane']} budget {case['budget']:g} "
            f"+{case['after']:,} tx"
        )
    if case["kind"] == "delays":
        seeds = case["seeds"]
        return (
            f"{case['scenario']} {case['before']:g}->{case['after']:g} seeds "
            f"{seeds[0]}..{seeds[-1]}"
        )
    return case["kind"]


# ---------------------------------------------------------------------------------------------
# calibration


def _stationary_case(
    args: argparse.Namespace, feed: str, wp: tuple[int, int], budget: float, after: int, seed: int
) -> dict[str, Any]:
    return {
        "kind": "stationary",
        "feed": feed,
        "window": wp[0],
        "pane": wp[1],
        "budget": budget,
        "after": after,
        "seed": seed,
        "k": args.k,
        "epsilon": args.epsilon,
        "min_support": args.min_support,
        "set": "",
    }


def calibration_cases(args: argparse.Namespace) -> list[dict[str, Any]]:
    cases = []
    wins = _windows(args)
    for feed in [f for f in args.feeds.split(",") if f]:
        for i, wp in enumerate(wins):
            for b in _floats(args.budgets):
                c = _stationary_case(args, feed, wp, b, args.calib_transactions, args.seed + i)
                cases.append(c | {"set": "budgets"})
    for feed in [f for f in args.default_feeds.split(",") if f]:
        for i, wp in enumerate(wins):
            seed = args.seed + 50 + i
            c = _stationary_case(args, feed, wp, DEFAULT_BUDGET, args.default_transactions, seed)
            cases.append(c | {"set": "default"})
    for i, wp in enumerate(wins):
        for b in _floats(args.burst_budgets):
            c = _stationary_case(args, "bursts", wp, b, args.calib_transactions, args.seed + i)
            cases.append(c | {"set": "bursts"})
    return cases


def _kinds(by_kind: dict[str, int]) -> str:
    return "/".join(str(by_kind.get(k, 0)) for k in ("emerged", "surged", "faded"))


def _rate_table(results: list[dict[str, Any]], *, ratio: bool = False) -> tuple[list[str], list]:
    header = [
        "feed",
        "window / pane",
        "budget per M",
        "tx after warm-up",
        "alerts (e/s/f)",
        "observed per M",
        "95 % upper per M",
        "budget holds",
        "upper <= budget",
    ]
    if ratio:
        header += ["observed / budget (95 % lower)"]
    header += ["tests per pane (median)", "h (median)", "run s"]
    rows, summary = [], []
    for r in results:
        c = r["case"]
        row = rate_row(r["alerts"], r["exposure"], c["budget"])
        summary.append({"case": c, **row, "by_kind": r["by_kind"]})
        cells = [
            c["feed"],
            f"{c['window']:,} / {c['pane']:,}",
            f"{c['budget']:,g}",
            f"{r['exposure']:,}",
            f"{r['alerts']} ({_kinds(r['by_kind'])})",
            f"{row['rate']:,.1f}",
            f"{row['upper_rate']:,.1f}",
            "PASS" if row["holds"] else "MISS",
            "yes" if row["shown"] else "no",
        ]
        if ratio:
            cells.append(f"{row['ratio']:.2f} ({row['ratio_lower']:.2f})")
        tests, h = r["tests"] or {}, r["threshold"] or {}
        cells += [
            f"{tests.get('median', math.nan):,.0f}",
            f"{h.get('median', math.nan):.2f}",
            f"{r['seconds']:.0f}",
        ]
        rows.append(cells)
    return md_table(header, rows), summary


def calibration_md(
    args: argparse.Namespace, results: list[dict[str, Any]]
) -> tuple[list[str], dict[str, Any]]:
    sets: dict[str, list[dict[str, Any]]] = {"budgets": [], "default": [], "bursts": []}
    for r in results:
        sets[r["case"]["set"]].append(r)
    method = [
        "### Calibration: false alerts on stationary feeds",
        "",
        f"K = {args.k}, epsilon {args.epsilon:g}, min_support {args.min_support:g}, other rule "
        "and alert settings at their defaults; count-based windows, one pane per batch. Feeds: "
        "`generator` = the Agrawal-Srikant generator (T10.I4, N = 1000, |L| = 2000), no drift, "
        "seed 1 + window index (same feed at every budget); `retail` = the open retail dataset "
        "(88,162 receipts) in a seeded random order, a fresh permutation per pass, cycled to the "
        "length needed (**the cycle repeats baskets**: each receipt once per pass, about "
        "11 passes per million transactions); `bursts` = the generator feed with repeated "
        f"orders ({feeds.BURST_SHARE:.0%} of orders followed at once by a geometric number of "
        f"copies, mean {feeds.BURST_MEAN_EXTRA:g}). No feed changes, so every alert is false. "
        "'tx after warm-up' is the exposure the budget is charged on: the transactions of the "
        "pane closes evaluated after the first window is full (the close that fills it "
        "included). Alerts = notifications (emerged/surged/faded by their kind; a surge folded "
        "into an emerged alert counts once). The 95 % upper bound is exact (chi-square, "
        "one-sided); 'budget holds' = the observed count is within the Poisson interval of a "
        "rate at or below the budget (one-sided 95 % lower bound <= budget x tx / 10^6); "
        "'upper <= budget' = the data show it (the 95 % upper bound too). 'tests' = the tests "
        "the budget is split over at a pane close, 'h' its CUSUM threshold.",
    ]
    lines, summary = list(method), {}
    if sets["budgets"]:
        table, s = _rate_table(sets["budgets"])
        summary["budgets"] = s
        lines += ["", f"Raised budgets, {args.calib_transactions:,} transactions after warm-up:"]
        lines += ["", *table]
    if sets["default"]:
        table, s = _rate_table(sets["default"])
        summary["default"] = s
        lines += [
            "",
            f"Default budget (1 per million), {args.default_transactions:,} transactions after "
            "warm-up per window size (seeds 51 + window index; retail: another shuffle):",
            "",
            *table,
        ]
    if sets["bursts"]:
        table, s = _rate_table(sets["bursts"], ratio=True)
        summary["bursts"] = s
        lines += [
            "",
            "Overdispersed feed (repeated orders: not covered by the guarantee), "
            f"{args.calib_transactions:,} transactions after warm-up; observed / budget with "
            "the one-sided 95 % lower bound of that ratio:",
            "",
            *table,
        ]
    fails = [s for group in ("budgets", "default") for s in summary.get(group, [])]
    missed = [s for s in fails if not s["holds"]]
    lines += [
        "",
        f"Stationary feeds: {len(fails) - len(missed)} of {len(fails)} cases within the budget"
        + (
            ""
            if not missed
            else "; MISS: "
            + "; ".join(
                f"{s['case']['feed']} {s['case']['window']}/{s['case']['pane']} budget "
                f"{s['case']['budget']:g} ({s['alerts']} alerts, {s['rate']:.1f} per M)"
                for s in missed
            )
        )
        + ".",
    ]
    return lines, summary


# ---------------------------------------------------------------------------------------------
# delays


def delay_cases(args: argparse.Namespace) -> list[dict[str, Any]]:
    seeds = list(range(args.seed, args.seed + args.seeds))
    cases = []
    for scenario, before, after, at, _ in DELAY_SCENARIOS:
        for i in range(0, len(seeds), _SEEDS_PER_CASE):
            cases.append(
                {
                    "kind": "delays",
                    "scenario": scenario,
                    "before": before,
                    "after": after,
                    "at_pane": at,
                    "horizon": args.horizon,
                    "window": DELAY_WINDOW,
                    "pane": DELAY_PANE,
                    "min_support": args.min_support,
                    "budget": DEFAULT_BUDGET,
                    "seeds": seeds[i : i + _SEEDS_PER_CASE],
                }
            )
    return cases


def _hist(h: dict[str, int]) -> str:
    keys = sorted((k for k in h if k != "miss"), key=float) + (["miss"] if "miss" in h else [])
    return ", ".join(f"{k}: {h[k]}" for k in keys)


def delays_md(
    args: argparse.Namespace, results: list[dict[str, Any]]
) -> tuple[list[str], dict[str, Any]]:
    runs: dict[tuple[str, float, float], list[dict[str, Any]]] = {}
    for r in results:
        c = r["case"]
        runs.setdefault((c["scenario"], c["before"], c["after"]), []).extend(r["runs"])
    header = [
        "change",
        "delay measured from",
        "seeds",
        "misses",
        "median",
        "p90",
        "target",
        "verdict",
        "delays (panes: runs)",
        "pair alerts before the change",
        "related / other alerts",
    ]
    rows, summary, extra = [], [], []
    exposure = other = related = 0
    other_kinds: dict[str, int] = {}
    for scenario, before, after, at, targets in DELAY_SCENARIOS:
        got = runs.get((scenario, before, after))
        if not got:
            continue
        stats = delay_stats([g["delay"] for g in got])
        checks = {k: stats[k] <= v for k, v in targets.items()}
        verdict = "-" if not checks else ("PASS" if all(checks.values()) else "MISS")
        target = ", ".join(f"{k} <= {v:g}" for k, v in targets.items()) or "(report)"
        if scenario == "new":
            change = f"new pair at {after:g}"
            origin = "exact window support >= min_support (emerged)"
        elif scenario == "rise":
            change = f"pair {before:g} -> {after:g}"
            origin = f"change start, seq {at * DELAY_PANE:,} (emerged or surged)"
        else:
            change = f"pair at {before:g} stops"
            origin = f"stop, seq {at * DELAY_PANE:,} (faded)"
        pre = sum(g["false_pair_alerts"] for g in got)
        rel = sum(g["related_alerts"] for g in got)
        oth = sum(g["other_alerts"] for g in got)
        exposure += sum(g["exposure"] for g in got)
        other += oth
        related += rel
        for g in got:
            for k, v in g["other_by_kind"].items():
                other_kinds[k] = other_kinds.get(k, 0) + v
        rows.append(
            [
                change,
                origin,
                stats["runs"],
                stats["misses"],
                fmt_delay(stats["median"]),
                fmt_delay(stats["p90"]),
                target,
                verdict,
                _hist(stats["histogram"]),
                pre,
                f"{rel} / {oth}",
            ]
        )
        item = {"scenario": scenario, "before": before, "after": after, **stats}
        item |= {"targets": targets, "verdict": verdict, "pair_alerts_before_change": pre}
        if scenario == "new":
            up = delay_stats([g["first_up_after_crossing"] for g in got])
            start = delay_stats([g["first_up_after_start"] for g in got])
            item["first_up_after_crossing"] = up
            item["first_up_after_start"] = start
            extra.append(
                f"- new pair at {after:g}: first emerged-or-surged alert {fmt_delay(up['median'])}"
                f" (median) / {fmt_delay(up['p90'])} (p90) panes after the exact crossing, "
                f"{fmt_delay(start['median'])} / {fmt_delay(start['p90'])} after the products "
                f"appear; exact crossing {_crossing(got)} panes after they appear."
            )
        else:
            active = sum(1 for g in got if g.get("active_rule_before_change"))
            item["active_rule_before_change"] = active
            sup = [g["exact_support_at_change"] for g in got]
            item["exact_support_at_change"] = sup
            extra.append(
                f"- {change}: exact window support at the change {statistics.median(sup):.4f} "
                f"(median; {min(sup):.4f}-{max(sup):.4f}); an active rule just before the "
                f"change in {active} of {len(got)} runs."
            )
        summary.append(item)
    lines = [
        "### Delays against the exact oracle",
        "",
        f"Generator feed (as above; seeds {args.seed}..{args.seed + args.seeds - 1}) with one "
        f"planted change, window {DELAY_WINDOW:,} / panes {DELAY_PANE:,}, K = 3, epsilon 0.001, "
        f"min_support {args.min_support:g}, default budget (1 per million), runs end "
        f"{args.horizon} panes after the change. New pair: two products the generator never "
        "sells, bought together from pane 20 on; the oracle recounts the pair exactly over the "
        "window at every pane close, and the delay is (alert seq - seq of the first pane close "
        "where the exact window support reaches min_support) / pane. Rise and stop: two items "
        "the generator sells (each in 1-3 % of orders, rarely together) added together at the "
        "first rate from the start and at the second from pane 30 on; delay = (alert seq - "
        "change seq) / pane, so 1 = the first pane close after the change. A miss (no alert by "
        "the end of the run) counts as an infinite delay. 'related' = alerts on other itemsets "
        "that contain a planted item (their rates change too), 'other' = alerts on itemsets "
        "disjoint from the pair: false by construction.",
        "",
        *md_table(header, rows),
        "",
        *extra,
        "",
        f"Other itemsets: {other} false alerts ({_kinds(other_kinds)} emerged/surged/faded) over "
        f"{exposure:,} transactions after warm-up, {rate_row(other, exposure, 1.0)['rate']:.2f} "
        f"per million (95 % upper {rate_row(other, exposure, 1.0)['upper_rate']:.2f}; budget "
        f"1); {related} alerts on related itemsets.",
    ]
    return lines, {"scenarios": summary, "other_alerts": other, "exposure": exposure}


def _crossing(got: list[dict[str, Any]]) -> str:
    vals = [
        (g["crossing_seq"] - g["change_seq"]) / DELAY_PANE
        for g in got
        if g.get("crossing_seq") is not None
    ]
    if not vals:
        return "n/a"
    return f"{statistics.median(vals):g} (median; {min(vals):g}-{max(vals):g})"


# ---------------------------------------------------------------------------------------------
# retail


def retail_cases(args: argparse.Namespace) -> list[dict[str, Any]]:
    return [
        {
            "kind": "retail",
            "window": RETAIL_WINDOW,
            "pane": RETAIL_PANE,
            "k": args.k,
            "epsilon": args.epsilon,
            "min_support": args.min_support,
            "budget": DEFAULT_BUDGET,
            "top": args.top,
        }
    ]


def _measure(m: dict[str, Any] | None, digits: int = 4) -> str:
    if not m or m.get("value") is None:
        return "-"
    lo = "-" if m.get("low") is None else f"{m['low']:.{digits}f}"
    hi = "-" if m.get("high") is None else f"{m['high']:.{digits}f}"
    return f"{m['value']:.{digits}f} [{lo}, {hi}]"


def retail_md(
    args: argparse.Namespace, results: list[dict[str, Any]]
) -> tuple[list[str], dict[str, Any]]:
    r = results[0]
    closes = r["per_close"]
    kinds = ("emerged", "surged", "faded")
    per = {k: [c["by_kind"].get(k, 0) for c in closes] for k in kinds}
    totals = {k: sum(v) for k, v in per.items()}
    n = len(closes)
    busy = [c for c in closes if c["by_kind"]]
    header = [
        "#",
        "kind",
        "seq",
        "itemset (rule)",
        "reference rate [95 %]",
        "recent rate [95 %] (orders)",
        "S / h",
        "change seq",
        "exact before (20,000 orders) / since the change",
        "support, confidence, lift",
    ]
    rows = []
    for i, a in enumerate(r["top"], 1):
        ev, ex = a["evidence"], a["exact"]
        rule = " ".join(a["items"])
        if a["antecedent"]:
            rule += f" ({' '.join(a['antecedent'])} => {' '.join(a['consequent'])})"
        kind = a["kind"] + (f" +{'+'.join(a['also'])}" if a["also"] else "")
        before = (
            ex["reference_count"] / ex["reference_transactions"]
            if ex["reference_transactions"]
            else math.nan
        )
        since = ex["recent_count"] / ex["recent_transactions"]
        measures = _measure(a["support"])
        if a["confidence"]:
            measures += f"; {_measure(a['confidence'], 2)}; {_measure(a['lift'], 1)}"
        rows.append(
            [
                i,
                kind,
                f"{a['seq']:,}",
                rule,
                _measure(ev["reference_rate"]),
                f"{_measure(ev['recent_rate'])} ({ev['recent_transactions']:,})",
                f"{ev['statistic']:.1f} / {ev['threshold']:.1f}",
                f"{ev['change_seq']:,}" if ev["change_seq"] is not None else "-",
                f"{before:.4f} ({ex['reference_count']}) / {since:.4f} ({ex['recent_count']} "
                f"of {ex['recent_transactions']:,})",
                measures,
            ]
        )
    everyone = r["all"]
    moved = sum(1 for a in everyone if a["exact"]["moved_1_5x"])
    signif = sum(1 for a in everyone if a["exact"]["p_value"] < 1e-3)
    agree = sum(1 for a in everyone if a["exact"]["moved_1_5x"] and a["exact"]["p_value"] < 1e-3)
    fresh = sum(1 for a in everyone if a["exact"]["new_item"])
    by_kind_agree = {
        k: f"{sum(1 for a in everyone if a['kind'] == k and a['exact']['moved_1_5x'])}"
        f"/{sum(1 for a in everyone if a['kind'] == k)}"
        for k in kinds
    }
    itemsets = len({tuple(a["items"]) for a in everyone})
    lines = [
        "### The open retail dataset, one pass",
        "",
        f"retail.dat.gz in file order (88,162 receipts), window {RETAIL_WINDOW:,} / panes "
        f"{RETAIL_PANE:,}, K = {args.k}, epsilon {args.epsilon:g}, min_support "
        f"{args.min_support:g}, default budget (1 per million). {n} pane closes after warm-up, "
        f"{r['alerts']} alerts: emerged {totals['emerged']}, surged {totals['surged']}, faded "
        f"{totals['faded']} ({r['alerts'] / max(n, 1):.2f} per pane close; at most "
        f"{max((sum(c['by_kind'].values()) for c in closes), default=0)} at one close; "
        f"{len(busy)} closes with any). Tests per close: median "
        f"{(r['tests'] or {}).get('median', 0):,.0f}, h median "
        f"{(r['threshold'] or {}).get('median', math.nan):.2f}.",
        "",
        "Alerts per pane close (seq: emerged/surged/faded), closes with alerts only: "
        + (
            "; ".join(
                f"{c['seq']:,}: {'/'.join(str(c['by_kind'].get(k, 0)) for k in kinds)}"
                for c in busy
            )
            or "none"
        ),
        "",
        f"Exact recount of every alert ({r['alerts']} alerts on {itemsets} distinct itemsets): "
        f"{moved} moved at least 1.5x in the alerted direction between the {RETAIL_WINDOW:,} "
        "orders before the estimated change and the orders from the change to the alert "
        f"(by kind, emerged/surged/faded: {by_kind_agree['emerged']}, "
        f"{by_kind_agree['surged']}, {by_kind_agree['faded']}); {signif} are significant at "
        "p < 0.001 (exact binomial test of the count since the change against the rate "
        f"before); {agree} both. {fresh} involve an item first sold less than "
        f"{RETAIL_WINDOW:,} orders before the change (a product new to the shop: the file "
        "numbers items by first sale, and new products keep arriving).",
        "",
        f"The {len(rows)} strongest alerts (statistic / threshold), with the evidence they "
        "carry and an exact recount of the itemset in the file: the 20,000 orders before the "
        "estimated change, and from the change to the alert. The reference rate is the test's "
        "decayed history (about 50 panes), so it may differ from the 20,000 orders before.",
        "",
        *md_table(header, rows),
    ]
    summary = {"totals": totals, "closes": n, "alerts": r["alerts"], "itemsets": itemsets}
    summary |= {"moved_1_5x": moved, "significant": signif, "agree": agree, "new_item": fresh}
    return lines, summary


# ---------------------------------------------------------------------------------------------
# cost


def cost_case(args: argparse.Namespace, report: tuple[str, ...]) -> dict[str, Any]:
    return {
        "kind": "cost",
        "report": list(report),
        "window": COST_WINDOW,
        "pane": COST_PANE,
        "k": 3,
        "epsilon": 0.001,
        "min_support": args.cost_min_support,
        "repeat": args.cost_repeat,
        "size": args.cost_size,
    }


def cost_md(
    args: argparse.Namespace, results: list[dict[str, Any]]
) -> tuple[list[str], dict[str, Any]]:
    by: dict[str, list[float]] = {}
    tps: dict[str, list[float]] = {}
    for r in results:
        key = ",".join(r["case"]["report"])
        by.setdefault(key, []).extend(r["seconds"])
        tps.setdefault(key, []).extend(r["tps"])
    base, full = (",".join(x) for x in COST_REPORTS)
    med = {k: statistics.median(v) for k, v in by.items()}
    pct = 100.0 * (med[full] / med[base] - 1.0)
    ok = pct <= TARGET_COST_PCT
    rows = [
        [
            k,
            len(v),
            f"{statistics.median(v):.3f} [{min(v):.3f}..{max(v):.3f}]",
            f"{statistics.median(tps[k]):,.0f}",
        ]
        for k, v in by.items()
    ]
    size = f" (first {args.cost_size:,})" if args.cost_size else ""
    lines = [
        "### Cost of detection per pane close (a timing)",
        "",
        f"replay_file of T10I4D100K{size}, K = 3, epsilon 0.001, window {COST_WINDOW:,} / "
        f"panes {COST_PANE:,}, min_support {args.cost_min_support:g}; each run a fresh process "
        f"(one untimed warm-up, then {args.cost_repeat} timed), the two reports interleaved "
        f"over {args.cost_runs} rounds.",
        "",
        *md_table(["report", "runs", "seconds median [min..max]", "tx/s (median)"], rows),
        "",
        f"detection cost {pct:+.1f} % end to end (target <= {TARGET_COST_PCT:.0f} %): "
        f"{'PASS' if ok else 'MISS'}",
    ]
    return lines, {"cost_pct": pct, "pass": ok, "median_seconds": med}
