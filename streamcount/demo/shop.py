"""The invented shop used by demos, examples and the synthetic feed.

"Quillbrook Provisions" is a made-up online grocer and homewares shop; every product below is
invented and generic (no brands). The synthetic generator draws integer item ids and prints
them through :func:`item_name`, so generated feeds read like orders from this shop: ids below
``len(CATALOG)`` get a product name, larger ids get a stable generated name (``item-0123``).

Examples
--------
>>> SHOP_NAME
'Quillbrook Provisions'
>>> len(CATALOG)
120
>>> item_name(0)
'smoked-paprika-tin'
>>> item_name(123)
'item-0123'
>>> item_index("linen-tea-towel") == CATALOG.index("linen-tea-towel")
True
"""

from __future__ import annotations

__all__ = ["CATALOG", "CATEGORIES", "SHOP_NAME", "item_index", "item_name"]

#: The invented shop's name.
SHOP_NAME: str = "Quillbrook Provisions"

#: Product ids by category, in catalogue order (six categories of twenty).
CATEGORIES: tuple[tuple[str, tuple[str, ...]], ...] = (
    (
        "pantry",
        (
            "smoked-paprika-tin",
            "sea-salt-flakes",
            "wildflower-honey-jar",
            "oat-flour-sack",
            "rye-crispbread",
            "apricot-preserve",
            "peppercorn-mill",
            "cider-vinegar-bottle",
            "olive-oil-tin",
            "dried-fig-bag",
            "chickpea-jar",
            "lentil-sack",
            "pearl-barley-bag",
            "maple-syrup-bottle",
            "walnut-halves-bag",
            "rosehip-jam",
            "caper-jar",
            "mustard-seed-pot",
            "dark-cocoa-tin",
            "fennel-seed-pot",
        ),
    ),
    (
        "tea-and-coffee",
        (
            "breakfast-tea-tin",
            "green-tea-caddy",
            "chamomile-tea-box",
            "peppermint-tea-box",
            "smoky-black-tea-tin",
            "rooibos-tea-box",
            "coffee-beans-dark",
            "coffee-beans-light",
            "ground-coffee-bag",
            "drinking-cocoa-tin",
            "chai-spice-mix",
            "loose-leaf-sampler",
            "tea-strainer",
            "pour-over-filter-pack",
            "enamel-kettle",
            "ceramic-teapot",
            "stoneware-mug",
            "glass-tumbler-pair",
            "honey-dipper",
            "sugar-cube-box",
        ),
    ),
    (
        "kitchen",
        (
            "birch-bread-board",
            "beech-spoon-set",
            "cast-iron-skillet",
            "copper-measuring-cups",
            "oak-rolling-pin",
            "linen-proofing-cloth",
            "bread-scoring-blade",
            "sourdough-starter-jar",
            "mixing-bowl-large",
            "salad-servers",
            "pestle-and-mortar",
            "cheese-grater",
            "spice-rack-small",
            "sharpening-stone",
            "butter-dish",
            "herb-scissors",
            "enamel-pie-dish",
            "cooling-rack",
            "kitchen-scale",
            "canvas-apron",
        ),
    ),
    (
        "linens",
        (
            "linen-tea-towel",
            "waffle-dish-cloth",
            "cotton-napkin-set",
            "grey-table-runner",
            "oven-glove",
            "pot-holder-pair",
            "wool-throw",
            "ochre-cushion-cover",
            "sage-bath-towel",
            "sage-hand-towel",
            "flannel-set",
            "cotton-bath-mat",
            "double-bedsheet",
            "pillowcase-pair",
            "double-duvet-cover",
            "single-quilt",
            "laundry-bag",
            "lavender-sachet",
            "drawer-liner",
            "striped-blanket",
        ),
    ),
    (
        "bakery-and-dairy",
        (
            "sourdough-loaf",
            "seeded-rye-loaf",
            "butter-croissant",
            "cinnamon-bun",
            "oat-biscuits",
            "shortbread-tin",
            "fruit-scone",
            "farmhouse-butter",
            "cultured-cream",
            "aged-cheddar-wedge",
            "goat-cheese-log",
            "blue-cheese-wedge",
            "whole-milk-bottle",
            "natural-yoghurt-pot",
            "free-range-eggs",
            "brioche-bun-pack",
            "spelt-crackers",
            "ginger-cake",
            "almond-tart",
            "honey-cake",
        ),
    ),
    (
        "garden-and-home",
        (
            "beeswax-candle",
            "soy-candle-tin",
            "long-matchbox",
            "terracotta-pot",
            "herb-seed-kit",
            "garden-twine",
            "pruning-snips",
            "small-watering-can",
            "bird-feeder",
            "compost-caddy",
            "tin-bucket",
            "jute-doormat",
            "wicker-basket",
            "storage-jar-set",
            "glass-bottle-set",
            "hanging-planter",
            "plant-mister",
            "oat-soap-bar",
            "hand-cream-tube",
            "wool-dryer-balls",
        ),
    ),
)

#: Every product id, in catalogue order; the position is the generator's item id.
CATALOG: tuple[str, ...] = tuple(name for _, names in CATEGORIES for name in names)

_INDEX: dict[str, int] = {name: i for i, name in enumerate(CATALOG)}


def item_name(i: int) -> str:
    """Return the product id printed for generated item id ``i``.

    Parameters
    ----------
    i:
        A non-negative item id. Ids below ``len(CATALOG)`` name a catalogue product; larger
        ids get ``item-`` followed by the id, zero-padded to four digits (``item-0123``,
        ``item-12345``), which never collides with a catalogue name.

    Raises
    ------
    ValueError
        If ``i`` is negative.
    """
    if i < 0:
        raise ValueError(f"item id = {i!r}: must be >= 0")
    if i < len(CATALOG):
        return CATALOG[i]
    return f"item-{i:04d}"


def item_index(name: str) -> int:
    """Return the item id that :func:`item_name` prints as ``name`` (its inverse).

    Raises
    ------
    KeyError
        If ``name`` is neither a catalogue product nor of the form ``item-NNNN``.
    """
    found = _INDEX.get(name)
    if found is not None:
        return found
    digits = name.removeprefix("item-")
    if digits != name and digits.isdigit() and digits.isascii():
        i = int(digits)
        if i >= len(CATALOG) and item_name(i) == name:
            return i
    raise KeyError(name)
