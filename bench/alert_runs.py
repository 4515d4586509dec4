"""The child side of ``bench_alerts.py``: one case, run in a fresh process, one JSON result.

Cases (``case["kind"]``):

``stationary``
    A stationary feed (:mod:`alert_feeds`) through a :class:`~streamcount.pipeline.Pipeline`
    with rules and alerts, one pane per ``add``; every alert is counted (warm-up sends none,
    so all of them come after it, and on a feed with no change all of them are false). The
    exposure is the transactions of the pane closes evaluated warm: the budget is charged
    per warm pane close, ``B n / 10^6`` expected false alerts for a pane of ``n``.
``delays``
    Planted changes against the exact oracle (:class:`alert_feeds.Oracle`), one seed after
    another in this process.
``retail``
    One pass over the open retail dataset in file order, with an exact recount of every
    alert's itemset before and since its estimated change (:mod:`alert_recount`).
``cost``
    A timing: ``replay_file`` of T10I4D100K with one report, one untimed warm-up run, then
    ``repeat`` timed runs.
"""

from __future__ import annotations

import gc
import statistics
import time
from collections import Counter
from typing import Any

import alert_feeds as feeds
import machine
from alert_recount import Recount

__all__ = ["config", "run_case"]


def config(
    window: int,
    pane: int,
    *,
    k: int = 3,
    epsilon: float = 0.001,
    min_support: float = 0.01,
    budget: float = 1.0,
) -> Any:
    """Count-based window of ``window`` in panes (and batches) of ``pane``; rules and alerts at
    their defaults but for ``min_support`` and the false-alert budget."""
    from streamcount.config.settings import AlertsConfig, Config, EngineConfig, RulesConfig

    return Config(
        engine=EngineConfig(
            epsilon=epsilon,
            max_itemset_size=k,
            window_size=window,
            pane_size=pane,
            batch_size=pane,
        ),
        rules=RulesConfig(min_support=min_support),
        alerts=AlertsConfig(false_alerts_per_million=budget),
    )


def _kinds(alert: dict[str, Any]) -> set[str]:
    """The kinds one notification stands for (its kind and the ones folded into it)."""
    return {str(alert["kind"]), *alert.get("also", ())}


def _brief(alert: dict[str, Any]) -> dict[str, Any]:
    ev = alert["evidence"]
    return {
        "kind": alert["kind"],
        "also": list(alert.get("also", ())),
        "seq": alert["seq"],
        "pane": alert["pane"],
        "items": list(alert["items"]),
        "antecedent": alert["antecedent"],
        "consequent": alert["consequent"],
        "support": alert["measures"]["support"],
        "confidence": alert["measures"].get("confidence"),
        "lift": alert["measures"].get("lift"),
        "evidence": ev,
        "strength": _strength(alert),
    }


def _strength(alert: dict[str, Any]) -> float:
    """Statistic over threshold: how far past its threshold the test was."""
    ev = alert["evidence"]
    return float(ev["statistic"] / ev["threshold"]) if ev["threshold"] else float("inf")


def _spread(values: list[float]) -> dict[str, float] | None:
    if not values:
        return None
    return {"median": statistics.median(values), "min": min(values), "max": max(values)}


#: bins of warm pane closes since warm-up (the reference holds about 50 panes)
_AGES = ((0, 10), (10, 50), (50, 200), (200, 10**9))


class _Run:
    """A pipeline fed one pane per ``add``, recording each close's budget and warm state."""

    def __init__(self, cfg: Any) -> None:
        from streamcount.pipeline import Pipeline

        self.pipeline = Pipeline(cfg)
        self.alerts: list[dict[str, Any]] = []
        self.pipeline.on_alerts(self.alerts.extend)
        self.closes = 0
        self.warm_closes = 0
        self.exposure = 0
        self.tests: list[int] = []
        self.thresholds: list[float] = []
        #: per alert, the warm pane close (0: the close that filled the first window) it came at
        self.alert_close: list[int] = []

    def pane(self, baskets: list[list[str]]) -> bool:
        """Feed one pane; True when it closed a pane evaluated warm."""
        from streamcount.intake.records import Decoded

        intake = self.pipeline.add(Decoded(baskets))
        if intake.panes_closed == 0:
            return False
        assert intake.panes_closed == 1, "one pane per add"
        self.closes += 1
        if not self.pipeline.engine.window_full:
            return False
        budget = self.pipeline.monitor.budget
        self.alert_close += [self.warm_closes] * (len(self.alerts) - len(self.alert_close))
        self.warm_closes += 1
        self.exposure += len(baskets)
        self.tests.append(int(budget.tests))
        self.thresholds.append(float(budget.threshold))
        return True

    def by_age(self, pane: int) -> list[dict[str, int]]:
        """Alerts and exposure by warm pane closes since warm-up: does the rate settle?"""
        out = []
        for lo, hi in _AGES:
            closes = max(0, min(hi, self.warm_closes) - lo)
            if closes:
                n = sum(1 for c in self.alert_close if lo <= c < hi)
                out.append({"from": lo, "to": hi, "alerts": n, "exposure": closes * pane})
        return out

    def summary(self) -> dict[str, Any]:
        return {
            "pane_closes": self.closes,
            "warm_closes": self.warm_closes,
            "exposure": self.exposure,
            "tests": _spread([float(t) for t in self.tests]),
            "threshold": _spread([t for t in self.thresholds if t == t and t != float("inf")]),
        }


