"""Generalised itemsets against their definition (Srikant & Agrawal, VLDB 1995).

The oracle is the definition itself, written here without streamcount: extend each
transaction with the ancestors of its items at the levels counted (the paper's "Basic"
method), count every itemset exactly by brute force (``tests/oracle.py``), and drop the
itemsets that hold an item together with one of its own ancestors. The engine, given the same
taxonomy as a real catalogue file, must give exactly those counts when counting exactly, and
stay within the Lossy Counting bounds otherwise (Manku & Motwani 2002).

The worked example at the end is constructed here from the definitions (the paper's own
example could not be checked against its text, so it is not used); every number in it is
worked out by hand in the comments and the brute-force oracle confirms them.
"""

from __future__ import annotations

from collections.abc import Hashable
from pathlib import Path

import numpy as np
import pytest
from generalised_oracle import (
    COLUMNS,
    LEVEL_CHOICES,
    Taxonomy,
    build_engine,
    oracle_counts,
    streams,
    taxonomies,
    without_fees,
)
from hypothesis import given
from hypothesis import strategies as st
from oracle import assert_snapshot_bounds

from streamcount.config.settings import RulesConfig
from streamcount.engine.engine import Engine
from streamcount.rules.derive import derive_rules


def tracked_counts(engine: Engine) -> dict[tuple[Hashable, ...], int]:
    snap = engine.snapshot()
    out: dict[tuple[Hashable, ...], int] = {}
    for level in snap.levels:
        for row, count in zip(level.items.tolist(), level.count.tolist(), strict=True):
            out[tuple(sorted(snap.item_names[i] for i in row))] = count
    return out


# ---- exact mode: equal to the definition -----------------------------------------------------


@given(data=st.data(), levels=st.sampled_from(LEVEL_CHOICES), k=st.integers(1, 3))
def test_exact_counts_equal_the_definition(
    data: st.DataObject, levels: tuple[str, ...], k: int, tmp_path_factory: pytest.TempPathFactory
) -> None:
    taxonomy = data.draw(taxonomies())
    baskets = data.draw(streams(taxonomy, 40))
    tmp = tmp_path_factory.mktemp("cat")
    engine = build_engine(
        taxonomy,
        tmp,
        levels,
        epsilon=0.0,
        max_itemset_size=k,
        window_size=400,
        pane_size=100,
        batch_size=7,
    )
    result = engine.add(baskets) if baskets else None
    engine.flush()
    engine.check_invariants()
    kept = without_fees(baskets)
    if result is not None:
        # an order holding fees only is set aside under its own reason
        emptied = sum(1 for b in baskets if all(i.startswith("fee:") for i in b))
        assert result.rejected_by_reason.get("emptied_by_filter", 0) == emptied
        assert result.accepted == len(kept)
    assert tracked_counts(engine) == dict(oracle_counts(taxonomy, kept, levels, k))


# ---- lossy mode: within the bounds, over a sliding window ------------------------------------


