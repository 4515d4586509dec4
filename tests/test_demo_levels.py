"""The demo shop's planted product-level pattern is found only with the product level counted.

The demo's orders (streamcount.demo.skus: SKUs, fee lines, and from order 10,000 a wool throw
with a beeswax candle, each in any variant) run through the demo's own settings twice, counting
``[sku, product]`` and ``[sku]``. The data facts come from a brute-force recount of the final
window (tests/oracle.py): the product pair clears the demo's ``min_support``, no SKU pair of
the two products does. The service must find the pattern (an alert and a rule at the product
level) with levels on, and nothing about it with SKUs only.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from oracle import count_itemset

from streamcount.demo.run import DEMO_TRANSACTIONS, demo_config, demo_orders
from streamcount.demo.skus import EVENING, EVENING_START, FEE, sku_ids, write_catalogue
from streamcount.intake.records import Decoded
from streamcount.replay import replay_decoded

THROW, CANDLE = EVENING


def run(tmp_path: Path, levels: tuple[str, ...]) -> tuple[dict, list[tuple[str, ...]], object]:
    orders = list(demo_orders(7, DEMO_TRANSACTIONS))
    catalogue = write_catalogue(tmp_path / "catalogue.csv")
    config = demo_config(None, str(catalogue), levels)
    chunks = [Decoded([list(o) for o in orders[i : i + 2000]]) for i in range(0, len(orders), 2000)]
    result = replay_decoded(chunks, config, report=("rules", "alerts"))
    return result.report, orders, result.pipeline


def involves_evening(items: list[str]) -> bool:
    bases = {i.partition("/")[0] for i in items}
    return THROW in bases and CANDLE in bases


@pytest.mark.slow
def test_the_product_pattern_is_found_only_with_levels(tmp_path: Path) -> None:
    with_levels, orders, pipeline = run(tmp_path, ("sku", "product"))
    window = with_levels["window"]
    assert (window["first_seq"], window["last_seq"]) == (10_001, 16_000)
    # the data (brute force over the window's orders, fee lines removed)
    baskets = [[i for i in o if i != FEE] for o in orders][10_000:16_000]
    as_products = [{i.partition("/")[0] for i in b} for b in baskets]
    min_count = 0.03 * len(baskets)  # the demo's rules.min_support
    assert count_itemset(as_products, EVENING) >= 2 * min_count
    best_sku_pair = max(
        count_itemset(baskets, (a, b)) for a in sku_ids(THROW) for b in sku_ids(CANDLE)
    )
    assert best_sku_pair < min_count / 2

    # levels on: found, at the product level
    emerged = [
        a
        for a in with_levels["alerts"]
        if a["kind"] == "emerged" and set(a["items"]) == set(EVENING)
    ]
    assert emerged and all(a["seq"] > EVENING_START for a in emerged)
    rules = [
        r for r in with_levels["rules"] if set(r["antecedent"] + r["consequent"]) == set(EVENING)
    ]
    assert rules
    snap = pipeline.engine.snapshot()  # type: ignore[attr-defined]
    ids = {name: i for i, name in enumerate(snap.item_names)}
    assert snap.taxonomy.level_of(ids[THROW]) == "product"
    assert snap.taxonomy.display_name(ids[THROW]) == "Wool throw"

    # SKUs only: nothing about the pattern, in rules or alerts
    skus_only, _, _ = run(tmp_path, ("sku",))
    assert not [a for a in skus_only["alerts"] if involves_evening(a["items"])]
    assert not [
        r for r in skus_only["rules"] if involves_evening(r["antecedent"] + r["consequent"])
    ]
    # the fee line is never counted, either way
    assert not [r for r in with_levels["rules"] if FEE in r["antecedent"] + r["consequent"]]
