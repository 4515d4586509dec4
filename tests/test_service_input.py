"""What ``streamcount run`` does with its input file: rotation and truncation while running,
and every kind of bad record (dead-letter file, rejection counter, counting goes on).

The reference is a brute-force recount (``tests/oracle.py``) of the records written, with
``epsilon = 0`` so the service must match it exactly: nothing lost, nothing counted twice.
"""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path

from oracle import exact_counts
from service_helpers import (
    ServiceProcess,
    ServiceRunner,
    append_bytes,
    basket_lines,
    shop_baskets,
)

from streamcount.service.metrics import REJECT_REASONS


def _all_itemsets(service: ServiceProcess) -> dict[tuple[str, ...], int]:
    """Every tracked itemset (any support above zero) with its count; exact counts have
    ``upper == count``."""
    got = service.get_json("/v1/itemsets?min_support=0.000001&limit=10000")
    table = {}
    for s in got["itemsets"]:
        assert s["upper"] == s["count"], s
        table[tuple(s["items"])] = s["count"]
    return table


def test_rotation_and_truncation_count_every_record_once(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "orders.txt"
    baskets = shop_baskets(250, seed=21)
    first, late_old, second, third = (
        baskets[:100],
        baskets[100:120],
        baskets[120:200],
        baskets[200:],
    )
    feed.write_bytes(basket_lines(first))
    service = services.start(
        {
            "input": {"path": str(feed), "poll_interval_seconds": 0.05},
            # exact counts in one pane that holds everything, each transaction counted at once
            "engine": {
                "epsilon": 0.0,
                "window_size": 10000,
                "pane_size": 10000,
                "batch_size": 1,
                "max_itemset_size": 2,
            },
            "alerts": {"surge": False},
        }
    )
    service.wait_counted(100)

    # rotation by rename: the old file gets a last write after the rename, then a new file
    os.rename(feed, tmp_path / "orders.txt.1")
    append_bytes(tmp_path / "orders.txt.1", basket_lines(late_old))
    feed.write_bytes(basket_lines(second))
    service.wait_counted(200)
    service.wait_log(r"orders\.txt was rotated")

    # truncation in place, then new records from offset 0
    with open(feed, "r+b") as fh:
        fh.truncate(0)
    service.wait_log(r"orders\.txt was truncated")
    append_bytes(feed, basket_lines(third))
    status = service.wait_counted(250)
    assert status["window"]["transactions"] == 250

    assert _all_itemsets(service) == dict(exact_counts(baskets, 2))
    metrics = service.metrics()
    assert metrics[("streamcount_transactions_total", ())] == 250
    assert (
        sum(v for (name, _), v in metrics.items() if name == "streamcount_records_rejected_total")
        == 0
    )
    assert service.stop() == 0


def _record(ident: int, ts: object, items: object, **extra: object) -> bytes:
    return json.dumps({"id": ident, "ts": ts, "items": items, **extra}).encode()


def test_bad_records_are_set_aside_and_counting_goes_on(
    services: ServiceRunner, tmp_path: Path
) -> None:
    feed = tmp_path / "orders.jsonl"
    feed.write_bytes(b"")
    service = services.start(
        {
            "input": {
                "path": str(feed),
                "format": "jsonl",
                "max_record_bytes": 300,
                "poll_interval_seconds": 0.05,
            },
            # a time-based window of 10 panes of 60 s; a pane is closed 30 s after its end
            "engine": {
                "epsilon": 0.0,
                "window_seconds": 600,
                "pane_seconds": 60,
                "allowed_lateness_seconds": 30,
                "batch_size": 1,
                "max_basket_items": 8,
                "max_itemset_size": 2,
            },
            "alerts": {"surge": False},
        }
    )
    content = bytearray()
    good: list[list[str]] = []
    expected: dict[int, str] = {}  # byte offset of each bad record -> its reason

    def write(line: bytes, reason: str | None = None, items: list[str] | None = None) -> None:
        if reason is not None:
            expected[len(content)] = reason
        if items is not None:
            good.append(items)
        content.extend(line + b"\n")

    baskets = shop_baskets(60, seed=8, max_items=3)
    for i, basket in enumerate(baskets[:30]):
        write(_record(i, 1000 + i, basket), items=basket)
    write(b'{"id": 100, "ts": 1040, "items": ["scone"', "malformed")
    write(b'{"id": 101, "ts": 1040, "items": ["sc\xffone"]}', "bad_encoding")
    write(_record(102, 1040, ["scone"], note="x" * 400), "too_long")
    write(_record(103, 1040, [f"a{k}" for k in range(9)]), "too_many_items")
    write(_record(104, 1040, "scone"), "wrong_type")
    write(_record(105, "yesterday", ["scone"]), "wrong_type")
    write(b'{"id": 106, "ts": 1040}', "missing_field")
    write(b'{"id": 107, "items": ["scone"]}', "missing_field")  # no time, time-based window
    write(_record(108, 1040, []), "empty")
    for i, basket in enumerate(baskets[30:45]):
        write(_record(200 + i, 1100 + 10 * i, basket), items=basket)  # up to ts 1240
    append_bytes(feed, bytes(content))
    service.wait_status(
        lambda s: s["transactions_seen"] == 45 and s["window"]["transactions"] == 45,
        "the 45 good records of the first part counted",
    )

    # a late event: ts 1000 falls in pane 16 (960..1020), closed once the watermark
    # (max ts 1300 - 30 s lateness) passed the end of pane 20; good records after it count
    start = len(content)
    write(_record(300, 1300, ["oat-loaf"]), items=["oat-loaf"])
    write(_record(301, 1000, ["scone", "plum-jam"]), "too_late")
    for i, basket in enumerate(baskets[45:]):
        write(_record(400 + i, 1301 + i, [*basket, "marker"]), items=[*basket, "marker"])
    append_bytes(feed, bytes(content[start:]))
    # (status "rejected" holds every rejection by reason, the decoder's and the engine's)
    want_rejected = dict(Counter(expected.values()))
    service.wait_status(
        lambda s: (
            s["transactions_seen"] == len(good)
            and s["window"]["transactions"] == len(good)
            and s["rejected"] == want_rejected
        ),
        f"all {len(good)} good records counted and the late one set aside",
    )

    # the window (panes 13..22) holds every good record: counts match a recount exactly
    assert _all_itemsets(service) == dict(exact_counts(good, 2))
    assert service.request("GET", "/healthz").status == 200

    # each bad record is in the dead-letter file with its reason and byte offset
    letters = [
        json.loads(line)
        for line in (tmp_path / "dead-letter.jsonl").read_text(encoding="utf-8").splitlines()
    ]
    assert {d["offset"]: d["reason"] for d in letters} == expected
    assert len(letters) == len(expected)
    for d in letters:
        assert d["detail"], d
        raw = content[d["offset"] : content.index(b"\n", d["offset"])]
        if d["reason"] == "too_long":
            assert len(raw) > 300 and d["raw"].encode() == raw[:300]
        else:
            assert d["raw"].encode("utf-8", "surrogateescape") == raw or "\\x" in d["raw"]

    # and streamcount_records_rejected_total counts them by reason
    metrics = service.metrics()
    by_reason = Counter(expected.values())
    for reason in REJECT_REASONS:
        value = metrics[("streamcount_records_rejected_total", (("reason", reason),))]
        assert value == by_reason.get(reason, 0), reason
    assert metrics[("streamcount_transactions_total", ())] == len(good)
    assert service.stop() == 0