@given(data=st.data(), levels=st.sampled_from(LEVEL_CHOICES), chunk=st.integers(1, 9))
def test_add_ids_maps_through_the_catalogue_as_add_does(
    data: st.DataObject,
    levels: tuple[str, ...],
    chunk: int,
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    """A feed decoded straight to ids (``Engine.add_ids``) is filtered, mapped and extended
    with ancestors exactly as the same feed given by name, and sets aside the same orders."""
    taxonomy = data.draw(taxonomies())
    baskets = data.draw(streams(taxonomy, 40))
    tmp = tmp_path_factory.mktemp("cat")
    settings = {"epsilon": 0.0, "max_itemset_size": 3, "window_size": 400, "pane_size": 100}
    by_name = build_engine(taxonomy, tmp, levels, batch_size=7, **settings)
    by_id = build_engine(taxonomy, tmp, levels, batch_size=7, **settings)
    for lo in range(0, len(baskets), chunk):
        part = baskets[lo : lo + chunk]
        a = by_name.add(part)
        flat = by_id.vocabulary.encode_flat([n for b in part for n in b])
        b = by_id.add_ids(flat, np.array([len(x) for x in part], dtype=np.int64))
        assert (a.accepted, a.rejections) == (b.accepted, b.rejections)
    by_name.flush()
    by_id.flush()
    by_id.check_invariants()
    assert tracked_counts(by_id) == tracked_counts(by_name)
    assert tracked_counts(by_id) == dict(oracle_counts(taxonomy, without_fees(baskets), levels, 3))


@given(
    data=st.data(),
    levels=st.sampled_from(LEVEL_CHOICES[2:]),
    epsilon=st.sampled_from([0.1, 0.2, 0.25]),
)
def test_lossy_counts_keep_the_bounds_of_the_definition(
    data: st.DataObject,
    levels: tuple[str, ...],
    epsilon: float,
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    taxonomy = data.draw(taxonomies())
    baskets = data.draw(streams(taxonomy, 90))
    tmp = tmp_path_factory.mktemp("cat")
    engine = build_engine(
        taxonomy,
        tmp,
        levels,
        epsilon=epsilon,
        max_itemset_size=3,
        window_size=40,
        pane_size=10,
        batch_size=10,
    )
    if baskets:
        engine.add(baskets)
    engine.flush()
    engine.check_invariants()
    snap = engine.snapshot()
    kept = without_fees(baskets)
    window = kept[snap.first_seq - 1 : snap.last_seq] if snap.first_seq else []
    exact = oracle_counts(taxonomy, window, levels, 3)
    # tracked => count <= true <= upper (an excluded itemset, true count "0" here, is never
    # tracked); untracked => true <= max_error; no false negatives at these supports
    assert_snapshot_bounds(snap, exact, 3, supports=(0.3, 0.5))


def test_no_tracked_itemset_holds_an_item_with_its_ancestor(tmp_path: Path) -> None:
    taxonomy = Taxonomy([("s1", "p1", "c1"), ("s2", "p1", "c1"), ("s3", "p2", "c1")])
    engine = build_engine(
        taxonomy,
        tmp_path,
        COLUMNS,
        epsilon=0.0,
        max_itemset_size=4,
        window_size=10,
        pane_size=10,
        batch_size=10,
    )
    engine.add([["s1", "s2", "s3"]] * 5)
    engine.flush()
    counts = tracked_counts(engine)
    assert counts[("p1", "s3")] == 5 and counts[("p1", "p2")] == 5
    assert all(not taxonomy.has_ancestor_pair(s) for s in counts)
    # s1, s2, s3 with p2 is the largest valid itemset of the extended order (p1, c1 excluded)
    assert counts[("p2", "s1", "s2")] == 5 and ("c1", "s1") not in counts


def test_max_basket_items_applies_to_the_basket_as_read(tmp_path: Path) -> None:
    # three SKUs become six items with their products; the cap of 3 still admits the order
    taxonomy = Taxonomy([("s1", "p1", "c1"), ("s2", "p2", "c1"), ("s3", "p3", "c1")])
    engine = build_engine(
        taxonomy,
        tmp_path,
        ("sku", "product"),
        epsilon=0.0,
        max_itemset_size=2,
        window_size=10,
        pane_size=10,
        batch_size=10,
        max_basket_items=3,
    )
    result = engine.add([["s1", "s2", "s3"], ["s1", "s2", "s3", "u0"]])
    assert result.accepted == 1
    assert result.rejected_by_reason == {"too_many_items": 1}


# ---- a worked example, constructed from the definitions --------------------------------------

#: The invented shop: two categories, four products, five SKUs.
WORKED_TAXONOMY = Taxonomy(
    [
        ("throw-ochre", "wool-throw", "linens"),
        ("throw-sage", "wool-throw", "linens"),
        ("cushion-ochre", "cushion-cover", "linens"),
        ("tea-breakfast", "tea", "tea-and-coffee"),
        ("tea-green", "tea", "tea-and-coffee"),
        ("mug-stoneware", "mug", "tea-and-coffee"),
    ]
)
WORKED_ORDERS = [
    ["throw-ochre", "tea-green"],
    ["throw-sage", "cushion-ochre"],
    ["throw-ochre", "mug-stoneware"],
    ["tea-breakfast", "mug-stoneware"],
    ["throw-sage", "tea-breakfast"],
    ["cushion-ochre"],
]


def test_worked_example_frequent_itemsets_and_interest(tmp_path: Path) -> None:
    """Six orders, all three levels, at a minimum count of 2 (support 1/3).

    Extended orders (by hand): 1 {throw-ochre, wool-throw, linens, tea-green, tea,
    tea-and-coffee}; 2 {throw-sage, wool-throw, linens, cushion-ochre, cushion-cover}; 3
    {throw-ochre, wool-throw, linens, mug-stoneware, mug, tea-and-coffee}; 4 {tea-breakfast,
    tea, tea-and-coffee, mug-stoneware, mug}; 5 {throw-sage, wool-throw, linens, tea-breakfast,
    tea, tea-and-coffee}; 6 {cushion-ochre, cushion-cover, linens}.

    Pairs bought at least twice, without an item and its ancestor: {wool-throw, tea} (1, 5),
    {linens, tea} (1, 5), {wool-throw, tea-and-coffee} (1, 3, 5), {linens, tea-and-coffee}
    (1, 3, 5), {throw-ochre, tea-and-coffee} (1, 3). No pair of two SKUs is bought twice: the
    throw-with-tea pattern exists at the product level only. No triple qualifies.

    R-interest at R = 1.1 (expected count from the closest ancestor = c(ancestor) x c(item) /
    c(parent)): {wool-throw, tea}: from {wool-throw, tea-and-coffee} 3 x 3/4 = 2.25, and
    2 < 2.475, dropped. {linens, tea}: the same, dropped. {throw-ochre, tea-and-coffee}: from
    {wool-throw, tea-and-coffee} 3 x 2/4 = 1.5, 2 >= 1.65, kept. {wool-throw, tea-and-coffee}:
    from {linens, tea-and-coffee} 3 x 4/5 = 2.4, 3 >= 2.64, kept. {linens, tea-and-coffee}: no
    ancestor, kept.
    """
    engine = build_engine(
        WORKED_TAXONOMY,
        tmp_path,
        COLUMNS,
        epsilon=0.0,
        max_itemset_size=3,
        window_size=6,
        pane_size=6,
        batch_size=6,
    )
    engine.add(WORKED_ORDERS)
    engine.flush()
    snap = engine.snapshot()
    frequent = {f.items: f.count for f in snap.frequent(2 / 6) if len(f.items) > 1}
    assert frequent == {
        ("tea", "wool-throw"): 2,
        ("linens", "tea"): 2,
        ("tea-and-coffee", "wool-throw"): 3,
        ("linens", "tea-and-coffee"): 3,
        ("tea-and-coffee", "throw-ochre"): 2,
    }
    # the brute-force definition agrees
    exact = oracle_counts(WORKED_TAXONOMY, WORKED_ORDERS, COLUMNS, 3)
    assert {s: c for s, c in exact.items() if len(s) > 1 and c >= 2} == frequent

    base = RulesConfig(
        min_support=2 / 6, min_confidence=0.6, min_lift=0.0, min_count=2, max_p_value=None
    )

    def rules(config: RulesConfig) -> set[tuple[tuple[str, ...], tuple[str, ...]]]:
        return {r.key for r in derive_rules(snap, config)}

    # confidence >= 0.6 (by hand): throw-ochre => tea-and-coffee 2/2; wool-throw =>
    # tea-and-coffee 3/4 and back 3/4; linens => tea-and-coffee 3/5 and back 3/4; tea =>
    # wool-throw 2/3; tea => linens 2/3 (wool-throw => tea 2/4 and linens => tea 2/5 fail)
    kept = {
        (("throw-ochre",), ("tea-and-coffee",)),
        (("wool-throw",), ("tea-and-coffee",)),
        (("tea-and-coffee",), ("wool-throw",)),
        (("linens",), ("tea-and-coffee",)),
        (("tea-and-coffee",), ("linens",)),
    }
    echoed = {(("tea",), ("wool-throw",)), (("tea",), ("linens",))}
    assert rules(RulesConfig(**{**_fields(base), "min_interest": None})) == kept | echoed
    assert rules(RulesConfig(**{**_fields(base), "min_interest": 1.1})) == kept


def _fields(config: RulesConfig) -> dict[str, object]:
    return {name: getattr(config, name) for name in config.__dataclass_fields__}


def test_worked_example_without_levels_finds_no_pair(tmp_path: Path) -> None:
    # counting SKUs only, no pair of the example is bought twice
    engine = build_engine(
        WORKED_TAXONOMY,
        tmp_path,
        ("sku",),
        epsilon=0.0,
        max_itemset_size=2,
        window_size=6,
        pane_size=6,
        batch_size=6,
    )
    engine.add(WORKED_ORDERS)
    engine.flush()
    assert [f for f in engine.snapshot().frequent(2 / 6) if len(f.items) > 1] == []


def test_snapshot_taxonomy_names_levels_and_ancestors(tmp_path: Path) -> None:
    engine = build_engine(
        WORKED_TAXONOMY,
        tmp_path,
        COLUMNS,
        epsilon=0.0,
        max_itemset_size=2,
        window_size=6,
        pane_size=6,
        batch_size=6,
    )
    engine.add([*WORKED_ORDERS, ["gift-card"]])
    snap = engine.snapshot()
    tax = snap.taxonomy
    assert tax is not None
    ids = {name: i for i, name in enumerate(snap.item_names)}
    assert tax.level_of(ids["throw-ochre"]) == "sku"
    assert tax.level_of(ids["wool-throw"]) == "product"
    assert tax.level_of(ids["linens"]) == "category"
    assert tax.level_of(ids["gift-card"]) is None
    parents = tax.parents(np.array([ids["throw-ochre"], ids["wool-throw"], ids["linens"]]))
    assert parents.tolist() == [ids["wool-throw"], ids["linens"], -1]
    assert engine.statistics().items_unknown == 1


# ---- with the release of unused names ---------------------------------------------------------


def test_released_names_leave_the_catalogue_mapping_intact(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Seasonal SKUs come and go (each seen once): the engine releases the names no pane uses,
    renumbering the ids; the catalogue's tables follow, ancestors are never released, and the
    counts still equal the definition over the window."""
    import streamcount.engine.engine as engine_module

    rows = [(f"s{i}", f"p{i % 7}", f"c{i % 3}") for i in range(7)]
    rows += [(f"season-{t}", f"p{t % 7}", f"c{t % 7 % 3}") for t in range(0, 6000, 3)]
    taxonomy = Taxonomy(rows)
    rng = np.random.default_rng(5)
    baskets = []
    for t in range(6000):
        basket = [f"s{i}" for i in rng.choice(7, size=int(rng.integers(1, 4)), replace=False)]
        if t % 3 == 0:
            basket.append(f"season-{t}")
        baskets.append(basket)
    monkeypatch.setattr(engine_module, "COMPACT_MIN_RELEASED", 50)
    engine = build_engine(
        taxonomy,
        tmp_path,
        COLUMNS,
        epsilon=0.0,
        max_itemset_size=2,
        window_size=600,
        pane_size=200,
        batch_size=100,
    )
    largest = 0
    for i in range(0, len(baskets), 250):
        engine.add(baskets[i : i + 250])
        engine.check_invariants()
        largest = max(largest, len(engine.vocabulary))
    snap = engine.snapshot()
    window = baskets[snap.first_seq - 1 : snap.last_seq]
    assert tracked_counts(engine) == dict(oracle_counts(taxonomy, window, COLUMNS, 2))
    # names were released (2,000 seasonal SKUs went through), the ancestors stayed
    # 2,017 names went through; the window (600 orders) holds about 200 seasonal ones
    assert len(engine.vocabulary) < 500 and largest < 1000
    names = set(engine.vocabulary.names)
    assert {f"p{i}" for i in range(7)} | {"c0", "c1", "c2"} <= names
    assert engine.snapshot().taxonomy.level_of(engine.vocabulary.get("p3")) == "product"
