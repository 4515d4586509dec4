"""`streamcount replay`: the report contract, exit codes and formats, through the real CLI.

The exact reference is a brute-force recount (collections.Counter over itertools.combinations,
tests/oracle-style) of exactly the window's transactions.
"""

from __future__ import annotations

import gzip
import itertools
import json
import random
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "streamcount", *args],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


def _baskets(n: int, seed: int = 3) -> list[list[str]]:
    rng = random.Random(seed)
    names = [f"p{i}" for i in range(25)]
    return [rng.sample(names, rng.randint(1, 6)) for _ in range(n)]


def _exact(baskets: list[list[str]], k: int) -> Counter[tuple[str, ...]]:
    out: Counter[tuple[str, ...]] = Counter()
    for b in baskets:
        items = sorted(set(b))
        for size in range(1, k + 1):
            out.update(itertools.combinations(items, size))
    return out


def test_report_contract_and_window_bounds(tmp_path: Path) -> None:
    baskets = _baskets(2300)
    path = tmp_path / "feed.txt"
    # commas and whitespace both separate items; blank lines are not transactions
    lines = [", ".join(b) if i % 3 else " ".join(b) for i, b in enumerate(baskets)]
    lines.insert(10, "")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    proc = _cli(
        "replay", str(path), "--format", "basket", "--epsilon", "0.01", "--window-size", "1000",
        "--pane-size", "200", "--max-itemset-size", "3", "--min-support", "0.05",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    window = report["window"]
    assert set(window) == {
        "first_seq", "last_seq", "transactions", "max_error", "epsilon", "pane_size"
    }  # fmt: skip
    # 2300 transactions in panes of 200: the last pane holds 100, the window the last 5 panes
    assert (window["first_seq"], window["last_seq"]) == (1401, 2300)
    assert window["transactions"] == 900
    assert window["epsilon"] == 0.01 and window["pane_size"] == 200
    # w = 100: panes of 200 -> 2 each; the partial pane's 100 transactions are a partial batch,
    # reported as an exact overlay (not counted into the summary), so they add no undercount
    assert window["max_error"] == 4 * 2
    exact = _exact(baskets[1400:2300], 3)
    n, err = window["transactions"], window["max_error"]
    reported = set()
    for entry in report["itemsets"]:
        items = tuple(entry["items"])
        assert list(items) == sorted(items)
        true = exact[items]
        assert entry["count"] <= true <= entry["upper"]
        assert entry["upper"] - entry["count"] <= err
        assert true >= 0.05 * n - err
        assert entry["support"] == pytest.approx(entry["count"] / n)
        reported.add(items)
    missed = [s for s, c in exact.items() if c >= 0.05 * n and s not in reported]
    assert not missed


def test_exact_mode_jsonl_gz_and_output_file(tmp_path: Path) -> None:
    baskets = _baskets(500, seed=9)
    path = tmp_path / "orders.jsonl.gz"
    with gzip.open(path, "wt", encoding="utf-8") as fh:
        for i, b in enumerate(baskets):
            fh.write(json.dumps({"order": {"no": i}, "when": 1000 + i, "lines": b}) + "\n")
    out = tmp_path / "report.json"
    proc = _cli(
        "replay", str(path), "--format", "jsonl", "--epsilon", "0", "--window-size", "1000",
        "--pane-size", "1000", "--max-itemset-size", "2", "--min-support", "0.1",
        "--id-field", "order.no", "--ts-field", "when", "--items-field", "lines",
        "--output", str(out),
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout == ""
    report = json.loads(out.read_text(encoding="utf-8"))
    exact = _exact(baskets, 2)
    got = {tuple(e["items"]): (e["count"], e["upper"]) for e in report["itemsets"]}
    want = {s: (c, c) for s, c in exact.items() if c >= 0.1 * 500}
    assert got == want
    assert report["window"]["max_error"] == 0


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["replay", "/no/such/file"], "/no/such/file"),
        (["replay", "{feed}", "--epsilon", "1.5"], "engine.epsilon"),
        (["replay", "{feed}", "--format", "xml"], "input.format"),
        (["replay", "{feed}", "--window-size", "1000", "--pane-size", "300"], "pane_size"),
        (["replay", "{feed}", "--report", "itemsets,charts"], "--report"),
        (["replay", "{feed}", "--epsilon", "abc"], "epsilon"),
    ],
)
def test_usage_and_input_errors_exit_2_with_one_line(
    tmp_path: Path, args: list[str], needle: str
) -> None:
    feed = tmp_path / "feed.txt"
    feed.write_text("a b\nb c\n", encoding="utf-8")
    proc = _cli(*[a.replace("{feed}", str(feed)) for a in args])
    assert proc.returncode == 2
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert lines and needle in lines[-1]
    assert "Traceback" not in proc.stderr


def test_report_rules_and_alerts_parts(tmp_path: Path) -> None:
    # a pair planted from transaction 3000 on: the replay's alerts must name it
    rng = random.Random(5)
    names = [f"p{i}" for i in range(40)]
    lines = []
    for i in range(6000):
        b = rng.sample(names, rng.randint(1, 4))
        if i >= 3000 and rng.random() < 0.3:
            b += ["tea-tin", "honey-jar"]
        lines.append(" ".join(b))
    path = tmp_path / "feed.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    proc = _cli(
        "replay", str(path), "--epsilon", "0.005", "--window-size", "2000", "--pane-size",
        "200", "--min-support", "0.05", "--min-confidence", "0.5", "--min-lift", "2",
        "--report", "itemsets,rules,alerts",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    report = json.loads(proc.stdout)
    assert {"window", "itemsets", "rules", "alerts"} <= set(report)
    planted = {"tea-tin", "honey-jar"}
    emerged = [a for a in report["alerts"] if a["kind"] == "emerged" and set(a["items"]) == planted]
    assert emerged and all(a["seq"] > 3000 for a in emerged)
    assert any(set(r["antecedent"]) | set(r["consequent"]) == planted for r in report["rules"])
