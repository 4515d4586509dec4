"""Parse rates of basket lines and JSON lines, the new decoders beside the old paths in the
same run, and the JSON libraries side by side.

Run from the repository root::

    python3 bench/bench_parse.py                 # T10I4D100K x 10 (1,000,000 orders)
    python3 bench/bench_parse.py --record        # ... and append the tables to bench/RESULTS.md
    python3 bench/bench_parse.py --times 2 --repeat 1   # a quick look

All on T10I4D100K repeated ``--times`` over, as plain basket lines and as JSON orders
(``{"id": "o<n>", "ts": <epoch seconds>, "items": [names...]}``, one per line), both written
once to ``bench/.cache/``. In one process, cases alternated run by run (one warm-up, then
``--repeat`` timed runs each; median [min..max] orders/s), the cyclic collector paused as
replay pauses it:

* **basket parse-only**: read the file in batches, decode (``BasketDecoder``), intern to ids
  and sort each basket's ids, as replay does before counting. *new*: ASCII batches split with
  numpy on their bytes, interned in bulk (``ItemVocabulary.encode_table``); *old*: the same
  decoder told not to use the byte path (``ascii_bytes = False``: one Python string per
  item, split per line, one dict look-up per item occurrence), as before this change.
* **JSON parse-only**: the same, JSON orders. *new*: ``JsonlDecoder.decode`` (msgspec, the
  configured fields only); *old*: the record path (``LineDecoder.decode``: stdlib
  ``json.loads`` per line), as before.
* **JSON libraries**: one call per line over the same lines, results kept per batch of 10,000
  lines (as a decoder holds them): stdlib ``json.loads``, ``orjson.loads`` (when installed;
  not a dependency), ``msgspec.json.decode`` to Python objects, and msgspec into a record type
  of the three configured fields (what the decoder uses).
* **end to end** (``--k``, default 2): ``replay_file`` on the plain basket file and on the JSON
  file, new and old paths, at the speed issue's settings (epsilon 0.001, window 50,000 in
  panes of 5,000, batch 5,000, report itemsets at min_support 0.01). The old paths are forced
  by turning the byte path and the msgspec path off in the decoder modules for that run.

Targets (issue 14, this 2-core machine): basket parse-only >= 1,500,000 orders/s; JSON end
to end >= 0.6x the basket-line end-to-end rate in one process.
"""

from __future__ import annotations

import argparse
import gc
import json
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import bench_ckernel  # bench/ is not a package: the scripts import their neighbours by path
import bench_speed
import machine

TARGET_PARSE = 1_500_000
TARGET_JSON_RATIO = 0.6
BATCH_LINES = 10_000


