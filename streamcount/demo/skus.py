"""The invented shop's SKUs and its catalogue file, and a feed that sells SKUs, not products.

Most of :data:`~streamcount.demo.shop.CATALOG`'s products come in one SKU, whose id is the
product id itself. The products of :data:`VARIANTS` come in several (colours, sizes, scents):
their SKU ids are ``<product>/<variant>`` (``wool-throw/ochre``). :func:`catalogue_rows` lists
every SKU under its product and category, with display names, as the catalogue file
(``items.catalogue``) expects them; :func:`write_catalogue` writes it.

:class:`SkuFeed` turns a product-level feed into what a shop's order log holds: each product
sold as one of its SKUs (uniformly), a delivery-fee line in most orders (``fee:delivery``, which
the demo's ``items.ignore`` removes), and a planted *product-level* pattern
(:data:`EVENING`): from :data:`EVENING_START` on, some orders hold a wool throw and a beeswax
candle, each in any of its variants. With 6 x 5 SKU pairs, no single SKU pair is bought often
enough to cross the demo's support threshold, while the product pair is: the pattern is found
only when the product level is counted (``items.levels: [sku, product]``).

Examples
--------
>>> sku_ids("wool-throw")[:2], sku_ids("stoneware-mug")
(('wool-throw/ochre', 'wool-throw/sage'), ('stoneware-mug',))
>>> rows = catalogue_rows()
>>> rows[0]
('sku', 'sku_name', 'product', 'product_name', 'category', 'category_name')
>>> [r for r in rows if r[0] == "wool-throw/ochre"]
[('wool-throw/ochre', 'Wool throw, ochre', 'wool-throw', 'Wool throw', 'linens', 'Linens')]
"""

from __future__ import annotations

import csv
from collections.abc import Iterable, Iterator
from pathlib import Path

import numpy as np

from streamcount.demo.shop import CATALOG, CATEGORIES

__all__ = [
    "EVENING",
    "EVENING_RATE",
    "EVENING_START",
    "FEE",
    "FEE_RATE",
    "VARIANTS",
    "SkuFeed",
    "catalogue_rows",
    "display_name",
    "sku_ids",
    "write_catalogue",
]

#: Products sold in several SKUs, with their variants (invented).
VARIANTS: dict[str, tuple[str, ...]] = {
    "wool-throw": ("ochre", "sage", "grey", "cream", "rust", "navy"),
    "beeswax-candle": ("honey", "pine", "lavender", "fig", "plain"),
    "linen-tea-towel": ("natural", "blue", "green", "rust"),
    "soy-candle-tin": ("cedar", "orange", "mint"),
    "breakfast-tea-tin": ("100g", "250g", "500g"),
    "coffee-beans-dark": ("250g", "500g", "1kg"),
    "olive-oil-tin": ("250ml", "500ml", "1l"),
    "wildflower-honey-jar": ("small", "large"),
    "canvas-apron": ("s", "m", "l"),
    "ochre-cushion-cover": ("square", "oblong"),
    "sage-bath-towel": ("standard", "large"),
    "cotton-napkin-set": ("four", "eight"),
    "terracotta-pot": ("small", "medium", "large"),
    "oat-soap-bar": ("single", "three-pack"),
}
#: The planted product-level pattern: bought together from :data:`EVENING_START` on.
EVENING: tuple[str, str] = ("wool-throw", "beeswax-candle")
EVENING_START = 10_000
EVENING_RATE = 0.08
#: The line most orders hold, which is not a product.
FEE = "fee:delivery"
FEE_RATE = 0.85

_CATEGORY_OF: dict[str, str] = {p: c for c, products in CATEGORIES for p in products}


def sku_ids(product: str) -> tuple[str, ...]:
    """The SKU ids of a product: ``<product>/<variant>`` per variant, or the product id."""
    variants = VARIANTS.get(product)
    if not variants:
        return (product,)
    return tuple(f"{product}/{v}" for v in variants)


def display_name(name: str) -> str:
    """A display name from an id: ``wool-throw/ochre`` -> ``Wool throw, ochre``.

    >>> display_name("tea-and-coffee"), display_name("canvas-apron/m")
    ('Tea and coffee', 'Canvas apron, m')
    """
    base, _, variant = name.partition("/")
    text = base.replace("-", " ").capitalize()
    return f"{text}, {variant}" if variant else text


def catalogue_rows() -> list[tuple[str, str, str, str, str, str]]:
    """The catalogue file's rows, header first: every SKU with its product and category."""
    rows = [("sku", "sku_name", "product", "product_name", "category", "category_name")]
    for product in CATALOG:
        category = _CATEGORY_OF[product]
        for sku in sku_ids(product):
            rows.append(
                (
                    sku,
                    display_name(sku),
                    product,
                    display_name(product),
                    category,
                    display_name(category),
                )
            )
    return rows


def write_catalogue(path: str | Path) -> Path:
    """Write the catalogue file (CSV, UTF-8) to ``path``; returns the path."""
    path = Path(path)
    with open(path, "w", encoding="utf-8", newline="") as fh:
        csv.writer(fh, lineterminator="\n").writerows(catalogue_rows())
    return path


class SkuFeed:
    """Orders as the shop's log holds them, from a product-level feed.

    Parameters
    ----------
    products:
        Baskets of product ids (e.g. ``SyntheticFeed.transactions()``).
    seed:
        Seeds the choices of SKUs, fees and the planted pattern.
    evening:
        Plant :data:`EVENING` (``False``: the feed without it).
    """

    def __init__(self, products: Iterable[tuple[str, ...]], seed: int, *, evening: bool = True):
        self.products = products
        self.seed = seed
        self.evening = evening

    def __iter__(self) -> Iterator[tuple[str, ...]]:
        rng = np.random.default_rng(np.random.SeedSequence([self.seed, 20_251_202]))
        block = 4096
        uniforms = rng.random(block)
        used = 0

        def draw() -> float:
            nonlocal uniforms, used
            if used == block:
                uniforms, used = rng.random(block), 0
            used += 1
            return float(uniforms[used - 1])

        def pick(product: str) -> str:
            skus = sku_ids(product)
            return skus[min(int(draw() * len(skus)), len(skus) - 1)]

        for index, basket in enumerate(self.products):
            out = [pick(p) for p in basket]
            if self.evening and index >= EVENING_START and draw() < EVENING_RATE:
                present = {s.partition("/")[0] for s in out}
                out.extend(pick(p) for p in EVENING if p not in present)
            if draw() < FEE_RATE:
                out.append(FEE)
            yield tuple(out)
