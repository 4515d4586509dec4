"""Published worked examples through the engine: exact mode and a small epsilon.

Sources (data and outputs restated and recomputed by enumeration in ALGORITHMS.md §7):
A. Agrawal & Srikant, "Fast Algorithms for Mining Association Rules", VLDB 1994 (the
   AprioriTid example figure; data recalled from memory, outputs recomputed).
B. Han, Kamber & Pei, Data Mining: Concepts and Techniques, 3rd ed. (2012), Table 6.1.
C. Tan, Steinbach & Kumar, Introduction to Data Mining, 1st ed. (2005/06), Table 6.1.
"""

from __future__ import annotations

import pytest
from oracle import exact_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine

# A. Agrawal & Srikant 1994, AprioriTid example (ALGORITHMS.md §7A; data [M], outputs [C])
AS94 = [["1", "3", "4"], ["2", "3", "5"], ["1", "2", "3", "5"], ["2", "5"]]
AS94_FREQUENT = {  # minsup 2 of 4 transactions
    ("1",): 2, ("2",): 3, ("3",): 3, ("5",): 3,  # L1
    ("1", "3"): 2, ("2", "3"): 2, ("2", "5"): 3, ("3", "5"): 2,  # L2
    ("2", "3", "5"): 2,  # L3; nothing larger
}  # fmt: skip
AS94_INFREQUENT = {("4",): 1, ("1", "2"): 1, ("1", "5"): 1}  # C1 / C2 counts below minsup

# B. Han, Kamber & Pei 3rd ed. 2012, Table 6.1 (ALGORITHMS.md §7B; 9-transaction table [R])
HKP = [
    ["I1", "I2", "I5"], ["I2", "I4"], ["I2", "I3"], ["I1", "I2", "I4"], ["I1", "I3"],
    ["I2", "I3"], ["I1", "I3"], ["I1", "I2", "I3", "I5"], ["I1", "I2", "I3"],
]  # fmt: skip
HKP_FREQUENT = {  # min_sup count 2: exactly these 13 (Example 6.3)
    ("I1",): 6, ("I2",): 7, ("I3",): 6, ("I4",): 2, ("I5",): 2,
    ("I1", "I2"): 4, ("I1", "I3"): 4, ("I1", "I5"): 2, ("I2", "I3"): 4, ("I2", "I4"): 2,
    ("I2", "I5"): 2,
    ("I1", "I2", "I3"): 2, ("I1", "I2", "I5"): 2,
}  # fmt: skip
# C3 candidates pruned by Apriori (ALGORITHMS.md §7B); counts recomputed by the brute-force
# oracle in the test below (not published)
HKP_INFREQUENT = {("I1", "I3", "I5"): 1, ("I2", "I3", "I4"): 0, ("I2", "I3", "I5"): 1}

# C. Tan, Steinbach & Kumar 1st ed., Table 6.1 (ALGORITHMS.md §7C; rows [R], outputs [C])
TSK = [
    ["Bread", "Milk"],
    ["Bread", "Diapers", "Beer", "Eggs"],
    ["Milk", "Diapers", "Beer", "Cola"],
    ["Bread", "Milk", "Diapers", "Beer"],
    ["Bread", "Milk", "Diapers", "Cola"],
]
TSK_FREQUENT = {  # minsup 60% (count 3)
    ("Bread",): 4, ("Milk",): 4, ("Diapers",): 4, ("Beer",): 3,
    ("Bread", "Milk"): 3, ("Bread", "Diapers"): 3, ("Diapers", "Milk"): 3, ("Beer", "Diapers"): 3,
}  # fmt: skip
# the one candidate 3-itemset has count 2, so it is not frequent; Cola 2, Eggs 1 out
TSK_INFREQUENT = {("Bread", "Diapers", "Milk"): 2, ("Cola",): 2, ("Eggs",): 1}

CASES = {
    "agrawal_srikant_1994": (AS94, 0.5, AS94_FREQUENT, AS94_INFREQUENT),
    "han_kamber_pei_table_6_1": (HKP, 2 / 9, HKP_FREQUENT, HKP_INFREQUENT),
    "tan_steinbach_kumar_table_6_1": (TSK, 0.6, TSK_FREQUENT, TSK_INFREQUENT),
}


def _run(baskets: list[list[str]], epsilon: float, pane_size: int, max_itemset_size: int = 4):
    panes = -(-len(baskets) // pane_size)
    engine = Engine(
        EngineConfig(
            epsilon=epsilon,
            max_itemset_size=max_itemset_size,
            window_size=pane_size * panes,
            pane_size=pane_size,
            batch_size=pane_size,
        )
    )
    engine.add(baskets)
    engine.flush()
    engine.check_invariants()
    snap = engine.snapshot()
    assert (snap.first_seq, snap.last_seq, snap.transactions) == (1, len(baskets), len(baskets))
    return engine, snap


def _bounds(engine: Engine, snap, names: tuple[str, ...]) -> tuple[int, int]:
    ids = [engine.vocabulary.get(n) for n in names]
    assert None not in ids
    return snap.bounds(ids)


@pytest.mark.parametrize("case", sorted(CASES))
def test_exact_mode_reproduces_published_counts(case: str) -> None:
    baskets, min_support, frequent, infrequent = CASES[case]
    engine, snap = _run(baskets, 0.0, len(baskets))
    got = {f.items: f.count for f in snap.frequent(min_support)}
    assert got == frequent  # exactly the published frequent itemsets, with their counts
    assert all(f.count == f.upper for f in snap.frequent(min_support))
    for names, count in infrequent.items():
        assert _bounds(engine, snap, names) == (count, count)
    # the independent brute-force recount agrees on every listed value
    brute = exact_counts(baskets, 4)
    for names, count in {**frequent, **infrequent}.items():
        assert brute[names] == count


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize(("epsilon", "pane_size"), [(0.01, 9), (0.2, 3), (0.34, 2), (0.5, 4)])
def test_small_epsilon_bounds_contain_published_counts(
    case: str, epsilon: float, pane_size: int
) -> None:
    baskets, min_support, frequent, infrequent = CASES[case]
    engine, snap = _run(baskets, epsilon, pane_size)
    for names, count in {**frequent, **infrequent}.items():
        low, high = _bounds(engine, snap, names)
        assert low <= count <= high, f"{names}: published {count} outside [{low}, {high}]"
        assert high - low <= snap.max_error
    reported = {f.items for f in snap.frequent(min_support)}
    if min_support * snap.transactions > snap.max_error:
        assert set(frequent) <= reported  # no false negatives
    for items in reported:
        true = {**frequent, **infrequent}.get(items, exact_counts(baskets, 4)[items])
        assert true >= min_support * snap.transactions - snap.max_error
