"""The ``streamcount generate`` command: a synthetic feed written out in every record format.

The feed itself (Agrawal & Srikant 1994, with planted drifts) is built by
:mod:`streamcount.demo.synthetic`; this module writes its records as basket lines, JSON lines
or CSV order rows (:data:`FORMATS`), paces them in real time (:func:`paced`) or hands them to
the NATS publisher (:mod:`streamcount.demo.publish`), and registers the subcommand.

The feed's names (:class:`~streamcount.demo.synthetic.GeneratorParams`,
:class:`~streamcount.demo.synthetic.Drift`, :class:`~streamcount.demo.synthetic.SyntheticFeed`,
:func:`~streamcount.demo.synthetic.parse_drift` and the defaults) are re-exported here, the
import path the demo, the tests and the benchmarks use.

Examples
--------
>>> import io
>>> feed = SyntheticFeed(GeneratorParams(transactions=2, items=50, patterns=20, seed=3))
>>> out = io.StringIO()
>>> write_jsonl(feed.records(), out)
2
>>> out.getvalue().splitlines()[0].startswith('{"id": "o-000001", "ts": 1735689600.0')
True
"""

from __future__ import annotations

import argparse
import csv
import json
import math
import os
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from dataclasses import fields
from datetime import UTC, datetime
from typing import Any, TextIO

from streamcount.demo.shop import item_name
from streamcount.demo.synthetic import (
    DEFAULT_DRIFT_RATE,
    DEFAULT_START_TIME,
    Drift,
    GeneratorParams,
    Record,
    SyntheticFeed,
    parse_drift,
)
from streamcount.errors import ConfigError, StreamcountError
from streamcount.intake.formats import FORMATS as _FORMAT_REGISTRY

__all__ = [
    "DEFAULT_DRIFT_RATE",
    "DEFAULT_START_TIME",
    "FORMATS",
    "Drift",
    "GeneratorParams",
    "SyntheticFeed",
    "generate_main",
    "order_id",
    "paced",
    "parse_drift",
    "parse_start_time",
    "register_cli",
    "write_basket",
    "write_csv",
    "write_jsonl",
]

#: Output formats of ``streamcount generate``: every record format the service reads (the
#: registry :data:`streamcount.intake.formats.FORMATS`), each with a writer below.
FORMATS: tuple[str, ...] = tuple(_FORMAT_REGISTRY)


def order_id(index: int) -> str:
    """Order id of transaction ``index`` (0-based): ``o-000001`` for the first."""
    return f"o-{index + 1:06d}"


def write_basket(records: Iterable[Record], out: TextIO, *, flush: bool = False) -> int:
    """Write one line per transaction, names separated by single spaces; return the count."""
    count = 0
    for _, basket in records:
        out.write(" ".join(basket) + "\n")
        count += 1
        if flush:
            out.flush()
    return count


def write_jsonl(records: Iterable[Record], out: TextIO, *, flush: bool = False) -> int:
    """Write ``{"id": "o-000001", "ts": <epoch seconds, ms>, "items": [...]}`` per line."""
    count = 0
    for ts, basket in records:
        line = {"id": order_id(count), "ts": round(ts, 3), "items": list(basket)}
        out.write(json.dumps(line, ensure_ascii=False) + "\n")
        count += 1
        if flush:
            out.flush()
    return count


def write_csv(records: Iterable[Record], out: TextIO, *, flush: bool = False) -> int:
    """Write CSV order lines ``order_id,item,ts,quantity``, one row per item.

    The generator models presence only, so ``quantity`` is always 1; ``ts`` has millisecond
    precision and is the same on every row of an order.
    """
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(("order_id", "item", "ts", "quantity"))
    count = 0
    for ts, basket in records:
        oid, stamp = order_id(count), f"{ts:.3f}"
        writer.writerows((oid, name, stamp, 1) for name in basket)
        count += 1
        if flush:
            out.flush()
    return count


_WRITERS: dict[str, Callable[..., int]] = {
    "basket": write_basket,
    "jsonl": write_jsonl,
    "csv": write_csv,
}


def paced(
    records: Iterable[Record],
    *,
    clock: Callable[[], float] = time.monotonic,
    sleep: Callable[[float], None] = time.sleep,
) -> Iterator[Record]:
    """Release each record when its event time, relative to the first, has passed in real time.

    ``clock`` and ``sleep`` are injectable so tests can pace against a fake clock.
    """
    origin: tuple[float, float] | None = None
    for ts, basket in records:
        if origin is None:
            origin = (clock(), ts)
        delay = origin[0] + (ts - origin[1]) - clock()
        if delay > 0:
            sleep(delay)
        yield ts, basket


def parse_start_time(text: str) -> float:
    """Parse ``--start-time``: epoch seconds, or ISO 8601 (a time without zone is UTC).

    >>> parse_start_time("2025-01-01T00:00:00Z") == DEFAULT_START_TIME
    True
    >>> parse_start_time("1735689600.5")
    1735689600.5
    """
    try:
        value = float(text)
    except ValueError:
        try:
            moment = datetime.fromisoformat(text.strip())
        except ValueError:
            raise ConfigError(
                "--start-time", text, "must be epoch seconds or ISO 8601 (2025-01-01T00:00:00Z)"
            ) from None
        if moment.tzinfo is None:
            moment = moment.replace(tzinfo=UTC)
        value = moment.timestamp()
    if not math.isfinite(value):
        raise ConfigError("--start-time", text, "must be a finite number of seconds")
    return value


