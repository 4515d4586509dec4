"""The feed parts of ``bench_alerts.py`` (calibration, delays): cases and figures as Markdown.

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
    "DELAY_SCENARIOS",
    "calibration_cases",
    "calibration_md",
    "compact",
    "delay_cases",
    "delays_md",
    "label",
    "settings",
    "work",
]

DEFAULT_BUDGET = 1.0
DELAY_WINDOW, DELAY_PANE = 10_000, 1_000
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


_RUN_COLUMNS = (
    "seed",
    "pair",
    "delay",
    "alert_seq",
    "change_seq",
    "crossing_seq",
    "first_up_after_crossing",
    "first_up_after_start",
    "false_pair_alerts",
    "related_alerts",
    "other_alerts",
    "exposure",
    "exact_support_at_change",
    "exact_support_at_alert",
    "active_rule_before_change",
)


def _cell(value: Any) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    if isinstance(value, list):
        return " ".join(str(v) for v in value)
    return str(value)


def compact(part: str, results: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Results slimmed for the recorded JSON: examples and per-seed runs as tab-separated
    lines (columns named once), so the file stays small."""
    out = []
    for r in results:
        r = {k: v for k, v in r.items() if k != "cached"}
        if part == "calibration":
            r["strongest"] = [
                f"{a['kind']}\t{a['seq']}\t{' '.join(a['items'])}\t"
                f"{a['evidence']['statistic']:.2f}/{a['evidence']['threshold']:.2f}"
                for a in r["strongest"]
            ]
        elif part == "delays":
            r["runs"] = {
                "columns": " ".join(_RUN_COLUMNS),
                "rows": ["\t".join(_cell(run.get(k)) for k in _RUN_COLUMNS) for run in r["runs"]],
            }
        out.append(r)
    return out


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
    header += ["per M by panes since warm-up (0-9 / 10-49 / 50-199 / 200+)"]
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
        ages = {b["from"]: b for b in r.get("by_age", ())}
        cells.append(
            " / ".join(
                f"{1e6 * ages[k]['alerts'] / ages[k]['exposure']:,.0f}" if k in ages else "-"
                for k in (0, 10, 50, 200)
            )
        )
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
        "the budget is split over at a pane close, 'h' its CUSUM threshold. 'per M by panes "
        "since warm-up' splits the rate by how long after warm-up the alerts came (each "
        "change test's reference holds about 50 panes), to show whether false alerts gather "
        "right after warm-up.",
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
    stationary = [s for group in ("budgets", "default") for s in summary.get(group, [])]
    missed = [s for s in stationary if not s["holds"]]

    def name(s: dict[str, Any]) -> str:
        c = s["case"]
        return f"{c['feed']} {c['window']:,}/{c['pane']:,} at {c['budget']:,g} per M"

    verdict = f"{len(stationary) - len(missed)} of {len(stationary)} cases within the budget"
    if missed:
        verdict += "; MISS: " + "; ".join(
            f"{name(s)} ({s['alerts']} alerts, {s['rate']:.1f} per M)" for s in missed
        )
    raised = [s for s in summary.get("budgets", []) if s["alerts"]]
    if raised:
        worst = max(raised, key=lambda s: s["ratio_upper"])
        verdict += (
            f". Largest observed / budget at a raised budget: {worst['ratio']:.2f} (95 % upper "
            f"{worst['ratio_upper']:.2f}), {name(worst)}"
        )
    lines += ["", f"**Stationary feeds: {verdict}.**"]
    idle = [r["case"] for r in results if r["tests"] and r["tests"]["median"] == 0]
    if idle:
        where = sorted({(c["feed"], c["window"], c["pane"]) for c in idle})
        lines += [
            "",
            "A median of 0 tests (" + ", ".join(f"{f} {w:,}/{p:,}" for f, w, p in where) + ") "
            "means that at most pane closes nothing could alert: no itemset passed the rule "
            "floor or had the surge minimum count (20) in the pane; the threshold then uses "
            "M = 1 and never goes below 1.",
        ]
    bursts = summary.get("bursts", [])
    if bursts:
        at_default = [s for s in bursts if s["budget"] == DEFAULT_BUDGET]
        if at_default:
            lo = min(s["ratio"] for s in at_default)
            hi = max(s["ratio"] for s in at_default)
            spans = []
            for s in at_default:
                c = s["case"]
                same = [
                    t
                    for t in bursts
                    if (t["case"]["window"], t["case"]["pane"])
                    == (
                        c["window"],
                        c["pane"],
                    )
                ]
                top = max(same, key=lambda t: t["budget"])
                grow = top["alerts"] / s["alerts"] if s["alerts"] else float("inf")
                spans.append(
                    f"{c['window']:,}/{c['pane']:,}: {s['alerts']:,} -> {top['alerts']:,}, "
                    f"x{grow:,.1f}"
                )
            lines += [
                "",
                f"**Repeated orders break the guarantee**: at the default budget the "
                f"overdispersed feed raises {lo:,.0f} to {hi:,.0f} times the budget, mostly "
                "surges. Raising the budget from 1 to 10,000 per million (x10,000) multiplies "
                "its alerts far less ("
                + "; ".join(spans)
                + "): bursts move pane counts far past any of these thresholds, and a raised "
                "budget hides that excess by allowing more, not by removing it.",
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
