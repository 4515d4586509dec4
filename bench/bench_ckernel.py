"""The C reference kernel (``bench/ckernel/lossy.c``): build it, run it, check it agrees.

The kernel is a baseline for the benchmarks, never part of the package: plain C11, ``-O2``,
one thread, open-addressing hash tables, the same Lossy Counting with Apriori pruning, the same
epsilon, batch rule and count-based panes as :class:`streamcount.engine.Engine`. Other
benchmark scripts import this module to time it beside streamcount in the same run::

    import bench_ckernel                       # bench/ is not a package: import by path
    rates = bench_ckernel.run(path, k=2, epsilon=0.001, repeat=10)
    rates["count_orders_per_s"]

Run from the repository root::

    python3 bench/bench_ckernel.py                 # agreement check, then the rates
    python3 bench/bench_ckernel.py --check-only    # agreement only (about a minute)
    python3 bench/bench_ckernel.py --runs 1 --repeat 2 --no-check   # a quick look

What is timed (inside the kernel, ``clock_gettime(CLOCK_MONOTONIC)``): **parse-only** reads
the plain-text file and turns it into integer arrays (sorted, de-duplicated ids per line),
``repeat`` times; **count-only** feeds the arrays parsed beforehand ``repeat`` times through
the panes (window, batches, expiry, the final flush); **end-to-end** does both, ``repeat``
times, with a fresh engine. Decompressing the ``.gz`` input is not timed: the plain text is
written once to ``bench/.cache/`` and the kernel reads that (from the page cache).
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import Any

__all__ = [
    "BINARY",
    "CACHE_DIR",
    "CFLAGS",
    "DEFAULT_CASES",
    "DEFAULT_DATA",
    "FLOOR_K2",
    "SOURCE",
    "Case",
    "PaneEntries",
    "build",
    "check_agreement",
    "engine_entries",
    "entries",
    "main",
    "plain_text",
    "read_baskets",
    "run",
    "summary_entries",
]

BENCH_DIR = Path(__file__).resolve().parent
REPO_DIR = BENCH_DIR.parent
SOURCE = BENCH_DIR / "ckernel" / "lossy.c"
CACHE_DIR = BENCH_DIR / ".cache"
BINARY = CACHE_DIR / "lossy"
DEFAULT_DATA = REPO_DIR / "tests" / "data" / "T10I4D100K.dat.gz"
CFLAGS = ("-std=c11", "-O2", "-Wall", "-Wextra", "-pedantic")
#: the sanity floor of the issue: K = 2, T10I4D100K, epsilon 0.001, counting only
FLOOR_K2 = 600_000

#: entries of one pane: size -> {itemset (ascending ids): (f, delta)}
PaneEntries = dict[int, dict[tuple[int, ...], tuple[int, int]]]


# ---------------------------------------------------------------------------------------------
# building and running the kernel


def build(*, force: bool = False, cc: str | None = None) -> Path:
    """Compile the kernel into ``bench/.cache/lossy`` when the source is newer; return its path.

    ``cc`` defaults to ``$CC`` or ``cc``. The binary is written beside its final name and
    renamed, so a concurrent reader never sees half a file.
    """
    if not force and BINARY.exists() and BINARY.stat().st_mtime >= SOURCE.stat().st_mtime:
        return BINARY
    CACHE_DIR.mkdir(parents=True, exist_ok=True)
    compiler = cc or os.environ.get("CC") or "cc"
    fd, tmp = tempfile.mkstemp(dir=CACHE_DIR, prefix="lossy.", suffix=".tmp")
    os.close(fd)
    cmd = [compiler, *CFLAGS, "-o", tmp, str(SOURCE), "-lm"]
    proc = subprocess.run(cmd, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        Path(tmp).unlink(missing_ok=True)
        raise RuntimeError(f"building the C kernel failed: {' '.join(cmd)}\n{proc.stderr}")
    os.replace(tmp, BINARY)
    return BINARY


def plain_text(path: str | Path) -> Path:
    """The plain-text form of ``path``: itself, or for ``.gz`` a copy decompressed once into
    ``bench/.cache/`` (refreshed when the ``.gz`` file is newer)."""
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"{path}: no such data file (give another with --data)")
    if path.suffix != ".gz":
        return path
    out = CACHE_DIR / path.stem
    if out.exists() and out.stat().st_mtime >= path.stat().st_mtime:
        return out
    CACHE_DIR.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=CACHE_DIR, prefix=path.stem + ".", suffix=".tmp")
    with os.fdopen(fd, "wb") as dst, gzip.open(path, "rb") as src:
        shutil.copyfileobj(src, dst, 1 << 20)
    os.replace(tmp, out)
    return out


def _kernel(args: Sequence[str], path: Path) -> str:
    proc = subprocess.run(
        [str(build()), *args, str(path)], capture_output=True, text=True, check=False
    )
    if proc.returncode != 0:
        raise RuntimeError(f"C kernel failed (exit {proc.returncode}): {proc.stderr.strip()}")
    return proc.stdout


def _options(
    mode: str,
    k: int,
    epsilon: float,
    window_size: int,
    pane_size: int,
    batch_size: int,
    repeat: int,
    max_basket_items: int,
    head: int,
) -> list[str]:
    return [
        "-m", mode,
        "-k", str(k),
        "-e", repr(float(epsilon)),
        "-w", str(window_size),
        "-p", str(pane_size),
        "-b", str(batch_size),
        "-r", str(repeat),
        "-x", str(max_basket_items),
        "-n", str(head),
    ]  # fmt: skip


def run(
    path: str | Path = DEFAULT_DATA,
    k: int = 2,
    epsilon: float = 0.001,
    *,
    window_size: int = 50_000,
    pane_size: int = 5_000,
    batch_size: int = 5_000,
    repeat: int = 10,
    max_basket_items: int = 200,
    head: int = 0,
) -> dict[str, Any]:
    """One timed run of the kernel (a fresh process): parse-only, count-only, end-to-end.

    Returns the kernel's JSON (settings, ``*_seconds``, ``*_orders``, tracked entries over the
    live panes after the count-only and the end-to-end runs, which must be equal) plus
    ``parse_orders_per_s``, ``count_orders_per_s`` and ``e2e_orders_per_s``.
    """
    args = _options(
        "time", k, epsilon, window_size, pane_size, batch_size, repeat, max_basket_items, head
    )
    out = json.loads(_kernel(args, plain_text(path)))
    if out["tracked_count"] != out["tracked_e2e"]:
        raise RuntimeError(f"C kernel: count-only and end-to-end disagree: {out}")
    for part in ("parse", "count", "e2e"):
        out[f"{part}_orders_per_s"] = out[f"{part}_orders"] / max(out[f"{part}_seconds"], 1e-9)
    return out


def entries(
    path: str | Path = DEFAULT_DATA,
    k: int = 2,
    epsilon: float = 0.001,
    *,
    window_size: int = 50_000,
    pane_size: int = 5_000,
    batch_size: int = 5_000,
    repeat: int = 1,
    max_basket_items: int = 200,
    head: int = 0,
    pane: int | None = None,
) -> dict[int, tuple[int, PaneEntries]]:
    """The kernel's live panes after the input (and a final flush): ``{pane index: (n,
    entries)}`` with ``entries[size][itemset] = (f, delta)``; ``pane`` picks one pane."""
    args = _options(
        "dump", k, epsilon, window_size, pane_size, batch_size, repeat, max_basket_items, head
    )
    if pane is not None:
        args += ["-P", str(pane)]
    panes: dict[int, tuple[int, PaneEntries]] = {}
    current: PaneEntries = {}
    for line in _kernel(args, plain_text(path)).splitlines():
        parts = line.split()
        if parts[0] == "pane":
            current = {size: {} for size in range(1, k + 1)}
            panes[int(parts[1])] = (int(parts[3]), current)
            continue
        size, f, delta = int(parts[0]), int(parts[1]), int(parts[2])
        current[size][tuple(sorted(int(x) for x in parts[3:]))] = (f, delta)
    return panes


# ---------------------------------------------------------------------------------------------
# the same input through streamcount


def read_baskets(path: str | Path, head: int = 0) -> list[list[str]]:
    """Baskets of ``path`` (gzip or plain) as lists of item tokens, lines without items
    skipped; ``head > 0`` keeps the first ``head``. Read with a plain split, as the kernel
    reads them (whitespace or commas between ids)."""
    path = Path(path)
    opener = gzip.open if path.suffix == ".gz" else open
    with opener(path, "rt", encoding="ascii") as fh:
        rows = (line.replace(",", " ").split() for line in fh)
        nonempty = (r for r in rows if r)
        return list(islice(nonempty, head) if head else nonempty)


def _effective_batch(epsilon: float, batch_size: int) -> int:
    from streamcount.engine.counters import bucket_width

    w = bucket_width(epsilon)
    return max(w, (batch_size // w) * w) if w else batch_size


def engine_entries(
    baskets: Sequence[Sequence[str]],
    k: int,
    epsilon: float,
    *,
    window_size: int,
    pane_size: int,
    batch_size: int,
    max_basket_items: int = 200,
    chunk: int = 997,
) -> dict[int, tuple[int, PaneEntries]]:
    """streamcount's :class:`~streamcount.engine.Engine` on ``baskets`` (fed ``chunk`` at a
    time, then flushed): its panes as :func:`entries` returns the kernel's, item names read
    back as integers."""
    from streamcount.config.settings import EngineConfig
    from streamcount.engine.engine import Engine

    engine = Engine(
        EngineConfig(
            epsilon=epsilon,
            max_itemset_size=k,
            window_size=window_size,
            pane_size=pane_size,
            batch_size=batch_size,
            max_basket_items=max_basket_items,
        )
    )
    for lo in range(0, len(baskets), chunk):
        engine.add(baskets[lo : lo + chunk])
    engine.flush()
    names = [int(x) for x in engine.vocabulary.names]
    return {
        idx: (pane.summary.n, _levels(pane.summary.levels, names))
        for idx, pane in engine.window.panes.items()
    }


def summary_entries(
    baskets: Sequence[Sequence[str]],
    k: int,
    epsilon: float,
    batch_size: int,
    max_basket_items: int = 200,
) -> PaneEntries:
    """One :class:`~streamcount.engine.counters.LossySummary` fed ``baskets`` directly (ids are the
    integers themselves), in batches of ``batch_size`` rounded as the engine rounds it; baskets
    of more than ``max_basket_items`` distinct items are set aside first, as the engine and
    the kernel do."""
    import numpy as np

    from streamcount.engine.counters import LossySummary

    summary = LossySummary(epsilon, k)
    step = _effective_batch(epsilon, batch_size)
    baskets = [b for b in baskets if len(set(b)) <= max_basket_items]
    for lo in range(0, len(baskets), step):
        rows = [sorted({int(x) for x in b}) for b in baskets[lo : lo + step]]
        indptr = np.zeros(len(rows) + 1, dtype=np.int64)
        np.cumsum([len(r) for r in rows], out=indptr[1:])
        flat = np.fromiter((i for r in rows for i in r), dtype=np.int32, count=int(indptr[-1]))
        summary.add_batch(indptr, flat)
    top = max((int(x) for b in baskets for x in b), default=0) + 1
    return _levels(summary.levels, list(range(top)))


def _levels(levels: Iterable[Any], names: Sequence[int]) -> PaneEntries:
    out: PaneEntries = {}
    for size, level in enumerate(levels, start=1):
        rows = level.items.tolist()
        out[size] = {
            tuple(sorted(names[i] for i in row)): (int(f), int(d))
            for row, f, d in zip(rows, level.f.tolist(), level.delta.tolist(), strict=True)
        }
    return out


# ---------------------------------------------------------------------------------------------
# agreement


@dataclass(frozen=True, slots=True)
class Case:
    """One agreement case: ``engine`` compares every live pane of an Engine; ``summary``
    compares one LossySummary fed the whole sample (the kernel then runs one pane of it).
    ``sample`` transactions from the top of the file (0: all of it), fed ``repeat`` times."""

    k: int
    epsilon: float
    pane_size: int
    window_size: int
    batch_size: int
    sample: int = 20_000
    kind: str = "engine"
    repeat: int = 1

    def label(self) -> str:
        return (
            f"{self.kind} K={self.k} eps={self.epsilon:g} pane={self.pane_size} "
            f"window={self.window_size} batch={self.batch_size} "
            f"(effective {_effective_batch(self.epsilon, self.batch_size)}), "
            + (f"first {self.sample:,}" if self.sample else "whole file")
            + (f" x {self.repeat}" if self.repeat > 1 else "")
        )


DEFAULT_CASES: tuple[Case, ...] = (
    # the sample: 20,000 transactions, panes and batches of 5,000
    Case(2, 0.001, 5_000, 50_000, 5_000),
    Case(3, 0.001, 5_000, 50_000, 5_000),
    Case(2, 0.01, 5_000, 50_000, 5_000),
    Case(3, 0.01, 5_000, 50_000, 5_000),
    # batches smaller than a pane: five whole batches per pane (w = 100)
    Case(3, 0.01, 5_000, 50_000, 1_000),
    # a partial batch at each pane close (3,000 + 2,000), beta = 2 on the second
    Case(3, 0.001, 5_000, 50_000, 3_000),
    # batch 1,700 rounded to 1,500 (w = 500): 1,500 x 3 + 500; a window of two panes, so the
    # first two panes of the sample have expired
    Case(3, 0.002, 5_000, 10_000, 1_700),
    # one summary over 7,000 transactions in batches of 2,000 (w = 200), the last of 1,000
    Case(3, 0.005, 7_000, 7_000, 2_000, sample=7_000, kind="summary"),
    # exact counting (epsilon 0): nothing is ever dropped
    Case(3, 0.0, 1_000, 3_000, 700, sample=3_000),
    # the benchmark's own settings over the whole file twice: the window slides on across
    # the second pass, so what is compared is the last ten panes
    Case(2, 0.001, 5_000, 50_000, 5_000, sample=0, repeat=2),
    Case(3, 0.001, 5_000, 50_000, 5_000, sample=0, repeat=2),
)


def _diff(a: PaneEntries, b: PaneEntries, limit: int = 5) -> list[str]:
    out = []
    for size in sorted(set(a) | set(b)):
        ea, eb = a.get(size, {}), b.get(size, {})
        for key in sorted(set(ea) | set(eb)):
            if ea.get(key) != eb.get(key):
                out.append(f"size {size} {key}: kernel {ea.get(key)} streamcount {eb.get(key)}")
                if len(out) >= limit:
                    return out
    return out


def check_agreement(
    path: str | Path = DEFAULT_DATA, cases: Sequence[Case] = DEFAULT_CASES
) -> list[dict[str, Any]]:
    """Run every case through the kernel and through streamcount; the entries (itemsets, f
    and delta of every live pane) must be equal. Returns one dict per case with ``equal``,
    the entries per size compared, and the first differences when there are any."""
    results = []
    for case in cases:
        baskets = read_baskets(path, case.sample)
        if len(baskets) < case.sample:
            raise ValueError(f"{path}: {len(baskets)} transactions, the case needs {case.sample}")
        baskets = baskets * case.repeat
        ours = entries(
            path,
            case.k,
            case.epsilon,
            window_size=case.window_size,
            pane_size=case.pane_size,
            batch_size=case.batch_size,
            repeat=case.repeat,
            head=case.sample,
        )
        if case.kind == "summary":
            accepted = sum(len(set(b)) <= 200 for b in baskets)  # the kernel's -x 200
            theirs = {
                0: (accepted, summary_entries(baskets, case.k, case.epsilon, case.batch_size))
            }
        else:
            theirs = engine_entries(
                baskets,
                case.k,
                case.epsilon,
                window_size=case.window_size,
                pane_size=case.pane_size,
                batch_size=case.batch_size,
            )
        problems = []
        if sorted(ours) != sorted(theirs):
            problems.append(f"live panes: kernel {sorted(ours)} streamcount {sorted(theirs)}")
        sizes = [0] * case.k
        for idx in sorted(set(ours) & set(theirs)):
            (n_a, a), (n_b, b) = ours[idx], theirs[idx]
            if n_a != n_b:
                problems.append(f"pane {idx}: n kernel {n_a} streamcount {n_b}")
            problems += [f"pane {idx}: {d}" for d in _diff(a, b)]
            for size in range(1, case.k + 1):
                sizes[size - 1] += len(b.get(size, {}))
        results.append(
            {
                "case": case.label(),
                "equal": not problems,
                "panes": sorted(theirs),
                "entries_per_size": sizes,
                "problems": problems[:10],
            }
        )
    return results


# ---------------------------------------------------------------------------------------------
# command line


def _rates(runs: list[dict[str, Any]], part: str) -> dict[str, float]:
    values = [r[f"{part}_orders_per_s"] for r in runs]
    return {
        "best": max(values),
        "median": statistics.median(values),
        "min": min(values),
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--data", type=Path, default=DEFAULT_DATA, help="FIMI-style baskets")
    parser.add_argument("--sizes", type=int, nargs="+", default=[2, 3], help="K values timed")
    parser.add_argument("--epsilon", type=float, default=0.001)
    parser.add_argument("--window", type=int, default=50_000)
    parser.add_argument("--pane", type=int, default=5_000)
    parser.add_argument("--batch", type=int, default=5_000)
    parser.add_argument("--repeat", type=int, default=10, help="the file fed this many times")
    parser.add_argument("--runs", type=int, default=5, help="kernel processes per K")
    parser.add_argument("--check-only", action="store_true", help="agreement only, no timing")
    parser.add_argument("--no-check", action="store_true", help="timing only")
    parser.add_argument("--json", type=Path, help="also write everything measured here")
    args = parser.parse_args(argv)
    if not args.data.exists():
        parser.error(f"{args.data}: no such data file (give one with --data)")

    sys.path.insert(0, str(BENCH_DIR))
    import machine  # bench/ is not a package: the scripts import their neighbour by path

    report: dict[str, Any] = {"machine": machine.machine_info(), "data": args.data.name}
    build()
    ok = True
    if not args.no_check:
        print(f"agreement with streamcount on {args.data.name}:")
        report["agreement"] = check_agreement(args.data)
        for r in report["agreement"]:
            ok &= r["equal"]
            mark = "equal" if r["equal"] else "DIFFERENT"
            print(f"  {mark:9} {r['case']}: panes {r['panes']}, entries {r['entries_per_size']}")
            for p in r["problems"]:
                print(f"            {p}")
    if not args.check_only:
        print(
            f"\nC kernel on {args.data.name} x {args.repeat}, epsilon {args.epsilon:g}, "
            f"window {args.window:,} in panes of {args.pane:,}, batch {args.batch:,}; "
            f"{args.runs} runs, orders/s best / median / min:"
        )
        report["timing"] = {}
        for k in args.sizes:
            runs = [
                run(
                    args.data,
                    k,
                    args.epsilon,
                    window_size=args.window,
                    pane_size=args.pane,
                    batch_size=args.batch,
                    repeat=args.repeat,
                )
                for _ in range(args.runs)
            ]
            summary = {part: _rates(runs, part) for part in ("parse", "count", "e2e")}
            report["timing"][f"K={k}"] = {"runs": runs, "orders_per_s": summary}
            for part, name in (
                ("parse", "parse-only"),
                ("count", "count-only"),
                ("e2e", "end-to-end"),
            ):
                s = summary[part]
                print(
                    f"  K={k} {name:11} {s['best']:>12,.0f} {s['median']:>12,.0f} "
                    f"{s['min']:>12,.0f}"
                )
        if 2 in args.sizes and args.epsilon == 0.001:
            best = report["timing"]["K=2"]["orders_per_s"]["count"]["best"]
            print(
                f"\nfloor: K=2 count-only best {best:,.0f} orders/s vs >= {FLOOR_K2:,}: "
                f"{machine.verdict(best >= FLOOR_K2)}"
            )
        report["machine"]["load_average_at_end"] = machine.load_average()
        print(
            f"load average at start {report['machine']['load_average_at_start']}, "
            f"at end {report['machine']['load_average_at_end']}"
        )
    if args.json:
        args.json.write_text(json.dumps(report, indent=2) + "\n", encoding="utf-8")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