def json_repeated(times: int) -> Path:
    """``bench/.cache/T10I4D100K-x<times>.jsonl``: the dataset as JSON orders, ``times`` over
    (ids and times keep counting up across the copies)."""
    out = bench_ckernel.CACHE_DIR / f"T10I4D100K-x{times}.jsonl"
    single = bench_ckernel.plain_text(machine.data_path("T10I4D100K.dat.gz"))
    if out.exists() and out.stat().st_mtime >= single.stat().st_mtime:
        return out
    lines = single.read_text(encoding="ascii").splitlines()
    tmp = out.with_suffix(".tmp")
    n = 0
    with tmp.open("w", encoding="ascii") as fh:
        for _ in range(times):
            for line in lines:
                order = {"id": f"o{n}", "ts": 1_700_000_000 + n // 10, "items": line.split()}
                fh.write(json.dumps(order, separators=(",", ":")) + "\n")
                n += 1
    tmp.replace(out)
    return out


def _old_paths(on: bool) -> None:
    """Force the paths as they were before the byte path and the msgspec path (or undo)."""
    from streamcount.intake.formats import basket, jsonl

    if on:
        _SAVED["codecs"], basket._ASCII_CODECS = basket._ASCII_CODECS, frozenset()
        _SAVED["records"] = jsonl._record_decoder
        jsonl._record_decoder = lambda config, raw=False: None
    else:
        basket._ASCII_CODECS = _SAVED["codecs"]
        jsonl._record_decoder = _SAVED["records"]


_SAVED: dict[str, Any] = {}


def _parse(path: Path, fmt: str, old: bool) -> tuple[float, int]:
    """Read + decode + intern + sort ids per basket; (seconds, orders)."""
    from streamcount.config.settings import InputConfig
    from streamcount.engine.rows import sort_dedupe
    from streamcount.engine.vocab import ItemVocabulary
    from streamcount.intake.bulk import iter_batches
    from streamcount.intake.formats import make_decoder
    from streamcount.intake.formats.text import LineDecoder

    decoder: Any = make_decoder(InputConfig(format=fmt), 200)
    if fmt == "basket":
        decoder.ascii_bytes = not old
    decode = decoder.decode
    if fmt == "jsonl" and old:
        decode = lambda b: LineDecoder.decode(decoder, b)  # noqa: E731
    vocab = ItemVocabulary()
    n = 0
    gc.disable()
    try:
        start = time.perf_counter()
        for batch in iter_batches(str(path)):
            decoded = decode(batch)
            tokens = decoded.tokens
            if tokens is not None:
                flat = vocab.encode_table(tokens.names, tokens.codes)[tokens.codes]
                lengths = tokens.lengths
            else:
                flat, lengths = vocab.encode_baskets(decoded.baskets)
            flat, lengths = sort_dedupe(flat, lengths, len(vocab))
            n += int(lengths.shape[0])
        seconds = time.perf_counter() - start
    finally:
        gc.enable()
    return seconds, n


def _libraries(path: Path, limit: int) -> dict[str, Callable[[], tuple[float, int]]]:
    """One timing function per JSON library over the first ``limit`` lines."""
    import msgspec

    from streamcount.config.settings import JsonlConfig
    from streamcount.intake.formats.jsonl import _record_decoder

    with path.open("rb") as fh:
        lines = [fh.readline().rstrip(b"\n") for _ in range(limit)]
    lines = [x for x in lines if x]
    chunks = [lines[i : i + BATCH_LINES] for i in range(0, len(lines), BATCH_LINES)]

    def timer(loads: Callable[[bytes], Any]) -> Callable[[], tuple[float, int]]:
        def run() -> tuple[float, int]:
            gc.disable()
            try:
                start = time.perf_counter()
                for chunk in chunks:
                    held = [loads(x) for x in chunk]
                    del held
                return time.perf_counter() - start, len(lines)
            finally:
                gc.enable()

        return run

    out = {"stdlib json.loads": timer(json.loads)}
    try:
        import orjson

        out["orjson.loads"] = timer(orjson.loads)
    except ImportError:
        print("orjson not installed: left out", file=sys.stderr)
    out["msgspec.json.decode (objects)"] = timer(msgspec.json.Decoder().decode)
    record = _record_decoder(JsonlConfig())
    assert record is not None
    out["msgspec, configured fields"] = timer(record.decode)
    return out


def _replay(path: Path, k: int, old: bool) -> tuple[float, int]:
    from streamcount.config.settings import Config, EngineConfig, InputConfig, RulesConfig
    from streamcount.intake.formats import format_for_path
    from streamcount.replay import replay_file

    cfg = Config(
        engine=EngineConfig(
            epsilon=bench_speed.EPSILON,
            max_itemset_size=k,
            window_size=bench_speed.WINDOW_SIZE,
            pane_size=bench_speed.PANE_SIZE,
            batch_size=bench_speed.BATCH_SIZE,
        ),
        rules=RulesConfig(min_support=bench_speed.MIN_SUPPORT),
        input=InputConfig(format=format_for_path(str(path)) or "basket"),
    )
    if old:
        _old_paths(True)
    try:
        start = time.perf_counter()
        result = replay_file(str(path), cfg, progress=None, workers=1)
        seconds = time.perf_counter() - start
    finally:
        if old:
            _old_paths(False)
    return seconds, int(result.report["input"]["transactions"])


def _alternate(cases: dict[str, Callable[[], tuple[float, int]]], repeat: int) -> dict[str, Any]:
    """One warm-up of each, then ``repeat`` rounds running every case once per round."""
    counts: dict[str, int] = {}
    for name, fn in cases.items():
        counts[name] = fn()[1]
        gc.collect()
    times: dict[str, list[float]] = {name: [] for name in cases}
    for _ in range(repeat):
        for name, fn in cases.items():
            seconds, n = fn()
            assert n == counts[name], (name, n, counts[name])
            times[name].append(seconds)
            gc.collect()
    out = {}
    for name, ts in times.items():
        rates = [counts[name] / t for t in ts]
        out[name] = {
            "orders": counts[name],
            "seconds": ts,
            "median": statistics.median(rates),
            "min": min(rates),
            "max": max(rates),
        }
    return out


def _fmt(r: dict[str, Any]) -> str:
    return f"{r['median']:,.0f} [{r['min']:,.0f}..{r['max']:,.0f}]"


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n", 1)[0])
    ap.add_argument("--times", type=int, default=10, help="T10I4D100K copies (default 10)")
    ap.add_argument("--repeat", type=int, default=3, help="timed runs per case (default 3)")
    ap.add_argument("--k", type=int, default=2, help="itemset size for end to end (default 2)")
    ap.add_argument("--lib-lines", type=int, default=200_000, help="lines for the JSON libraries")
    ap.add_argument("--no-e2e", action="store_true", help="parse-only and libraries only")
    ap.add_argument("--record", action="store_true", help="append to bench/RESULTS.md")
    args = ap.parse_args()

    info = machine.machine_info()
    baskets = bench_speed.plain_repeated("T10I4D100K", args.times)
    orders = json_repeated(args.times)
    print(machine.format_machine(info))
    print(f"inputs: {baskets.name}, {orders.name}")

    parse = _alternate(
        {
            "basket new": lambda: _parse(baskets, "basket", old=False),
            "basket old": lambda: _parse(baskets, "basket", old=True),
            "json new": lambda: _parse(orders, "jsonl", old=False),
            "json old": lambda: _parse(orders, "jsonl", old=True),
        },
        args.repeat,
    )
    libs = _alternate(_libraries(orders, args.lib_lines), args.repeat)
    e2e: dict[str, Any] = {}
    if not args.no_e2e:
        e2e = _alternate(
            {
                "basket new": lambda: _replay(baskets, args.k, old=False),
                "basket old": lambda: _replay(baskets, args.k, old=True),
                "json new": lambda: _replay(orders, args.k, old=False),
                "json old": lambda: _replay(orders, args.k, old=True),
            },
            args.repeat,
        )
    info["load_average_at_end"] = machine.load_average()

    md = [
        f"T10I4D100K x {args.times} ({parse['basket new']['orders']:,} orders); one process, "
        f"cases alternated, {args.repeat} timed runs after a warm-up; orders/s median "
        "[min..max]. Shared 2-core machine: figures swing with the other work on it.",
        "",
        "### Parse only (read + decode + intern + sort ids per basket)",
        "",
        "| input | new | old (same run) | speed-up | target |",
        "|---|---|---|---|---|",
    ]
    for fmt, label in (("basket", "basket lines"), ("json", "JSON orders")):
        new, old = parse[f"{fmt} new"], parse[f"{fmt} old"]
        target = (
            f"{machine.verdict(new['median'] >= TARGET_PARSE)} (>= {TARGET_PARSE:,})"
            if fmt == "basket"
            else "-"
        )
        md.append(
            f"| {label} | {_fmt(new)} | {_fmt(old)} | {new['median'] / old['median']:.1f}x | "
            f"{target} |"
        )
    md += [
        "",
        f"### JSON libraries ({libs['stdlib json.loads']['orders']:,} JSON orders, one call "
        f"per line, results held per {BATCH_LINES:,} lines)",
        "",
        "| library | lines/s | x stdlib |",
        "|---|---|---|",
    ]
    base = libs["stdlib json.loads"]["median"]
    for name, r in libs.items():
        md.append(f"| {name} | {_fmt(r)} | {r['median'] / base:.1f}x |")
    if e2e:
        ratio = e2e["json new"]["median"] / e2e["basket new"]["median"]
        md += [
            "",
            f"### End to end (replay_file, K = {args.k}, epsilon {bench_speed.EPSILON}, window "
            f"{bench_speed.WINDOW_SIZE:,} in panes of {bench_speed.PANE_SIZE:,}, itemsets)",
            "",
            "| input | new | old (same run) | speed-up |",
            "|---|---|---|---|",
        ]
        for fmt, label in (("basket", "basket lines"), ("json", "JSON orders")):
            new, old = e2e[f"{fmt} new"], e2e[f"{fmt} old"]
            md.append(
                f"| {label} | {_fmt(new)} | {_fmt(old)} | {new['median'] / old['median']:.1f}x |"
            )
        md += [
            "",
            f"JSON / basket end to end (new): {ratio:.2f}x — "
            f"{machine.verdict(ratio >= TARGET_JSON_RATIO)} (>= {TARGET_JSON_RATIO}x)",
        ]
    text = "\n".join(md)
    print(text)
    if args.record:
        raw = {"machine": info, "parse": parse, "libraries": libs, "end_to_end": e2e}
        raw["settings"] = {"times": args.times, "repeat": args.repeat, "k": args.k}
        md_path, json_path = machine.record("parse", "parse rates (bench_parse.py)", text, raw)
        print(f"recorded: {md_path} and {json_path}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
