"""Feeds for the alert benchmark (``bench_alerts.py``): stationary ones, an overdispersed one,
and planted changes with their exact oracle.

Every feed is an endless iterator of baskets (lists of distinct item names), seeded, so a case
is a function of its parameters alone:

``generator``
    The Agrawal & Srikant (1994) generator of :mod:`streamcount.demo.generator` (T10.I4,
    N = 1000 items, |L| = 2000 patterns) with no drift: every transaction is drawn
    independently from one distribution, so nothing in it ever changes.
``retail``
    The open retail dataset (``tests/data/retail.dat.gz``, 88,162 receipts of a Belgian
    supermarket): its receipts in a seeded random order, a fresh permutation per pass. Real
    basket structure, and no change by construction (order removed). A stream longer than
    88,162 cycles through the file again: **the cycle repeats baskets** (each receipt once per
    pass), which is sampling without replacement inside a pass, not new shoppers.
``bursts``
    The generator feed with repeated orders: each order is, with probability
    :data:`BURST_SHARE`, followed at once by ``G`` copies of itself, ``G`` geometric on
    1, 2, ... with mean :data:`BURST_MEAN_EXTRA` (bulk orders, a customer or a script
    submitting the same basket again). Counts then vary more than binomially, which the
    alert guarantee does not cover; the benchmark measures how far it breaks.

Planted changes (:func:`planted`) use the generator as the background and
:class:`~streamcount.demo.generator.Drift` for the change, so the background is the same
transactions with or without the change (drifts only add items).

Nothing here imports streamcount at module level: the benchmark's parent process stays small.
"""

from __future__ import annotations

import gzip
import random
from collections.abc import Iterable, Iterator
from itertools import combinations, islice
from typing import Any

import machine  # bench/ is on sys.path: the scripts import their neighbours by path

__all__ = [
    "BURST_MEAN_EXTRA",
    "BURST_SHARE",
    "FEEDS",
    "NEW_PAIR",
    "Oracle",
    "bursts",
    "generator",
    "panes",
    "pick_pair",
    "planted",
    "retail",
    "retail_baskets",
    "stationary",
]

FEEDS = ("generator", "retail", "bursts")
#: share of orders followed by repeated copies in the ``bursts`` feed
BURST_SHARE = 0.02
#: mean number of extra copies of a repeated order (geometric on 1, 2, ...)
BURST_MEAN_EXTRA = 3.0
#: two new products of the invented shop: the generator never sells them
NEW_PAIR = ("fennel-pollen-jar", "sloe-gin-truffle-box")
#: an endless generator feed has this many transactions (never reached)
_ENDLESS = 10**12


def generator(seed: int, drifts: Iterable[Any] = ()) -> Iterator[list[str]]:
    """The generator feed (T10.I4, N = 1000, |L| = 2000, the paper's defaults), endless."""
    from streamcount.demo.generator import GeneratorParams, SyntheticFeed

    feed = SyntheticFeed(GeneratorParams(transactions=_ENDLESS, seed=int(seed)), tuple(drifts))
    return (list(t) for t in feed.transactions())


def retail_baskets() -> list[list[str]]:
    """The retail receipts in file order, each as its distinct item names (file order)."""
    out = []
    with gzip.open(machine.data_path("retail.dat.gz"), "rt", encoding="ascii") as fh:
        for line in fh:
            items = list(dict.fromkeys(line.split()))
            if items:
                out.append(items)
    return out


def retail(seed: int) -> Iterator[list[str]]:
    """The retail receipts in a seeded random order, a fresh permutation per pass, endless."""
    baskets = retail_baskets()
    rng = random.Random(int(seed))
    order = list(range(len(baskets)))
    while True:
        rng.shuffle(order)
        for i in order:
            yield list(baskets[i])


def bursts(
    source: Iterator[list[str]],
    seed: int,
    share: float = BURST_SHARE,
    mean_extra: float = BURST_MEAN_EXTRA,
) -> Iterator[list[str]]:
    """``source`` with repeated orders: each order, with probability ``share``, is followed by
    a geometric number (mean ``mean_extra``, at least 1) of copies of itself."""
    import numpy as np

    rng = np.random.default_rng([int(seed), 0x5EED])
    p = 1.0 / float(mean_extra)
    while True:
        coins = rng.random(4096).tolist()
        extra = rng.geometric(p, 4096).tolist()
        for coin, copies in zip(coins, extra, strict=True):
            basket = next(source)
            yield basket
            if coin < share:
                for _ in range(int(copies)):
                    yield list(basket)


