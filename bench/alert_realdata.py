"""The parts of ``bench_alerts.py`` on the open datasets in file order: the retail pass (counts)
and the cost of detection on T10I4D100K (a timing). Cases and Markdown, as in
:mod:`alert_parts`.
"""

from __future__ import annotations

import argparse
import statistics
from typing import Any

from alert_report import md_table

__all__ = [
    "COST_REPORTS",
    "compact_retail",
    "cost_case",
    "cost_md",
    "retail_cases",
    "retail_md",
]

DEFAULT_BUDGET = 1.0
RETAIL_WINDOW, RETAIL_PANE = 20_000, 2_000
COST_WINDOW, COST_PANE = 50_000, 5_000
COST_REPORTS = (("itemsets",), ("itemsets", "rules", "alerts"))
TARGET_COST_PCT = 15.0
KINDS = ("emerged", "surged", "faded")

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


def _lift(x: float | None) -> str:
    return "-" if x is None else f"{x:.2f}"


def _top_rows(top: list[dict[str, Any]]) -> list[list[Any]]:
    rows = []
    for i, a in enumerate(top, 1):
        ev, ex = a["evidence"], a["exact"]
        rule = " ".join(a["items"])
        if a["antecedent"]:
            rule += f" ({' '.join(a['antecedent'])} => {' '.join(a['consequent'])})"
        kind = a["kind"] + (f" +{'+'.join(a['also'])}" if a["also"] else "")
        n_ref, n_rec = ex["reference_transactions"], ex["recent_transactions"]
        before = f"{ex['reference_count'] / n_ref:.4f}" if n_ref else "-"
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
                f"{before} ({ex['reference_count']} of {n_ref:,}) / "
                f"{ex['recent_count'] / n_rec:.4f} ({ex['recent_count']} of {n_rec:,})",
                f"{_lift(ex['lift_before'])} / {_lift(ex['lift_since'])}",
                measures,
            ]
        )
    return rows


