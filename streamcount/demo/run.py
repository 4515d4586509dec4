"""``streamcount demo``: an invented shop's live order feed, watched by the real service.

The shop is :data:`streamcount.demo.shop.SHOP_NAME`. Its feed comes from the Agrawal & Srikant
generator (:mod:`streamcount.demo.synthetic`) with two planted changes the demo then catches:

* from the start, a bundle (``chai-spice-mix`` with ``stoneware-mug``) sells together; at
  transaction 9,000 the mugs go out of stock and the pattern stops: a ``faded`` alert;
* at transaction 7,000 a promotion on ``sourdough-starter-jar`` starts pulling an unplanned
  companion, ``bread-scoring-blade``: ``surged`` and ``emerged`` alerts;
* from transaction 10,000 a wool throw and a beeswax candle sell together, each in any of its
  colours or scents (:mod:`streamcount.demo.skus`): a pattern between *products* that no pair
  of SKUs shows. With the product level counted (``--levels sku,product``, the default) it is
  found; with ``--levels sku`` it goes unseen.

Orders are sold as SKUs and most hold a delivery fee line, which the demo's ``items.ignore``
removes before counting; the catalogue file (SKU -> product -> category, with display names)
is written to a temporary directory for the run.

Everything else is the real thing: the engine, rules, alerts, sinks, the HTTP listener with
``/metrics`` and the JSON API. The feed is paced to finish in ``--duration`` seconds (45 by
default); ``--forever`` keeps the feed going for a monitoring demo.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Iterable, Iterator, Mapping, Sequence
from pathlib import Path
from typing import Any, TextIO

from streamcount.alerts.sinks import SinkStats
from streamcount.config.settings import (
    AlertsConfig,
    CheckpointConfig,
    Config,
    EngineConfig,
    InputConfig,
    ItemsConfig,
    RulesConfig,
    ServerConfig,
    SinksConfig,
)
from streamcount.demo.generator import Drift, GeneratorParams, SyntheticFeed
from streamcount.demo.shop import SHOP_NAME
from streamcount.demo.skus import EVENING, EVENING_START, FEE, SkuFeed, write_catalogue
from streamcount.intake.records import RecordBatch, SourceHealth

__all__ = [
    "BUNDLE",
    "DEMO_LEVELS",
    "DEMO_TRANSACTIONS",
    "PROMOTION",
    "demo_config",
    "demo_main",
    "demo_orders",
]

#: planted patterns: (items, first transaction, first transaction without it)
BUNDLE = ("chai-spice-mix", "stoneware-mug")
PROMOTION = ("sourdough-starter-jar", "bread-scoring-blade")
BUNDLE_STOP = 9000
PROMOTION_START = 7000
DEMO_TRANSACTIONS = 16000
_DRIFT_RATE = 0.08
#: the levels the demo counts unless told otherwise (--levels)
DEMO_LEVELS: tuple[str, ...] = ("sku", "product")


def demo_feed(seed: int, transactions: int | None) -> SyntheticFeed:
    """The demo shop's feed: ordinary baskets plus the two planted changes."""
    params = GeneratorParams(
        transactions=transactions if transactions is not None else 10**12,
        avg_transaction_size=5.0,
        avg_pattern_size=3.0,
        patterns=40,
        items=120,
        seed=seed,
    )
    drifts = (
        Drift(BUNDLE, start=0, stop=BUNDLE_STOP, rate=_DRIFT_RATE),
        Drift(PROMOTION, start=PROMOTION_START, rate=_DRIFT_RATE),
    )
    return SyntheticFeed(params, drifts)


def demo_orders(seed: int, transactions: int | None) -> Iterable[tuple[str, ...]]:
    """The demo shop's orders as its log holds them: SKUs, fee lines, the planted patterns."""
    return SkuFeed(demo_feed(seed, transactions).transactions(), seed)


def demo_config(
    listen: str | None,
    catalogue: str | None = None,
    levels: Sequence[str] = DEMO_LEVELS,
) -> Config:
    """Settings sized for the demo: a 6,000-order window in panes of 500; the fee line
    ignored; with ``catalogue`` (the file :func:`~streamcount.demo.skus.write_catalogue`
    writes) the ``levels`` counted."""
    return Config(
        input=InputConfig(path=None, format="jsonl", dead_letter_path=None),
        items=ItemsConfig(
            ignore=("fee:*",),
            catalogue=catalogue,
            levels=tuple(levels) if catalogue is not None else ("sku",),
            reload_seconds=None,
        ),
        engine=EngineConfig(
            epsilon=0.002, max_itemset_size=3, window_size=6000, pane_size=500, batch_size=500
        ),
        rules=RulesConfig(
            min_support=0.03,
            min_confidence=0.4,
            min_lift=2.0,
            max_p_value=0.001,
        ),
        alerts=AlertsConfig(recent_panes=1, surge_min_count=20),
        sinks=SinksConfig(log=False),
        server=ServerConfig(listen=listen),
        checkpoint=CheckpointConfig(checkpoint_dir=None),
    )


