"""The definition of generalised itemsets as a test oracle (no streamcount in the oracle part).

Srikant & Agrawal (VLDB 1995), "Basic" method: extend each transaction with the ancestors of
its items at the levels counted, count every itemset exactly by brute force
(:func:`oracle.exact_counts`), and, with several levels, drop the itemsets that hold an item
together with one of its own ancestors. :class:`Taxonomy` is a plain SKU -> product -> category
map that writes itself as a catalogue file; the strategies draw random taxonomies and streams.
:func:`build_engine` (the only part that uses streamcount) builds the engine under test from
that real file.
"""

from __future__ import annotations

import csv
from collections import Counter
from collections.abc import Hashable
from itertools import combinations
from pathlib import Path

from hypothesis import strategies as st
from oracle import exact_counts

from streamcount.catalogue.filters import ItemFilter
from streamcount.catalogue.levels import ItemCatalogue
from streamcount.catalogue.rename import RenameRules
from streamcount.catalogue.table import load_catalogue
from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

__all__ = [
    "COLUMNS",
    "LEVEL_CHOICES",
    "Taxonomy",
    "build_engine",
    "catalogue_details",
    "oracle_counts",
    "streams",
    "taxonomies",
    "without_fees",
]

COLUMNS = ("sku", "product", "category")
LEVEL_CHOICES = (
    ("sku",),
    ("product",),
    ("sku", "product"),
    ("sku", "category"),
    ("product", "category"),
    ("sku", "product", "category"),
)


# ---- the oracle (no streamcount) -------------------------------------------------------------


class Taxonomy:
    """A plain taxonomy: each SKU's product and category, written out as a CSV file."""

    def __init__(self, rows: list[tuple[str, str, str]]) -> None:
        self.rows = rows
        self.parent: dict[str, str] = {}
        self.level: dict[str, int] = {}
        for sku, product, category in rows:
            self.parent[sku] = product
            self.parent[product] = category
            self.level.update({sku: 0, product: 1, category: 2})

    def chain(self, name: str) -> list[str]:
        out = [name]
        while out[-1] in self.parent:
            out.append(self.parent[out[-1]])
        return out

    def write(self, path: Path) -> Path:
        lines = ["sku,product,category"] + [",".join(row) for row in self.rows]
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        return path

    def extended(self, basket: list[str], levels: tuple[str, ...]) -> set[str]:
        """The definition: at each counted level an item stands for its ancestor at that
        level; an unknown item, or one that sits above the level, stands for itself."""
        out: set[str] = set()
        for item in basket:
            for level in (COLUMNS.index(lv) for lv in levels):
                at_or_below = [n for n in self.chain(item) if self.level.get(n, -1) <= level]
                out.add(at_or_below[-1] if item in self.level and at_or_below else item)
        return out

    def has_ancestor_pair(self, itemset: tuple[Hashable, ...]) -> bool:
        for a, b in combinations(itemset, 2):
            if a in self.chain(str(b))[1:] or b in self.chain(str(a))[1:]:
                return True
        return False


def oracle_counts(
    taxonomy: Taxonomy, baskets: list[list[str]], levels: tuple[str, ...], k: int
) -> Counter[tuple[Hashable, ...]]:
    """Exact counts of the extended transactions, minus itemsets with an item and its
    ancestor (Srikant & Agrawal's Basic method)."""
    counts = exact_counts([taxonomy.extended(b, levels) for b in baskets], k)
    if len(levels) == 1:  # one level: items counted as mapped, nothing is generalised
        return counts
    return Counter({s: c for s, c in counts.items() if not taxonomy.has_ancestor_pair(s)})


def without_fees(baskets: list[list[str]]) -> list[list[str]]:
    kept = [[i for i in b if not i.startswith("fee:")] for b in baskets]
    return [b for b in kept if b]


# ---- strategies ------------------------------------------------------------------------------


@st.composite
def taxonomies(draw: st.DrawFn) -> Taxonomy:
    rows: list[tuple[str, str, str]] = []
    for c in range(draw(st.integers(1, 3))):
        for p in range(draw(st.integers(1, 3))):
            for s in range(draw(st.integers(1, 3))):
                rows.append((f"s{c}{p}{s}", f"p{c}{p}", f"c{c}"))
    return Taxonomy(rows)


@st.composite
def streams(draw: st.DrawFn, taxonomy: Taxonomy, max_len: int) -> list[list[str]]:
    skus = [row[0] for row in taxonomy.rows]
    products = sorted({row[1] for row in taxonomy.rows})
    # SKUs mostly, some names the catalogue does not know, a product read as it is, and fees
    pool = [*skus, "u0", "u1", products[0], "fee:delivery", "fee:wrap"]
    baskets = draw(
        st.lists(st.lists(st.sampled_from(pool), min_size=1, max_size=5), max_size=max_len)
    )
    return baskets


def build_engine(
    taxonomy: Taxonomy, tmp: Path, levels: tuple[str, ...], **engine: object
) -> Engine:
    table = load_catalogue(taxonomy.write(tmp / "catalogue.csv"), COLUMNS, "_name")
    catalogue = ItemCatalogue.build(
        table, levels, ItemFilter.from_config(["fee:*"], None), RenameRules()
    )
    return Engine(EngineConfig(**engine), items=catalogue)  # type: ignore[arg-type]


def catalogue_details(
    path: Path, columns: tuple[str, ...] = COLUMNS, suffix: str = "_name"
) -> dict[str, dict[str, str | None]]:
    """``{name: {"level", "display_name"}}`` of every name in a catalogue file, read with the
    csv module as the file's layout says (no streamcount): a name's level is the column it is
    in (a name repeated in the next column of its row is one item, at the first), its display
    name the non-empty ``<column><suffix>`` cell beside it (the first, for a repeated name)."""
    out: dict[str, dict[str, str | None]] = {}
    with path.open(encoding="utf-8-sig", newline="") as f:
        for row in csv.DictReader(f):
            previous = None
            for column in columns:
                name = (row.get(column) or "").strip()
                if not name:
                    continue
                shown = (row.get(column + suffix) or "").strip() or None
                if name == previous:  # the same item, at the level before
                    entry = out[name]
                else:
                    entry = out.setdefault(name, {"level": column, "display_name": None})
                entry["display_name"] = entry["display_name"] or shown
                previous = name
    return out
