"""Time-based windows: every pane closes in order when the watermark passes it, and the
window seen at each close holds exactly the panes closed so far (within the window span);
out-of-range timestamps are refused instead of moving the watermark."""

from __future__ import annotations

import pytest

from streamcount.config.settings import EngineConfig
from streamcount.engine.engine import Engine
from streamcount.errors import ConfigError


def _engine(**kw: object) -> tuple[Engine, list[tuple[int, float | None, int]]]:
    seen: list[tuple[int, float | None, int]] = []

    def on_close(eng: Engine) -> None:
        snap = eng.snapshot()
        seen.append((snap.transactions, snap.last_ts, snap.panes))

    cfg = dict(
        epsilon=0.0,
        max_itemset_size=2,
        window_seconds=300.0,
        pane_seconds=60.0,
        allowed_lateness_seconds=0.0,
        batch_size=5,
    )
    cfg.update(kw)
    return Engine(EngineConfig(**cfg), on_pane_closed=on_close), seen  # type: ignore[arg-type]


@pytest.mark.parametrize("chunk", [1, 7, 600])
def test_each_pane_closes_once_in_order_whatever_the_chunking(chunk: int) -> None:
    engine, seen = _engine()
    stamps = [float(t) for t in range(600)]  # one order a second, 0..599 s
    baskets = [["tea", "jam"] if t % 2 else ["tea"] for t in range(600)]
    closes = 0
    for a in range(0, 600, chunk):
        closes += engine.add(baskets[a : a + chunk], stamps[a : a + chunk]).panes_closed
        engine.check_invariants()
    # the watermark is 599 s: panes 0..8 (ending at 60..540 s) are due, pane 9 is still open
    assert closes == len(seen) == 9
    for p, (transactions, last_ts, panes) in enumerate(seen):
        # at the close of pane p the window holds panes max(0, p-4)..p, 60 orders each
        assert panes == min(p + 1, 5)
        assert transactions == 60 * panes
        assert last_ts == 60.0 * (p + 1) - 1


def test_far_future_and_non_finite_timestamps_are_refused() -> None:
    engine, _ = _engine()
    result = engine.add([["a"], ["b"], ["c"]], [1.7e12, float("nan"), 10.0])
    reasons = [(r.index, r.reason) for r in result.rejections]
    assert reasons == [(0, "wrong_type"), (1, "missing_field")]
    assert result.accepted == 1
    # the watermark did not jump: a later ordinary event is still accepted
    assert engine.add([["d"]], [20.0]).accepted == 1


def test_restore_refuses_other_pane_seconds() -> None:
    engine, _ = _engine()
    engine.add([["a", "b"]] * 10, [float(t) for t in range(10)])
    meta, arrays = engine.state()
    other = EngineConfig(
        epsilon=0.0, max_itemset_size=2, window_seconds=300.0, pane_seconds=30.0, batch_size=5
    )
    with pytest.raises(ValueError, match="pane_seconds"):
        Engine.from_state(other, meta, arrays)


@pytest.mark.parametrize(
    ("kw", "key"),
    [
        ({"window_size": 10, "pane_size": 3}, "engine.window_size"),
        ({"window_seconds": 100.0, "pane_seconds": 60.0}, "engine.window_seconds"),
        ({"window_seconds": 100.0, "pane_seconds": None}, "engine.pane_seconds"),
        ({"max_itemset_size": 0}, "engine.max_itemset_size"),
    ],
)
def test_engine_checks_its_own_settings(kw: dict[str, object], key: str) -> None:
    with pytest.raises(ConfigError, match=key.replace(".", r"\.")):
        Engine(EngineConfig(**kw))  # type: ignore[arg-type]