def stationary(feed: str, seed: int) -> Iterator[list[str]]:
    """One of :data:`FEEDS`, endless."""
    if feed == "generator":
        return generator(seed)
    if feed == "retail":
        return retail(seed)
    if feed == "bursts":
        return bursts(generator(seed), seed)
    raise ValueError(f"feed {feed!r}: choose from {FEEDS}")


def panes(source: Iterator[list[str]], pane: int, total: int) -> Iterator[list[list[str]]]:
    """The first ``total`` baskets of ``source`` in lists of ``pane`` (the last may be short)."""
    done = 0
    while done < total:
        chunk = list(islice(source, min(pane, total - done)))
        if not chunk:
            return
        done += len(chunk)
        yield chunk


def pick_pair(seed: int, prefix: int = 20_000) -> tuple[tuple[str, str], dict[str, Any]]:
    """Two items the generator feed of ``seed`` sells, each in 1-3 % of its first ``prefix``
    transactions, with the fewest co-occurrences there (ties: by name): an existing pair whose
    co-purchase rate a drift then sets."""
    where: dict[str, set[int]] = {}
    for t, basket in enumerate(islice(generator(seed), prefix)):
        for item in basket:
            where.setdefault(item, set()).add(t)
    band = sorted(i for i, ts in where.items() if 0.01 * prefix <= len(ts) <= 0.03 * prefix)
    if len(band) < 2:
        raise RuntimeError(f"seed {seed}: fewer than two items with support 1-3 %")
    best = min(combinations(band, 2), key=lambda p: (len(where[p[0]] & where[p[1]]), p))
    return best, {
        "supports": [len(where[i]) / prefix for i in best],
        "co_occurrences": len(where[best[0]] & where[best[1]]),
        "prefix": prefix,
    }


def planted(
    scenario: str, seed: int, *, before: float, after: float, at: int
) -> tuple[Iterator[list[str]], tuple[str, str], dict[str, Any]]:
    """A generator feed with one planted change at transaction index ``at`` (0-based).

    ``new``
        :data:`NEW_PAIR` (products that do not occur before) bought together at rate
        ``after`` from ``at`` on (``before`` is ignored: 0).
    ``rise``
        An existing pair (:func:`pick_pair`) added together at rate ``before`` until ``at``,
        at rate ``after`` from then on.
    ``stop``
        An existing pair added together at rate ``before`` until ``at``, then never.

    Returns the feed, the pair and how the pair was chosen.
    """
    from streamcount.demo.generator import Drift
    from streamcount.demo.shop import CATALOG

    if scenario == "new":
        assert not set(NEW_PAIR) & set(CATALOG), "the new products must be new"
        pair, chosen = NEW_PAIR, {"new_products": True}
        drifts = [Drift(pair, start=at, rate=after)]
    elif scenario in ("rise", "stop"):
        pair, chosen = pick_pair(seed)
        drifts = [Drift(pair, start=0, stop=at, rate=before)]
        if scenario == "rise":
            drifts.append(Drift(pair, start=at, rate=after))
    else:
        raise ValueError(f"scenario {scenario!r}: choose from new, rise, stop")
    return generator(seed, drifts), pair, chosen


class Oracle:
    """Exact recount of one itemset over the sliding window at every pane close.

    Fed each pane's baskets in order (:meth:`pane`), it keeps the itemset's exact count per
    pane and answers the exact window count and support at each close.
    """

    def __init__(self, items: Iterable[str], window_panes: int) -> None:
        self.items = frozenset(items)
        self.window_panes = int(window_panes)
        self.counts: list[int] = []
        self.sizes: list[int] = []
        #: per pane close: (last seq, exact window count, window transactions)
        self.closes: list[tuple[int, int, int]] = []

    def pane(self, baskets: list[list[str]]) -> tuple[int, int, int]:
        items = self.items
        self.counts.append(sum(1 for b in baskets if items.issubset(b)))
        self.sizes.append(len(baskets))
        lo = max(0, len(self.counts) - self.window_panes)
        close = (sum(self.sizes), sum(self.counts[lo:]), sum(self.sizes[lo:]))
        self.closes.append(close)
        return close

    def first_crossing(self, min_support: float, after_seq: int = 0) -> int | None:
        """Last seq of the first full-window pane close after ``after_seq`` at which the exact
        window support reaches ``min_support``."""
        full = self.window_panes
        for i, (seq, count, n) in enumerate(self.closes):
            if i + 1 >= full and seq > after_seq and count >= min_support * n:
                return seq
        return None

    def support_at(self, seq: int) -> float | None:
        """Exact window support at the pane close whose last seq is ``seq``."""
        for s, count, n in self.closes:
            if s == seq:
                return count / n if n else None
        return None
