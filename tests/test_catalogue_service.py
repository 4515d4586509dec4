"""The catalogue in a running service: ``streamcount run`` as a real subprocess following a real
file, reloaded on SIGHUP while counting, a bad file refused at reload, and a restart from a
checkpoint with a newer file.

The reference for every count is the definition (tests/generalised_oracle.py: orders extended
with their products, counted by brute force), applied with the catalogue in force when each
order was read: the mapping changes from the next transaction after a reload, and what was
counted stays.
"""

from __future__ import annotations

import signal
from pathlib import Path

from generalised_oracle import Taxonomy, oracle_counts
from service_helpers import ServiceRunner, append_bytes, basket_lines

LEVELS = ("sku", "product")
FIRST = Taxonomy([("a1", "pa", "c"), ("a2", "pa", "c"), ("b1", "pb", "c"), ("b2", "pb", "c")])
# a2 moves from product pa to product pb
SECOND = Taxonomy([("a1", "pa", "c"), ("a2", "pb", "c"), ("b1", "pb", "c"), ("b2", "pb", "c")])
# b2 moves to a new product pc (no pair counted before becomes an item with its ancestor, so
# every count is the sum over versions of what the definition gives under each)
THIRD = Taxonomy([("a1", "pa", "c"), ("a2", "pb", "c"), ("b1", "pb", "c"), ("b2", "pc", "c")])


def catalogue_text(taxonomy: Taxonomy) -> str:
    return "sku,product\n" + "".join(f"{s},{p}\n" for s, p, _ in taxonomy.rows)


def orders(n: int, offset: int) -> list[list[str]]:
    """Deterministic orders over the four SKUs, one unknown item and a delivery fee."""
    skus = ["a1", "a2", "b1", "b2", "gift-card"]
    out = []
    for i in range(offset, offset + n):
        basket = [skus[i % 5], skus[(i * 3 + 1) % 5]]
        if i % 4 == 0:
            basket.append("fee:delivery")
        out.append(sorted(set(basket)))
    return out


def service_counts(service: object) -> dict[tuple[str, ...], int]:
    payload = service.get_json(  # type: ignore[attr-defined]
        "/v1/itemsets?min_support=0.000001&limit=100000"
    )
    return {tuple(s["items"]): s["count"] for s in payload["itemsets"]}


def expected(parts: list[tuple[Taxonomy, list[list[str]]]]) -> dict[tuple[str, ...], int]:
    total: dict[tuple[str, ...], int] = {}
    for taxonomy, baskets in parts:
        kept = [[i for i in b if not i.startswith("fee:")] for b in baskets]
        for itemset, c in oracle_counts(taxonomy, [b for b in kept if b], LEVELS, 2).items():
            key = tuple(str(i) for i in itemset)
            total[key] = total.get(key, 0) + c
    return total


def test_sighup_reload_while_counting_and_restart_with_a_newer_file(
    services: ServiceRunner, tmp_path: Path
) -> None:
    catalogue = tmp_path / "catalogue.csv"
    catalogue.write_text(catalogue_text(FIRST), encoding="utf-8")
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"")
    config = {
        "input": {"path": str(feed), "poll_interval_seconds": 0.05},
        "items": {
            "ignore": ["fee:*"],
            "catalogue": str(catalogue),
            "levels": list(LEVELS),
            "reload_seconds": None,  # SIGHUP only
        },
        "engine": {
            "epsilon": 0.0,
            "window_size": 1000,
            "pane_size": 50,
            "batch_size": 10,
            "max_itemset_size": 2,
        },
        "checkpoint": {"checkpoint_dir": str(tmp_path / "ckpt")},
    }
    service = services.start(config)
    first = orders(40, 0)
    append_bytes(feed, basket_lines(first))
    status = service.wait_counted(40)
    assert service_counts(service) == expected([(FIRST, first)])
    cat = status["catalogue"]
    assert cat["levels"] == list(LEVELS) and len(cat["history"]) == 1
    version_one = cat["version"]

    # a new file, signalled: it applies from transaction 41 on
    catalogue.write_text(catalogue_text(SECOND), encoding="utf-8")
    service.proc.send_signal(signal.SIGHUP)
    status = service.wait_status(
        lambda s: len(s["catalogue"]["history"]) == 2, "the reloaded catalogue in the status"
    )
    assert status["catalogue"]["history"][-1]["from_seq"] == 41
    assert status["catalogue"]["history"][-1]["reason"] == "signal"
    second = orders(30, 40)
    append_bytes(feed, basket_lines(second))
    status = service.wait_counted(70)
    assert service_counts(service) == expected([(FIRST, first), (SECOND, second)])
    panes = {p["pane"]: p["versions"] for p in status["catalogue"]["panes"]}
    version_two = status["catalogue"]["version"]
    # pane 0 holds orders 1-50: 1-40 under the first version, 41-50 under the second
    assert panes == {0: [version_one, version_two], 1: [version_two]}
    assert status["catalogue"]["panes_under_older_versions"] == [0]

    # a bad file: refused, the previous version stays and the status says why
    catalogue.write_text("sku,product\na1,pa\na1,pb\n", encoding="utf-8")
    service.proc.send_signal(signal.SIGHUP)
    status = service.wait_status(
        lambda s: s["catalogue"]["reloads"]["failed"] == 1, "the refused reload in the status"
    )
    assert "line 3, column 1" in status["catalogue"]["last_error"]
    assert len(status["catalogue"]["history"]) == 2
    third = orders(20, 70)
    append_bytes(feed, basket_lines(third))
    service.wait_counted(90)
    assert service_counts(service) == expected([(FIRST, first), (SECOND, second + third)])
    metrics = service.metrics()
    assert metrics[("streamcount_catalogue_reloads_total", (("result", "ok"),))] == 1
    assert metrics[("streamcount_catalogue_reloads_total", (("result", "failed"),))] == 1
    # by hand: every fourth order holds the fee (orders 0, 4, ... 88 of 90: 23 of them)
    assert metrics[("streamcount_items_ignored_total", (("filter", "fee:*"),))] == 23
    unknown = sum(b.count("gift-card") for b in first + second + third)
    assert metrics[("streamcount_catalogue_unknown_items_total", ())] == unknown
    assert service.stop() == 0

    # a restart with a newer file: recorded, the panes counted under older versions named
    catalogue.write_text(catalogue_text(THIRD), encoding="utf-8")
    service = services.start(config)
    service.wait_log(r"Live panes counted under an older version: \[0, 1\]")
    status = service.status()
    history = status["catalogue"]["history"]
    assert [e["reason"] for e in history] == ["start", "signal", "restart"]
    assert history[-1]["from_seq"] == 91
    fourth = orders(10, 90)
    append_bytes(feed, basket_lines(fourth))
    service.wait_counted(100)
    assert service_counts(service) == expected(
        [(FIRST, first), (SECOND, second + third), (THIRD, fourth)]
    )
    assert service.stop() == 0