class PacedFeedSource:
    """A source that releases the feed's orders as JSON lines at ``rate`` per second.

    Event timestamps are the release times, so the service's event lag stays near zero.
    """

    name = "demo"
    ingest = None

    def __init__(
        self, orders: Iterable[tuple[str, ...]], rate: float, *, clock: Any = time.monotonic
    ) -> None:
        self._it: Iterator[tuple[str, ...]] = iter(orders)
        self.rate = rate
        self.clock = clock
        self.started = clock()
        self.wall_start = time.time()
        self.released = 0
        self.offset = 0
        self.exhausted = False
        self.caught_up = False

    def read(self, max_records: int = 10000, timeout: float = 0.0) -> list[RecordBatch]:
        if self.exhausted:
            return []
        due = max_records
        if self.rate > 0:
            due = min(max_records, int((self.clock() - self.started) * self.rate) - self.released)
            if due <= 0:
                self.caught_up = True
                time.sleep(min(timeout, 1.0 / self.rate))
                return []
        self.caught_up = False
        out: list[bytes] = []
        for _ in range(due):
            try:
                items = next(self._it)
            except StopIteration:
                self.exhausted = True
                break
            self.released += 1
            ts = self.wall_start + (self.released / self.rate if self.rate > 0 else 0.0)
            line = json.dumps(
                {"id": f"q-{self.released:07d}", "ts": round(ts, 3), "items": list(items)}
            ).encode()
            out.append(line)
        if not out:
            return []
        batch = RecordBatch.from_lines(out, start=self.offset, source=self.name)
        self.offset = int(batch.end_offset or self.offset)
        return [batch]

    def position(self) -> Any:
        return None  # a generated feed is not resumed

    def acknowledge(self, position: object) -> None:
        return None

    def drain(self) -> list[RecordBatch]:
        return []

    def health(self) -> SourceHealth:
        return SourceHealth()

    def close(self) -> None:
        self.exhausted = True


def format_alert(record: Mapping[str, Any]) -> str:
    """One readable line (two for rules) for an alert record."""
    m = record["measures"]
    seq = f"order {record['seq']:,}"

    def iv(name: str, pct: bool = False) -> str:
        x = m.get(name)
        if not x or x.get("value") is None:
            return "n/a"

        def fmt(v: float) -> str:
            return f"{100 * v:.1f}%" if pct else f"{v:.2f}"

        lo = "?" if x.get("low") is None else fmt(x["low"])
        hi = "inf" if x.get("high") is None else fmt(x["high"])
        return f"{fmt(x['value'])} [{lo}..{hi}]"

    kind = record["kind"].upper()
    ev = record["evidence"]
    before, now = ev["reference_rate"]["value"], ev["recent_rate"]["value"]
    also = f" (also {', '.join(record['also'])})" if record.get("also") else ""
    since = "?" if ev["change_seq"] is None else f"{ev['change_seq']:,}"
    change = (
        f"{'':>12}bought together in {100 * before:.2f}% of orders before, "
        f"{100 * now:.2f}% since order {since}{also}"
    )
    if record["antecedent"] is None:
        return (
            f"[{seq}] {kind:8} {' + '.join(record['items'])}: support {iv('support', True)}\n"
            + change
        )
    rule = f"{' + '.join(record['antecedent'])} => {' + '.join(record['consequent'])}"
    return (
        f"[{seq}] {kind:8} {rule}\n"
        f"{'':>12}support {iv('support', True)}  confidence {iv('confidence', True)}  "
        f"lift {iv('lift')}\n" + change
    )


class ConsoleSink:
    """Prints each alert as it fires (readable lines, or JSON lines with ``--json``)."""

    name = "console"

    def __init__(self, out: TextIO, *, as_json: bool, status_line: bool) -> None:
        self.out = out
        self.as_json = as_json
        self.status_line = status_line
        self.sent = 0
        self.records: list[Mapping[str, Any]] = []
        self._lock = threading.Lock()

    def emit(self, record: Mapping[str, Any]) -> None:
        text = json.dumps(record, sort_keys=True) if self.as_json else format_alert(record)
        with self._lock:
            if self.status_line:
                self.out.write("\r\033[K")
            self.out.write(text + "\n")
            self.out.flush()
            self.sent += 1
            self.records.append(record)

    def close(self, timeout: float | None = None) -> None:
        pass

    def stats(self) -> SinkStats:
        return SinkStats(self.sent, 0, 0, 0)