def register_cli(subparsers: argparse._SubParsersAction[Any]) -> None:
    """Add the ``generate`` subcommand (its handler is ``args.func = generate_main``)."""
    d = GeneratorParams()
    parser = subparsers.add_parser(
        "generate",
        help="write a synthetic order feed (Agrawal & Srikant 1994) with planted patterns",
        description=(
            "Write a seeded synthetic order feed: baskets built from a pool of weighted, "
            "corrupted patterns, optionally with planted co-purchase drifts. The defaults are "
            "the parameters of Agrawal & Srikant, 'Fast Algorithms for Mining Association "
            "Rules', VLDB 1994 (section 2.4.3; dataset T10.I4): N = 1000 items, |L| = 2000 "
            "patterns, |I| = 4, |T| = 10, correlation level 0.5, corruption level drawn from "
            "Normal(0.5, variance 0.1)."
        ),
        formatter_class=argparse.ArgumentDefaultsHelpFormatter,
    )
    add = parser.add_argument
    add("--transactions", type=int, default=d.transactions, help="number of transactions |D|")
    add("--avg-transaction-size", type=float, default=d.avg_transaction_size, help="|T|")
    add("--avg-pattern-size", type=float, default=d.avg_pattern_size, help="|I|")
    add("--patterns", type=int, default=d.patterns, help="size of the pattern pool |L|")
    add("--items", type=int, default=d.items, help="number of item ids N")
    add("--correlation", type=float, default=d.correlation, help="mean copied fraction")
    add("--corruption-mean", type=float, default=d.corruption_mean, help="mean corruption level")
    add("--corruption-variance", type=float, default=d.corruption_variance, help="its variance")
    add("--seed", type=int, default=d.seed, help="seed of every random stream")
    add("--format", choices=FORMATS, default="basket", help="output format")
    add("--output", default="-", metavar="PATH", help="file to write, - for stdout")
    add(
        "--start-time",
        default=str(DEFAULT_START_TIME),
        help="first timestamp: epoch seconds or ISO 8601",
    )
    add("--rate", type=float, default=10.0, help="mean transactions per second")
    add("--pace", action="store_true", help="emit in real time at --rate (live demos)")
    add("--numeric", action="store_true", help="print item ids instead of catalogue names")
    add(
        "--drift",
        action="append",
        default=[],
        metavar="ITEMS@START[:STOP][~RATE][/RAMP]",
        help=(
            "plant ITEMS (comma-separated) into transactions START..STOP-1 (0-based) with "
            f"probability RATE each (RATE defaults to {DEFAULT_DRIFT_RATE}), ramping up over RAMP "
            "transactions; repeatable. Example: 'breakfast-tea-tin,wildflower-honey-jar"
            "@20000:60000~0.05'"
        ),
    )
    from streamcount.demo.publish import add_publish_options

    add_publish_options(parser)
    parser.set_defaults(func=generate_main)


def generate_main(args: argparse.Namespace) -> int:
    """Run ``streamcount generate``: 0 on success, 2 with a one-line message on bad arguments."""
    try:
        params = GeneratorParams(**{f.name: getattr(args, f.name) for f in fields(GeneratorParams)})
        drifts = tuple(parse_drift(text) for text in args.drift)
        start_time = parse_start_time(args.start_time)
        feed = SyntheticFeed(params, drifts, names=str if args.numeric else item_name)
        records: Iterable[Record] = feed.records(start_time, args.rate)
    except (StreamcountError, ValueError) as exc:
        print(f"streamcount generate: error: {exc}", file=sys.stderr)
        return 2
    if getattr(args, "publish", None):
        if args.output != "-":
            print(
                "streamcount generate: error: give --output or --publish, not both", file=sys.stderr
            )
            return 2
        from streamcount.demo.publish import publish_main

        return publish_main(args, records)  # paces by itself (--pace)
    if args.pace:
        records = paced(records)
    write = _WRITERS[args.format]
    if args.output == "-":
        try:
            write(records, sys.stdout, flush=args.pace)
            sys.stdout.flush()
        except BrokenPipeError:  # the reader went away (e.g. `| head`): not an error
            # Point stdout at devnull so the interpreter's final flush does not fail again
            # (the recipe in the Python docs, "Note on SIGPIPE").
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        return 0
    try:
        with open(args.output, "w", encoding="utf-8", newline="") as out:
            write(records, out, flush=args.pace)
    except OSError as exc:
        print(f"streamcount generate: error: --output = {args.output!r}: {exc}", file=sys.stderr)
        return 2
    return 0


def _main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="streamcount")
    register_cli(parser.add_subparsers(dest="command", required=True))
    args = parser.parse_args(argv)
    return int(args.func(args))


if __name__ == "__main__":  # ``python -m streamcount.demo.generator generate ...``
    sys.exit(_main())
