"""The R-interest measure (streamcount.rules.interest) against its definition.

The definition tested is the one the module states, restated from memory of Srikant & Agrawal
(VLDB 1995) in the project's reference notes and not checked against the paper's text: an
itemset is dropped when, for one of its closest ancestors (one item replaced by its nearest
counted ancestor), its support is below R times ``supp(ancestor) * supp(item) / supp(parent)``.
Here that definition is computed by brute force from exact counts (tests/oracle.py) and the
test's own taxonomy, and compared with the measure on the engine's snapshots; with Lossy
Counting's intervals the measure may only drop what the exact counts drop.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Hashable
from pathlib import Path

import numpy as np
import pytest
from generalised_oracle import (
    COLUMNS,
    Taxonomy,
    build_engine,
    oracle_counts,
    streams,
    taxonomies,
    without_fees,
)
from hypothesis import given
from hypothesis import strategies as st

from streamcount.config.settings import RulesConfig
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.rules.derive import derive_rules
from streamcount.rules.interest import interesting

MULTI_LEVELS = (
    ("sku", "product"),
    ("sku", "category"),
    ("product", "category"),
    ("sku", "product", "category"),
)


def nearest_counted_ancestor(taxonomy: Taxonomy, item: str, levels: tuple[str, ...]) -> str | None:
    counted = {COLUMNS.index(lv) for lv in levels}
    own = taxonomy.level.get(item)
    if own is None:
        return None
    for node in taxonomy.chain(item)[1:]:
        if taxonomy.level[node] in counted and taxonomy.level[node] > own:
            return node
    return None


def definition_keeps(
    itemset: tuple[Hashable, ...],
    exact: Counter[tuple[Hashable, ...]],
    taxonomy: Taxonomy,
    levels: tuple[str, ...],
    ratio: float,
) -> bool:
    """Brute force: R-interesting with respect to every valid closest ancestor."""
    for j, z in enumerate(itemset):
        parent = nearest_counted_ancestor(taxonomy, str(z), levels)
        if parent is None:
            continue
        others = [x for i, x in enumerate(itemset) if i != j]
        if any(parent == x or parent in taxonomy.chain(str(x))[1:] for x in others):
            continue  # not a valid generalised itemset
        ancestor = tuple(sorted([*others, parent]))
        expected = exact[ancestor] * exact[(z,)] / exact[(parent,)]
        if exact[itemset] < ratio * expected * (1 - 1e-9):
            return False
    return True


def snapshot_rows(snap: WindowSnapshot, size: int) -> tuple[np.ndarray, np.ndarray, list]:
    level = snap.levels[size - 1]
    names = [tuple(sorted(snap.item_names[i] for i in row)) for row in level.items.tolist()]
    return level.items, level.upper, names


@given(
    data=st.data(),
    levels=st.sampled_from(MULTI_LEVELS),
    ratio=st.sampled_from([1.0, 1.1, 1.5, 3.0]),
)
def test_exact_verdicts_equal_the_definition(
    data: st.DataObject,
    levels: tuple[str, ...],
    ratio: float,
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    taxonomy = data.draw(taxonomies())
    baskets = data.draw(streams(taxonomy, 50))
    engine = build_engine(
        taxonomy,
        tmp_path_factory.mktemp("cat"),
        levels,
        epsilon=0.0,
        max_itemset_size=3,
        window_size=100,
        pane_size=100,
        batch_size=10,
    )
    if baskets:
        engine.add(baskets)
    engine.flush()
    snap = engine.snapshot()
    exact = oracle_counts(taxonomy, without_fees(baskets), levels, 3)
    for size in (2, 3):
        rows, upper, names = snapshot_rows(snap, size)
        verdicts = interesting(snap, rows, upper, ratio).tolist()
        expected = [definition_keeps(s, exact, taxonomy, levels, ratio) for s in names]
        assert verdicts == expected


@given(
    data=st.data(),
    levels=st.sampled_from(MULTI_LEVELS),
    epsilon=st.sampled_from([0.1, 0.2]),
)
def test_intervals_drop_only_what_exact_counts_drop(
    data: st.DataObject,
    levels: tuple[str, ...],
    epsilon: float,
    tmp_path_factory: pytest.TempPathFactory,
) -> None:
    """With intervals an itemset is dropped only when the upper bound of its count is below
    R times the lower bound of the expected count, so the exact verdict drops it too."""
    taxonomy = data.draw(taxonomies())
    baskets = data.draw(streams(taxonomy, 60))
    tmp = tmp_path_factory.mktemp("cat")
    settings = {"max_itemset_size": 3, "window_size": 100, "pane_size": 100, "batch_size": 10}
    lossy = build_engine(taxonomy, tmp, levels, epsilon=epsilon, **settings)
    if baskets:
        lossy.add(baskets)
    lossy.flush()
    snap = lossy.snapshot()
    exact = oracle_counts(taxonomy, without_fees(baskets), levels, 3)
    for size in (2, 3):
        rows, upper, names = snapshot_rows(snap, size)
        verdicts = interesting(snap, rows, upper, 1.1).tolist()
        for name, kept in zip(names, verdicts, strict=True):
            if not kept:
                assert not definition_keeps(name, exact, taxonomy, levels, 1.1), name


def test_rules_with_interest_are_a_subset(tmp_path: Path) -> None:
    taxonomy = Taxonomy(
        [("s1", "p1", "c1"), ("s2", "p1", "c1"), ("s3", "p2", "c2"), ("s4", "p2", "c2")]
    )
    rng = np.random.default_rng(3)
    baskets = [
        [str(x) for x in rng.choice(["s1", "s2", "s3", "s4", "u0"], size=2, replace=False)]
        for _ in range(300)
    ]
    engine = build_engine(
        taxonomy,
        tmp_path,
        COLUMNS,
        epsilon=0.0,
        max_itemset_size=3,
        window_size=300,
        pane_size=300,
        batch_size=100,
    )
    engine.add(baskets)
    engine.flush()
    snap = engine.snapshot()
    loose = RulesConfig(
        min_support=0.01, min_confidence=0.0, min_lift=0.0, max_p_value=None, min_interest=None
    )
    everything = {r.key for r in derive_rules(snap, loose)}
    pruned = {
        r.key
        for r in derive_rules(
            snap,
            RulesConfig(**{**_fields(loose), "min_interest": 1.5}),  # type: ignore[arg-type]
        )
    }
    assert pruned < everything  # independent choices: specific rules echo general ones


def _fields(config: RulesConfig) -> dict[str, object]:
    return {name: getattr(config, name) for name in config.__dataclass_fields__}