def demo_main(args: argparse.Namespace) -> int:
    """Run the demo; returns 0. ``args``: duration, forever, json, listen, seed, rate."""
    from streamcount.service.loop import Service

    out = sys.stdout
    tty = out.isatty() and not args.json
    total = None if args.forever else DEMO_TRANSACTIONS
    if args.rate is None:  # pace the scripted feed to fill --duration
        rate = DEMO_TRANSACTIONS / max(args.duration, 0.5)
    else:
        rate = max(0.0, args.rate)  # 0: as fast as the machine goes
    levels = tuple(lv.strip() for lv in str(args.levels).split(",") if lv.strip())
    workdir = tempfile.TemporaryDirectory(prefix="streamcount-demo-")
    catalogue = write_catalogue(Path(workdir.name) / "catalogue.csv")
    config = demo_config(args.listen, str(catalogue), levels)
    source = PacedFeedSource(demo_orders(args.seed, total), rate)
    console = ConsoleSink(out, as_json=args.json, status_line=tty)
    service = Service(config, sources=[source], extra_sinks=(console,))
    bound = service.start_server()
    say = (lambda text: print(text, file=sys.stderr)) if args.json else print
    pace = f"{rate:,.0f} orders/s" if rate > 0 else "as fast as it goes"
    say(f"{SHOP_NAME}: live order feed, {pace} (invented shop, generated data)")
    say(
        f"Planted: {' + '.join(BUNDLE)} sold together until order {BUNDLE_STOP:,}; a promotion "
        f"pulls {' + '.join(PROMOTION)} from order {PROMOTION_START:,}; from order "
        f"{EVENING_START:,}, {' + '.join(EVENING)} in any colour or scent (a pattern between "
        "products, not SKUs)."
    )
    say(
        f"Levels counted: {' + '.join(config.items.levels)}; the {FEE} line is ignored. "
        + (
            "(--levels sku counts SKUs only: the product pattern then goes unseen.)"
            if "product" in config.items.levels
            else "(--levels sku,product counts products too: the product pattern shows.)"
        )
    )
    if bound:
        base = f"http://{bound[0]}:{bound[1]}"
        keep = "" if args.forever else "; --forever keeps it live after the demo"
        say(f"Page: {base}/   (open it in a browser{keep})")
        say(f"Metrics: {base}/metrics   API: {base}/v1/status")
    say("Warm-up: no alerts until the first window (6,000 orders) is full.")
    started = time.monotonic()
    last_status = 0.0

    def on_turn(svc: Service) -> bool:
        nonlocal last_status
        now = time.monotonic()
        if not args.forever and now - started > args.duration + 30:
            return False  # a slow machine: stop anyway, the summary says how far it got
        if now - last_status >= (0.25 if tty else 5.0):
            last_status = now
            line = _status_line(svc, now - started)
            if tty:
                out.write("\r\033[K" + line)
                out.flush()
            elif not args.json:
                print(line)
        return True

    try:
        service.run(on_turn=on_turn, turn_timeout=0.05)
    finally:
        workdir.cleanup()
    if tty:
        out.write("\r\033[K")
    _summary(service, console, time.monotonic() - started, say)
    return 0


def _status_line(service: Any, elapsed: float) -> str:
    st = service.api.status()
    window = st["window"]
    fill = window["transactions"] / service.config.engine.window_size
    rate = st["transactions_seen"] / max(elapsed, 1e-9)
    return (
        f"{st['transactions_seen']:>7,} orders | window {100 * min(fill, 1):3.0f}% full | "
        f"{st['active_rules']:>3} active rules | {rate:,.0f}/s"
    )


def _summary(service: Any, console: ConsoleSink, elapsed: float, say: Any) -> None:
    st = service.api.status()
    w = st["window"]
    kinds = Counter(r["kind"] for r in console.records)
    say(
        f"Done: {st['transactions_seen']:,} orders in {elapsed:.1f} s. Window: orders "
        f"{w['first_seq']:,}..{w['last_seq']:,} ({w['transactions']:,}), counts exact to within "
        f"{w['max_error']} orders."
    )
    say("Alerts: " + ", ".join(f"{kinds.get(k, 0)} {k}" for k in ("emerged", "surged", "faded")))
    answer = service.api.rules("lift", 5, None, None, None)
    rules = answer["rules"]
    if rules:
        say("Active rules now (top 5 by lift):")
        details = answer.get("item_details", {})

        def shown(items: list[str]) -> str:
            # a product or category is marked with its level; SKUs are shown as they are
            out = []
            for item in items:
                level = details.get(item, {}).get("level")
                out.append(f"{item} [{level}]" if level not in (None, "sku") else item)
            return " + ".join(out)

        for r in rules:
            lift = r["measures"]["lift"] if "measures" in r else r["lift"]
            conf = r["measures"]["confidence"] if "measures" in r else r["confidence"]
            say(
                f"  {shown(r['antecedent'])} => {shown(r['consequent'])}: "
                f"lift {lift['value']:.2f}, confidence {100 * conf['value']:.0f}%"
            )
    say("Alerts are signals for a person to review, not decisions on prices, stock or fraud holds.")