def retail_md(
    args: argparse.Namespace, results: list[dict[str, Any]]
) -> tuple[list[str], dict[str, Any]]:
    r = results[0]
    closes = r["per_close"]
    totals = {k: sum(c["by_kind"].get(k, 0) for c in closes) for k in KINDS}
    n = len(closes)
    busy = [c for c in closes if c["by_kind"]]
    everyone = r["all"]
    ex = [a["exact"] for a in everyone]
    moved = sum(1 for e in ex if e["moved_1_5x"])
    signif = sum(1 for e in ex if e["p_value"] < 1e-3)
    agree = sum(1 for e in ex if e["moved_1_5x"] and e["p_value"] < 1e-3)
    fresh = sum(1 for e in ex if e["new_item"])
    per_kind = {
        k: (
            sum(1 for a in everyone if a["kind"] == k and a["exact"]["moved_1_5x"]),
            sum(1 for a in everyone if a["kind"] == k),
        )
        for k in KINDS
    }
    surges = [a["exact"] for a in everyone if a["kind"] == "surged"]
    flat = sum(1 for e in surges if e["lift_since"] is not None and e["lift_since"] < 1.5)
    flat12 = sum(1 for e in surges if e["lift_since"] is not None and e["lift_since"] < 1.2)
    lifts = [e["lift_since"] for e in surges if e["lift_since"] is not None]
    items: dict[str, int] = {}
    for a in everyone:
        for item in a["items"]:
            items[item] = items.get(item, 0) + 1
    common = sorted(items.items(), key=lambda kv: (-kv[1], kv[0]))[:5]
    itemsets = len({tuple(a["items"]) for a in everyone})
    header = [
        "#",
        "kind",
        "seq",
        "itemset (rule)",
        "reference rate [95 %]",
        "recent rate [95 %] (orders)",
        "S / h",
        "change seq",
        "exact rate before / since the change",
        "exact lift before / since",
        "support, confidence, lift (window)",
    ]
    lines = [
        "### The open retail dataset, one pass",
        "",
        f"retail.dat.gz in file order (88,162 receipts), window {RETAIL_WINDOW:,} / panes "
        f"{RETAIL_PANE:,}, K = {args.k}, epsilon {args.epsilon:g}, min_support "
        f"{args.min_support:g}, default budget (1 per million). {n} pane closes after warm-up, "
        f"{r['alerts']} alerts: emerged {totals['emerged']}, surged {totals['surged']}, faded "
        f"{totals['faded']} ({r['alerts'] / max(n, 1):.1f} per pane close; at most "
        f"{max((sum(c['by_kind'].values()) for c in closes), default=0)} at one close; "
        f"{len(busy)} of {n} closes with any), on {itemsets} distinct itemsets. Tests per "
        f"close: median {(r['tests'] or {}).get('median', 0):,.0f}, h median "
        f"{(r['threshold'] or {}).get('median', float('nan')):.2f}.",
        "",
        "Alerts per pane close (seq: emerged/surged/faded), closes with alerts only: "
        + (
            "; ".join(
                f"{c['seq']:,}: {'/'.join(str(c['by_kind'].get(k, 0)) for k in KINDS)}"
                for c in busy
            )
            or "none"
        ),
        "",
        "**Are they real?** Every alert is recounted exactly in the file "
        "(`bench/alert_recount.py`): its itemset's rate *before* the estimated change (from the "
        "itemset's previous alert, where its test restarted, or at most "
        f"{RETAIL_WINDOW:,} orders back) against its rate *since* the change. "
        f"{moved} of {r['alerts']} moved at least 1.5x in the alerted direction (emerged "
        f"{per_kind['emerged'][0]}/{per_kind['emerged'][1]}, surged "
        f"{per_kind['surged'][0]}/{per_kind['surged'][1]}, faded "
        f"{per_kind['faded'][0]}/{per_kind['faded'][1]}); {signif} are significant at "
        "p < 0.001 (exact binomial test of the count since the change against the rate "
        f"before); {agree} both. {fresh} involve an item first sold less than "
        f"{RETAIL_WINDOW:,} orders before the change (the file numbers items by first sale; new "
        "products keep arriving). The changes are real; whether they are *co-purchase* "
        f"changes is another matter: of the {len(surges)} surges, {flat} have an exact lift "
        f"below 1.5 since the change ({flat12} below 1.2; median "
        f"{statistics.median(lifts) if lifts else float('nan'):.2f}): their joint rate rose "
        "because one item's own rate rose, with the items bought together about as often as "
        "chance would have it. The items in most alerts: "
        + ", ".join(f"{k} ({v})" for k, v in common)
        + " (the shop's best sellers, paired with each newly popular product).",
        "",
        f"The {len(r['top'])} strongest alerts (statistic / threshold), with the evidence they "
        "carry and the exact recount. The reference rate is the test's own (decayed, about 50 "
        "panes; for an itemset first followed recently, its untracked upper bound), so it may "
        "differ from the exact rate before.",
        "",
        *md_table(header, _top_rows(r["top"])),
    ]
    summary = {"totals": totals, "closes": n, "alerts": r["alerts"], "itemsets": itemsets}
    summary |= {"moved_1_5x": moved, "significant": signif, "agree": agree, "new_item": fresh}
    summary |= {"surges_lift_below_1_5": flat, "surges_lift_below_1_2": flat12}
    return lines, summary


_COLUMNS = "kind also seq items strength moved_1_5x p_value lift_since"


def compact_retail(results: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The results with every alert as one tab-separated line of :data:`_COLUMNS` (items and
    ``also`` space-separated), so the recorded JSON stays small."""
    out = []
    for r in results:
        rows = []
        for a in r["all"]:
            ex = a["exact"]
            lift = "-" if ex["lift_since"] is None else f"{ex['lift_since']:.3f}"
            cells = [a["kind"], " ".join(a["also"]) or "-", str(a["seq"]), " ".join(a["items"])]
            cells += [f"{a['strength']:.3f}", str(ex["moved_1_5x"]), f"{ex['p_value']:.3g}", lift]
            rows.append("\t".join(cells))
        slim = {k: v for k, v in r.items() if k != "cached"}
        out.append({**slim, "all": {"columns": _COLUMNS, "rows": rows}})
    return out


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
        f"over {args.cost_runs} rounds (ABBA order).",
        "",
        *md_table(["report", "runs", "seconds median [min..max]", "tx/s (median)"], rows),
        "",
        f"detection cost {pct:+.1f} % end to end (target <= {TARGET_COST_PCT:.0f} %): "
        f"{'PASS' if ok else 'MISS'}",
    ]
    return lines, {"cost_pct": pct, "pass": ok, "median_seconds": med}
