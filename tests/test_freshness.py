"""Fresh answers on a quiet feed, with a counting state that does not depend on timing.

A real ``streamcount run`` follows a real file. Its batches are cut by count (``batch_size``),
so the last partial batch of a file that stops growing is never counted into the summaries;
it is served as an exact overlay. The oracle is ``streamcount replay`` of the same file (which
presents its pending part the same way) and an exact recount of the window.
"""

from __future__ import annotations

import csv
import io
import time
from pathlib import Path

import pytest
from oracle import exact_window_counts
from service_helpers import ServiceRunner, append_bytes, basket_lines, shop_baskets

from streamcount.config.load import config_from_mapping
from streamcount.replay import replay_file

ENGINE = {
    "epsilon": 0.01,
    "max_itemset_size": 2,
    "window_size": 4000,
    "pane_size": 1000,
    "batch_size": 1000,
}


@pytest.fixture
def services(tmp_path: Path):
    runner = ServiceRunner(tmp_path)
    yield runner
    runner.close()


def _table(payload: dict) -> dict[tuple[str, ...], tuple[int, int]]:
    return {tuple(s["items"]): (s["count"], s["upper"]) for s in payload["itemsets"]}


def test_a_file_that_stops_growing_is_fully_visible_and_equals_replay(
    services: ServiceRunner, tmp_path: Path
) -> None:
    baskets = shop_baskets(5_432, seed=7)  # 432 transactions in a partial batch at the end
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"")
    service = services.start(
        {
            "input": {"path": str(feed), "poll_interval_seconds": 0.05},
            "engine": ENGINE,
            "rules": {"min_support": 0.02, "max_p_value": None},
        }
    )
    append_bytes(feed, basket_lines(baskets))
    started = time.monotonic()
    status = service.wait_status(
        lambda s: s["window"]["last_seq"] == len(baskets), "the last order to show"
    )
    waited = time.monotonic() - started
    # the overlay delay (1 s) plus a publish (0.5 s) and a poll, with room for a busy machine
    assert waited < 15, waited
    assert status["overlay"] is True
    assert status["buffered_transactions"] == 432  # still not counted into the summaries
    got = service.get_json("/v1/itemsets?min_support=0.02&limit=100000")
    cfg = config_from_mapping({"engine": ENGINE, "rules": {"min_support": 0.02}})
    want = replay_file(str(feed), cfg, progress=None).report
    assert got["window"] == want["window"]
    assert _table(got) == {tuple(s["items"]): (s["count"], s["upper"]) for s in want["itemsets"]}
    # and the window is exactly the last 4,432 transactions: every count within its bounds
    exact = exact_window_counts(baskets, want["window"]["first_seq"], len(baskets), 2)
    for items, (count, upper) in _table(got).items():
        assert count <= exact[items] <= upper
    metrics = service.metrics()
    assert metrics[("streamcount_window_transactions", ())] == got["window"]["transactions"]
    assert service.stop() == 0


def _csv_rows(orders: list[tuple[str, list[str], float]]) -> bytes:
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    for oid, items, ts in orders:
        for item in items:
            writer.writerow([oid, item, f"{ts:.3f}"])
    return out.getvalue().encode()


def test_a_quiet_csv_feed_closes_its_last_orders_after_the_idle_time(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "lines.csv"
    feed.write_bytes(b"order_id,item,ts\n")
    now = time.time()
    orders = [
        (f"o{i}", ["oat-loaf", "plum-jam"] if i % 2 else ["scone"], now + i) for i in range(9)
    ]
    service = services.start(
        {
            "input": {
                "path": str(feed),
                "format": "csv",
                "poll_interval_seconds": 0.05,
                "idle_seconds": 1.0,
                "csv": {"order_close_seconds": 3600},
            },
            "engine": {**ENGINE, "batch_size": 100},
        }
    )
    append_bytes(feed, _csv_rows(orders))
    # no later row will ever close them by event time (a gap of an hour is needed): the idle
    # time (wall clock, while the file is caught up) closes them
    status = service.wait_status(
        lambda s: s["transactions_seen"] == len(orders) and s["window"]["last_seq"] == len(orders),
        "the open orders to be counted and shown",
    )
    assert status["window"]["transactions"] == len(orders)
    assert service.stop() == 0


def test_a_quiet_time_based_window_closes_its_panes_by_the_clock(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "orders.jsonl"
    feed.write_bytes(b"")
    service = services.start(
        {
            "input": {
                "path": str(feed),
                "format": "jsonl",
                "poll_interval_seconds": 0.05,
                "idle_seconds": 0.5,
            },
            "engine": {
                "epsilon": 0.0,
                "max_itemset_size": 2,
                "window_seconds": 4.0,
                "pane_seconds": 1.0,
                "batch_size": 10,
            },
        }
    )
    start = time.time()
    lines = [
        f'{{"id": {i}, "ts": {start + i * 0.01:.3f}, "items": ["scone", "plum-jam"]}}\n'
        for i in range(20)
    ]
    append_bytes(feed, "".join(lines).encode())
    service.wait_counted(20)
    # nothing more arrives: the watermark follows the clock, the panes close and the window
    # slides past them, so the window ends up empty a few seconds later
    status = service.wait_status(
        lambda s: s["window"]["transactions"] == 0 and s["transactions_seen"] == 20,
        "the quiet window to slide past its orders",
    )
    assert status["rejected"] == {}
    # an order stamped in a pane the clock has closed is now too late
    append_bytes(feed, f'{{"id": 99, "ts": {start:.3f}, "items": ["scone"]}}\n'.encode())
    status = service.wait_status(lambda s: s["rejected"].get("too_late") == 1, "too_late")
    assert service.stop() == 0
