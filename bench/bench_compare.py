"""This checkout against an earlier revision, interleaved in one run (regressions).

Run from the repository root::

    python3 bench/bench_compare.py                     # against the round-1 main, 5 runs each
    python3 bench/bench_compare.py --base REV --runs 7 --record

The earlier revision is exported with ``git archive`` into a temporary folder (no worktree, no
install: its package is put first on ``PYTHONPATH``), and both run the same commands in fresh
processes, alternating (base, head, base, head, ...) so that a busy moment of the shared machine
falls on both. Each case is ``streamcount replay`` of an open dataset with the report of
itemsets; one warm-up run of each is not timed. A case **regresses** when this checkout's median
is more than 5 % slower than the base's AND outside the base's min-max range (the rule of the
issue "The house in order").

The two revisions do not do exactly the same work at the end of a file: since this round the
last partial batch is reported as an exact overlay instead of being counted into the summaries;
the difference is at most one batch of one pane.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import machine  # bench/ is not a package: the scripts import their neighbour by path

#: the main branch as round 1 left it (the last commit before this round's restructuring)
DEFAULT_BASE = "a0ddbed"
CASES: tuple[dict[str, Any], ...] = (
    {"name": "T10I4D100K K=2", "data": "T10I4D100K.dat.gz", "k": 2},
    {"name": "T10I4D100K K=3", "data": "T10I4D100K.dat.gz", "k": 3},
    {"name": "retail K=2", "data": "retail.dat.gz", "k": 2},
)
SLOWER = 0.05


def export(rev: str, into: Path) -> Path:
    """``git archive REV`` unpacked into ``into``; returns the folder holding the package."""
    archive = subprocess.run(
        ["git", "archive", "--format=tar", rev],
        cwd=machine.REPO_DIR,
        capture_output=True,
        check=True,
    )
    subprocess.run(["tar", "-x", "-C", str(into)], input=archive.stdout, check=True)
    return into


def replay_seconds(package_root: Path, case: dict[str, Any]) -> float:
    """Wall time of one ``streamcount replay`` in a fresh interpreter."""
    env = dict(os.environ, PYTHONPATH=str(package_root))
    cmd = [
        sys.executable, "-m", "streamcount", "replay", str(machine.data_path(case["data"])),
        "--format", "basket", "--epsilon", "0.001", "--window-size", "50000",
        "--pane-size", "5000", "--batch-size", "5000", "--max-itemset-size", str(case["k"]),
        "--min-support", "0.01", "--output", os.devnull,
    ]  # fmt: skip
    start = time.perf_counter()
    subprocess.run(cmd, env=env, check=True, capture_output=True, cwd=str(package_root))
    return time.perf_counter() - start


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", default=DEFAULT_BASE, help="the earlier revision")
    parser.add_argument("--runs", type=int, default=5, help="timed runs of each revision")
    parser.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    args = parser.parse_args(argv)
    info_start = machine.machine_info()
    rows = []
    with tempfile.TemporaryDirectory(prefix="streamcount-base-") as tmp:
        base_root = export(args.base, Path(tmp))
        head_root = machine.REPO_DIR
        for case in CASES:
            for root in (base_root, head_root):
                replay_seconds(root, case)  # warm-up: page cache, bytecode
            times: dict[str, list[float]] = {"base": [], "head": []}
            for _ in range(args.runs):
                times["base"].append(replay_seconds(base_root, case))
                times["head"].append(replay_seconds(head_root, case))
            base, head = machine.spread(times["base"]), machine.spread(times["head"])
            regressed = (
                head["median"] > base["median"] * (1 + SLOWER) and head["median"] > base["max"]
            )
            rows.append({"case": case["name"], "base": base, "head": head,
                         "runs": times, "regressed": regressed})  # fmt: skip
            print(
                f"{case['name']:<16} base {base['median']:6.2f} s [{base['min']:.2f}-"
                f"{base['max']:.2f}]  head {head['median']:6.2f} s [{head['min']:.2f}-"
                f"{head['max']:.2f}]  head/base {head['median'] / base['median']:.3f}  "
                f"{'REGRESSION' if regressed else 'ok'}",
                flush=True,
            )
    if args.record:
        info = dict(info_start)
        info["load_average_at_end"] = machine.load_average()
        lines = [
            f"This checkout against `{args.base}` (round 1's main), {args.runs} interleaved "
            "runs each after one warm-up; `streamcount replay` of each dataset, epsilon 0.001, "
            "window 50,000 in panes of 5,000, itemsets report. Regression: median more than "
            "5 % slower and outside the base's min-max.",
            "",
            "| case | base median [min-max] s | head median [min-max] s | head/base | verdict |",
            "|---|---|---|---|---|",
        ]
        for r in rows:
            b, h = r["base"], r["head"]
            lines.append(
                f"| {r['case']} | {b['median']:.2f} [{b['min']:.2f}-{b['max']:.2f}] | "
                f"{h['median']:.2f} [{h['min']:.2f}-{h['max']:.2f}] | "
                f"{h['median'] / b['median']:.3f} | "
                f"{'regression' if r['regressed'] else 'no regression'} |"
            )
        machine.record(
            "compare",
            f"regression check against {args.base}",
            "\n".join(lines),
            {"machine": info, "base": args.base, "rows": rows},
        )
    return 1 if any(r["regressed"] for r in rows) else 0


if __name__ == "__main__":
    sys.exit(main())
