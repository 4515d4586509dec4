"""Merging window parts (the mergeability rule of the pane scheme, ALGORITHMS.md sections 2
and 3): the window built from its baseline and recent parts equals the window summed pane by
pane, itemset by itemset, and both hold the bounds against an exact recount."""

from __future__ import annotations

import numpy as np
from hypothesis import given
from hypothesis import strategies as st
from oracle import assert_snapshot_bounds, exact_window_counts

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import WindowSnapshot


def _as_dict(snap: WindowSnapshot) -> dict[tuple[str, ...], tuple[int, int]]:
    out = {}
    for level in snap.levels:
        rows = zip(level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True)
        for row, c, u in rows:
            out[tuple(sorted(snap.item_names[i] for i in row))] = (c, u)
    return out


@given(
    baskets=st.lists(
        st.lists(st.sampled_from("abcdefgh"), min_size=1, max_size=6), min_size=1, max_size=300
    ),
    epsilon=st.sampled_from([0.0, 0.5, 0.2, 0.1, 0.05]),
    pane_size=st.integers(3, 40),
    panes=st.integers(2, 6),
    recent=st.integers(1, 3),
    k=st.integers(1, 3),
)
def test_split_snapshot_equals_pane_sum(
    baskets: list[list[str]], epsilon: float, pane_size: int, panes: int, recent: int, k: int
) -> None:
    recent = min(recent, panes - 1)
    engine = Engine(
        EngineConfig(
            epsilon=epsilon,
            max_itemset_size=k,
            window_size=pane_size * panes,
            pane_size=pane_size,
            batch_size=pane_size,
        )
    )
    for start in range(0, len(baskets), 17):
        engine.add(baskets[start : start + 17])
        window, recent_part, baseline = engine.split_snapshot(recent)
        direct = engine.snapshot()
        assert _as_dict(window) == _as_dict(direct)
        assert (window.first_seq, window.last_seq, window.transactions, window.max_error) == (
            direct.first_seq,
            direct.last_seq,
            direct.transactions,
            direct.max_error,
        )
        assert recent_part.transactions + baseline.transactions == direct.transactions
        if direct.transactions:
            exact = exact_window_counts(baskets, window.first_seq, window.last_seq, k)
            assert_snapshot_bounds(window, exact, k)
        for level in window.levels:
            assert not level.items.flags.writeable
            assert np.all(level.count <= level.upper)