# ---------------------------------------------------------------------------------------------


def _stationary(case: dict[str, Any]) -> dict[str, Any]:
    window, pane = int(case["window"]), int(case["pane"])
    cfg = config(
        window,
        pane,
        k=int(case["k"]),
        epsilon=float(case["epsilon"]),
        min_support=float(case["min_support"]),
        budget=float(case["budget"]),
    )
    after = -(-int(case["after"]) // pane) * pane  # whole panes
    total = window + after
    run = _Run(cfg)
    start = time.perf_counter()
    for chunk in feeds.panes(feeds.stationary(case["feed"], int(case["seed"])), pane, total):
        run.pane(chunk)
    seconds = time.perf_counter() - start
    alerts = run.alerts
    strongest = sorted(alerts, key=lambda a: -_strength(a))
    return {
        "transactions": total,
        "seconds": seconds,
        **run.summary(),
        "alerts": len(alerts),
        "by_kind": dict(Counter(str(a["kind"]) for a in alerts)),
        "by_size": dict(Counter(str(len(a["items"])) for a in alerts)),
        "by_direction": dict(Counter(str(a["evidence"]["direction"]) for a in alerts)),
        "folded": sum(1 for a in alerts if a.get("also")),
        "by_age": run.by_age(pane),
        "strongest": [_brief(a) for a in strongest[:3]],
        "active_rules_at_end": len(run.pipeline.monitor.active_rules),
        "candidates_at_end": run.pipeline.monitor.tracker.candidates(),
    }


def _one_delay(case: dict[str, Any], seed: int) -> dict[str, Any]:
    scenario = case["scenario"]
    window, pane = int(case["window"]), int(case["pane"])
    at = int(case["at_pane"]) * pane
    total = at + int(case["horizon"]) * pane
    min_support = float(case["min_support"])
    source, pair, chosen = feeds.planted(
        scenario, seed, before=float(case["before"]), after=float(case["after"]), at=at
    )
    cfg = config(window, pane, min_support=min_support, budget=float(case["budget"]))
    run = _Run(cfg)
    oracle = feeds.Oracle(pair, window // pane)
    active_before = None
    for chunk in feeds.panes(source, pane, total):
        run.pane(chunk)
        seq, _, _ = oracle.pane(chunk)
        if seq == at:
            active_before = any(
                set(r.items) == set(pair) for r in run.pipeline.monitor.active_rules
            )
    target = set(pair)
    mine = [a for a in run.alerts if set(a["items"]) == target]
    related = [a for a in run.alerts if set(a["items"]) != target and target & set(a["items"])]
    other = [a for a in run.alerts if not target & set(a["items"])]

    def first(kinds: set[str], after_seq: int) -> dict[str, Any] | None:
        for a in mine:
            if a["seq"] > after_seq and _kinds(a) & kinds:
                return a
        return None

    out: dict[str, Any] = {
        "seed": seed,
        "pair": list(pair),
        "chosen": chosen,
        "change_seq": at,
        "transactions": total,
        **run.summary(),
        "pair_alerts": [
            {"kind": a["kind"], "also": list(a.get("also", ())), "seq": a["seq"]} for a in mine
        ],
        "related_alerts": len(related),
        "other_alerts": len(other),
        "other_by_kind": dict(Counter(str(a["kind"]) for a in other)),
        "other_examples": [_brief(a) for a in other[:3]],
        "exact_support_at_change": oracle.support_at(at) if at else 0.0,
    }
    if scenario == "new":
        crossing = oracle.first_crossing(min_support, after_seq=at)
        emerged = first({"emerged"}, at)
        up = first({"emerged", "surged"}, at)
        out["crossing_seq"] = crossing
        out["delay"] = None
        if emerged is not None and crossing is not None:
            out["delay"] = (emerged["seq"] - crossing) / pane
        out["first_up_after_crossing"] = (
            None if up is None or crossing is None else (up["seq"] - crossing) / pane
        )
        out["first_up_after_start"] = None if up is None else (up["seq"] - at) / pane
        out["false_pair_alerts"] = sum(1 for a in mine if a["seq"] <= at)
        hit = emerged
    else:
        kinds = {"emerged", "surged"} if scenario == "rise" else {"faded"}
        hit = first(kinds, at)
        out["delay"] = None if hit is None else (hit["seq"] - at) / pane
        out["false_pair_alerts"] = sum(1 for a in mine if a["seq"] <= at)
        out["active_rule_before_change"] = active_before
    out["alert_seq"] = None if hit is None else hit["seq"]
    out["exact_support_at_alert"] = None if hit is None else oracle.support_at(hit["seq"])
    out["evidence"] = None if hit is None else hit["evidence"]
    return out


def _delays(case: dict[str, Any]) -> dict[str, Any]:
    start = time.perf_counter()
    runs = [_one_delay(case, int(seed)) for seed in case["seeds"]]
    return {"runs": runs, "seconds": time.perf_counter() - start}


def _retail(case: dict[str, Any]) -> dict[str, Any]:
    window, pane = int(case["window"]), int(case["pane"])
    cfg = config(
        window,
        pane,
        k=int(case["k"]),
        epsilon=float(case["epsilon"]),
        min_support=float(case["min_support"]),
        budget=float(case["budget"]),
    )
    baskets = feeds.retail_baskets()
    run = _Run(cfg)
    per_close: list[dict[str, Any]] = []
    for i in range(0, len(baskets), pane):
        chunk = baskets[i : i + pane]
        before = len(run.alerts)
        warm = run.pane([list(b) for b in chunk])
        if warm:
            fired = run.alerts[before:]
            per_close.append(
                {
                    "seq": i + len(chunk),
                    "by_kind": dict(Counter(str(a["kind"]) for a in fired)),
                    "tests": run.tests[-1],
                    "threshold": run.thresholds[-1],
                }
            )
    recount = Recount(baskets)
    checked = [recount.check(a, window, pane) for a in run.alerts]  # in alert order
    order = sorted(range(len(run.alerts)), key=lambda i: -_strength(run.alerts[i]))
    top = []
    for i in order[: int(case["top"])]:
        row = _brief(run.alerts[i])
        row["exact"] = checked[i]
        top.append(row)
    return {
        "transactions": len(baskets),
        **run.summary(),
        "alerts": len(run.alerts),
        "by_kind": dict(Counter(str(a["kind"]) for a in run.alerts)),
        "folded": sum(1 for a in run.alerts if a.get("also")),
        "per_close": per_close,
        "top": top,
        "all": [
            {
                "kind": a["kind"],
                "also": list(a.get("also", ())),
                "seq": a["seq"],
                "items": list(a["items"]),
                "strength": _strength(a),
                "exact": ex,
            }
            for a, ex in zip(run.alerts, checked, strict=True)
        ],
    }


def _cost(case: dict[str, Any]) -> dict[str, Any]:
    from streamcount.replay import replay_decoded, replay_file

    path = str(machine.data_path("T10I4D100K.dat.gz"))
    cfg = config(
        int(case["window"]),
        int(case["pane"]),
        k=int(case["k"]),
        epsilon=float(case["epsilon"]),
        min_support=float(case["min_support"]),
    )
    report = tuple(case["report"])
    size = case.get("size")
    parts = None
    if size:
        from streamcount.intake.records import Decoded

        head = _t10()[: int(size)]
        parts = [Decoded(head[i : i + 8192]) for i in range(0, len(head), 8192)]

    def once() -> tuple[float, Any]:
        t0 = time.perf_counter()
        if parts is None:
            res = replay_file(path, cfg, report=report, progress=None)
        else:
            res = replay_decoded(parts, cfg, report=report, progress=None)
        return time.perf_counter() - t0, res

    once()
    gc.collect()
    seconds, res = [], None
    for _ in range(int(case["repeat"])):
        s, res = once()
        seconds.append(s)
        gc.collect()
    assert res is not None
    n = res.report["input"]["transactions"]
    return {
        "transactions": n,
        "seconds": seconds,
        "tps": [n / s for s in seconds],
        "rules": len(res.report.get("rules", [])),
        "alerts": len(res.report.get("alerts", [])),
    }


def _t10() -> list[list[str]]:
    import gzip

    with gzip.open(machine.data_path("T10I4D100K.dat.gz"), "rt", encoding="ascii") as fh:
        return [list(dict.fromkeys(ln.split())) for ln in fh if ln.strip()]


def run_case(case: dict[str, Any]) -> dict[str, Any]:
    """Run one case (see the module docstring); the result is JSON-able."""
    kind = case["kind"]
    runners = {"stationary": _stationary, "delays": _delays, "retail": _retail, "cost": _cost}
    if kind not in runners:
        raise ValueError(f"unknown case kind {kind!r}")
    out = runners[kind](case)
    out["case"] = case
    out["peak_rss_mb"] = machine.peak_rss_mb()
    return out
