"""CSR row helpers (streamcount.engine.rows) against plain Python on lists."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st

from streamcount.engine.counters import Level
from streamcount.engine.rows import renumber, select_rows, sort_dedupe


@given(st.data(), st.integers(1, 5), st.integers(5, 40))
def test_renumber_equals_mapping_and_sorting_by_hand(
    data: st.DataObject, k: int, vocabulary: int
) -> None:
    rows = data.draw(
        st.sets(
            st.lists(st.integers(0, vocabulary - 1), min_size=k, max_size=k, unique=True).map(tuple)
        )
    )
    rows = sorted({tuple(sorted(r)) for r in rows})  # a level holds each itemset once
    ids = data.draw(st.permutations(range(vocabulary)))
    ids = [i * 3 for i in ids]  # new ids need not be dense
    f = list(range(1, len(rows) + 1))
    level = Level(
        np.array(rows, dtype=np.int32).reshape(-1, k),
        np.array(f, dtype=np.int64),
        np.array([x % 3 for x in f], dtype=np.int64),
    )
    levels = [Level.empty(j) for j in range(1, k)] + [level]
    out = renumber(levels, np.array(ids))[k - 1]
    expected = sorted(
        (tuple(sorted(ids[i] for i in row)), fv, fv % 3) for row, fv in zip(rows, f, strict=True)
    )
    got = list(zip(map(tuple, out.items.tolist()), out.f.tolist(), out.delta.tolist(), strict=True))
    assert got == expected


@given(st.lists(st.lists(st.integers(0, 30), max_size=8), max_size=30), st.data())
def test_sort_dedupe_and_select_rows_equal_plain_python(
    baskets: list[list[int]], data: st.DataObject
) -> None:
    flat = np.array([i for b in baskets for i in b], dtype=np.int32)
    lengths = np.array([len(b) for b in baskets], dtype=np.int64)
    out, out_lengths = sort_dedupe(flat, lengths, 31)
    expected = [sorted(set(b)) for b in baskets]
    assert out_lengths.tolist() == [len(b) for b in expected]
    assert out.tolist() == [i for b in expected for i in b]
    flags = data.draw(st.lists(st.booleans(), min_size=len(baskets), max_size=len(baskets)))
    keep = np.array(flags, dtype=bool)
    picked, picked_lengths = select_rows(out, out_lengths, keep)
    chosen = [b for b, k in zip(expected, keep.tolist(), strict=True) if k]
    assert picked.tolist() == [i for b in chosen for i in b]
    assert picked_lengths.tolist() == [len(b) for b in chosen]
