"""Two workers and a merger on a real, private ``nats-server -js`` (never mocked).

The orders of an invented shop are published to two partitions (``orders.0``, ``orders.1``,
by CRC-32 of the order id as ``generate --publish`` does); workers ``w1`` and ``w2`` count one
partition each and publish their closed panes to the ``PANES`` stream; the merger merges them.
The reference for every count is ``replay`` of the same orders written to a file (one
uninterrupted process, ``streamcount.replay.replay_file``), or a brute-force recount
(tests/oracle.py) in lossy mode: nothing lost, nothing counted twice, whatever happened to a
worker, the merger or the bus.

Each partition ends with one order half a pane after the feed's last pane (a *closing* order):
it moves that worker's watermark past the last pane, so every pane of the feed closes; closing
orders are left out of the references (their pane stays open at the workers).
"""

from __future__ import annotations

import json
import random
import shutil
import subprocess
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from importlib import resources
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from nats_server import (
    NatsServer,
    add_stream,
    consumer_info,
    free_port,
    nats_server_running,
    publish,
    run_async,
)
from oracle import assert_snapshot_bounds, exact_counts
from prometheus_client import generate_latest
from service_helpers import ServiceRunner, parse_metrics, wait_until
from tools import require_tool

from streamcount.config.load import config_from_mapping, fingerprint, fingerprint_settings
from streamcount.config.settings import Config
from streamcount.demo.publish import partition_of
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.replay import replay_file
from streamcount.service.checkpoint import list_checkpoints, load_latest_checkpoint
from streamcount.service.loop import Service

T0 = 1_735_689_600.0  # 2025-01-01, a pane boundary
PANE = 5.0
ENGINE = {
    "epsilon": 0.0,
    "max_itemset_size": 3,
    "window_seconds": 4 * PANE,
    "pane_seconds": PANE,
    "batch_size": 400,
    "max_basket_items": 50,
}
WORKERS = ("w1", "w2")


@pytest.fixture
def nats(tmp_path: Path) -> Iterator[NatsServer]:
    with nats_server_running(tmp_path / "nats-store") as server:
        add_stream(server.url)
        yield server


# -- the feed ---------------------------------------------------------------------------------


def _orders(n: int, seed: int, *, start: int = 0, spacing: float = 0.005) -> list[dict[str, Any]]:
    """``n`` orders, ``spacing`` seconds apart from ``T0``: 120 products of skewed popularity,
    three of them often bought together."""
    rng = random.Random(seed)
    skus = [f"sku-{i:03d}" for i in range(120)]
    weights = [1.0 / (rank + 1) ** 0.8 for rank in range(len(skus))]
    out = []
    for i in range(start, start + n):
        basket = rng.choices(skus, weights, k=rng.randint(1, 6))
        if rng.random() < 0.1:
            basket += ["loose-tea", "scone", "clotted-cream"][: rng.randint(2, 3)]
        out.append(
            {
                "id": f"o-{i:06d}",
                "ts": round(T0 + i * spacing, 3),
                "items": list(dict.fromkeys(basket)),
            }
        )
    return out


def _partition(orders: Sequence[dict[str, Any]]) -> list[list[bytes]]:
    parts: list[list[bytes]] = [[] for _ in WORKERS]
    for order in orders:
        parts[partition_of(order["id"], len(WORKERS))].append(json.dumps(order).encode())
    return parts


def _closing(orders: Sequence[dict[str, Any]]) -> list[list[bytes]]:
    """One order per partition half a pane after the last pane of ``orders``."""
    ts = (int(max(o["ts"] for o in orders) // PANE) + 1.5) * PANE
    out: list[list[bytes]] = [[] for _ in WORKERS]
    j = 0
    while any(not p for p in out):
        oid = f"closing-{j}"
        p = partition_of(oid, len(WORKERS))
        if not out[p]:
            out[p].append(json.dumps({"id": oid, "ts": ts, "items": ["closing"]}).encode())
        j += 1
    return out


def _publish(url: str, parts: Sequence[Sequence[bytes]]) -> None:
    for p, messages in enumerate(parts):
        if messages:
            publish(url, f"orders.{p}", messages)


def _last_pane(orders: Sequence[dict[str, Any]]) -> int:
    return int(max(o["ts"] for o in orders) // PANE)


# -- configs ----------------------------------------------------------------------------------


def _mapping(
    server: NatsServer | str,
    tmp: Path,
    role: str,
    *,
    engine: dict[str, Any] | None = None,
    **extra: Any,
) -> dict[str, Any]:
    """A worker's (``w1``, ``w2``) or the merger's (``m``) settings for ``server`` (or its
    URL)."""
    url = server if isinstance(server, str) else server.url
    data: dict[str, Any] = {
        "input": {
            "source": "nats",
            "format": "jsonl",
            "idle_seconds": 3600.0,  # the clock never closes a pane: the orders are from 2025
            "dead_letter_path": str(tmp / f"dead-letter-{role}.jsonl"),
            "nats": {"servers": [url], "reconnect_wait_seconds": 0.1},
        },
        "engine": engine or ENGINE,
        "sinks": {"log": False},
        "checkpoint": {
            "checkpoint_dir": str(tmp / f"ckpt-{role}"),
            "checkpoint_interval_seconds": 0.3,
        },
    }
    if role == "m":
        data["cluster"] = {
            "role": "merger",
            "workers": list(WORKERS),
            "pane_timeout_seconds": 3600.0,
        }
    else:
        p = WORKERS.index(role)
        data["input"]["nats"].update({"subject": f"orders.{p}", "durable": role})
        data["cluster"] = {"role": "worker", "worker": role}
    for section, values in extra.items():
        data.setdefault(section, {}).update(values)
    return data


def _config(server: NatsServer | str, tmp: Path, role: str, **kw: Any) -> Config:
    data = _mapping(server, tmp, role, **kw)
    data["server"] = {"listen": None}
    return config_from_mapping(data)


class _Cluster:
    """Services run in threads of this process (each with its own registry and thread)."""

    def __init__(self) -> None:
        self.services: dict[str, Service] = {}
        self.threads: dict[str, threading.Thread] = {}
        self.failures: list[BaseException] = []

    def start(self, name: str, config: Config) -> Service:
        service = Service(config)

        def run() -> None:
            try:
                service.run(install_signals=False, turn_timeout=0.05)
            except BaseException as exc:  # reported by the test
                self.failures.append(exc)

        thread = threading.Thread(target=run, name=f"test-{name}")
        self.services[name], self.threads[name] = service, thread
        thread.start()
        return service

    def stop(self, name: str) -> Service:
        service = self.services.pop(name)
        service.request_stop()
        self.threads.pop(name).join(60)
        assert not self.failures, self.failures
        return service

    def close(self) -> None:
        for name in list(self.services):
            self.stop(name)


@pytest.fixture
def cluster() -> Iterator[_Cluster]:
    c = _Cluster()
    try:
        yield c
    finally:
        c.close()


# -- references -------------------------------------------------------------------------------


def _table(snap: WindowSnapshot) -> dict[tuple[str, ...], tuple[int, int]]:
    out = {}
    for level in snap.levels:
        rows = zip(level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True)
        for row, count, upper in rows:
            out[tuple(sorted(snap.item_names[i] for i in row))] = (count, upper)
    return out


def _replay(orders: Sequence[dict[str, Any]], config: Config, tmp: Path) -> Engine:
    feed = tmp / f"reference-{time.monotonic_ns()}.jsonl"
    feed.write_text("".join(json.dumps(o) + "\n" for o in orders), encoding="utf-8")
    return replay_file(str(feed), config, progress=None).engine


def _assert_equals_replay(
    engine: Engine, orders: Sequence[dict[str, Any]], config: Config, tmp: Path
) -> None:
    """The merged window holds exactly what one process counts from ``orders``."""
    reference = _replay(orders, config, tmp)
    got, want = engine.snapshot(), reference.fresh_snapshot()
    assert (got.transactions, got.max_error) == (want.transactions, 0)
    assert (got.first_ts, got.last_ts) == (want.first_ts, want.last_ts)
    got_table, want_table = _table(got), _table(want)
    assert len(want_table) > 100
    differing = {k: (got_table.get(k), v) for k, v in want_table.items() if got_table.get(k) != v}
    assert not differing and got_table.keys() == want_table.keys(), (
        f"{len(differing)} itemsets differ, e.g. {list(differing.items())[:5]}"
    )


def _assert_within_bounds(engine: Engine, orders: Sequence[dict[str, Any]]) -> None:
    """Lossy mode: the merged window keeps the bounds against a brute-force recount of the
    orders of its panes, with max_error the sum of every worker's pane bounds."""
    snap = engine.snapshot()
    live = engine.window.live()
    lo, hi = min(p.index for p in live), max(p.index for p in live)
    inside = [o["items"] for o in orders if lo <= int(o["ts"] // PANE) <= hi]
    assert snap.transactions == len(inside)
    assert snap.max_error == sum(p.absent_bound for p in live) > 0
    assert_snapshot_bounds(
        snap, exact_counts(inside, engine.max_itemset_size), engine.max_itemset_size
    )


def _merger_engine(directory: Path, config: Config) -> tuple[Engine, dict[str, Any]]:
    loaded = load_latest_checkpoint(
        directory, fingerprint=fingerprint(config), settings=fingerprint_settings(config)
    )
    assert loaded is not None
    meta, arrays = loaded
    return Engine.from_state(config.engine, meta["pipeline"]["engine"], arrays), meta


def _stream_headers(url: str, stream: str) -> list[tuple[str, str, int]]:
    """``(subject, Nats-Msg-Id, size)`` of every message of a stream."""

    async def go() -> list[tuple[str, str, int]]:
        import nats as nats_client

        nc = await nats_client.connect(url)
        try:
            js = nc.jetstream()
            state = (await js.stream_info(stream)).state
            out = []
            for seq in range(state.first_seq, state.last_seq + 1):
                msg = await js.get_msg(stream, seq)
                out.append((msg.subject, (msg.headers or {}).get("Nats-Msg-Id", ""), len(msg.data)))
            return out
        finally:
            await nc.close()

    return run_async(go())


def _closed_through(service: Service) -> int | None:
    return service.api.status()["cluster"]["closed_through_pane"]


# -- tests ------------------------------------------------------------------------------------


def test_chunked_summaries_and_the_merged_window_equals_replay(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    orders = _orders(8000, seed=1)
    _publish(nats.url, _partition(orders))
    _publish(nats.url, _closing(orders))
    small = {"max_message_bytes": 4096}  # a pane's summary (tens of kB) travels in chunks
    for w in WORKERS:
        cluster.start(w, _config(nats, tmp_path, w, cluster=small))
    config = _config(nats, tmp_path, "m")
    merger = cluster.start("m", config)
    last = _last_pane(orders)
    wait_until(lambda: _closed_through(merger) == last, f"the merger to close pane {last}")
    status = merger.api.status()["cluster"]
    assert status["incomplete_panes"] == [] and status["summaries"].get("refused", 0) == 0
    _assert_equals_replay(merger.pipeline.engine, orders, config, tmp_path)

    messages = _stream_headers(nats.url, "PANES")
    summaries = {mid.rsplit(":", 2)[0] for _, mid, _ in messages}  # worker:pane
    assert len(messages) > 3 * len(summaries)  # most panes took several chunks
    assert all(size <= 4096 for _, _, size in messages)
    assert {subject for subject, _, _ in messages} == {"panes.w1", "panes.w2"}
    assert len({mid for _, mid, _ in messages}) == len(messages)  # one id per chunk
    worker = cluster.services["w1"].api.status()["cluster"]
    assert worker["pending"] == 0 and worker["published"] >= 1 and worker["connected"]


def test_poison_summaries_are_dead_lettered_terminated_and_counting_goes_on(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    from streamcount.engine.counters import LossySummary
    from streamcount.engine.wire import PaneMeta, chunks, encode_pane

    add_stream(nats.url, "PANES", ["panes.*"])
    foreign = encode_pane(
        LossySummary(0.0, 3),
        [],
        PaneMeta(int(T0 // PANE), 0, 0.0, 3, "0" * 64, "none", None, None, "w1"),
    )
    publish(nats.url, "panes.w1", [b"not a pane summary", chunks(foreign)[0]])
    config = _config(nats, tmp_path, "m")
    stranger = encode_pane(
        LossySummary(0.0, 3),
        [],
        PaneMeta(int(T0 // PANE), 0, 0.0, 3, fingerprint(config), "none", None, None, "w9"),
    )
    publish(nats.url, "panes.w9", chunks(stranger))
    orders = _orders(3000, seed=2)
    _publish(nats.url, _partition(orders))
    _publish(nats.url, _closing(orders))
    for w in WORKERS:
        cluster.start(w, _config(nats, tmp_path, w))
    merger = cluster.start("m", config)
    last = _last_pane(orders)
    wait_until(lambda: _closed_through(merger) == last, f"the merger to close pane {last}")
    _assert_equals_replay(merger.pipeline.engine, orders, config, tmp_path)

    letters = [json.loads(x) for x in (tmp_path / "dead-letter-m.jsonl").read_text().splitlines()]
    assert [(d["offset"], d["reason"], d["source"]) for d in letters] == [
        (1, "bad_summary", "summaries"),
        (2, "foreign_summary", "summaries"),
        (3, "foreign_summary", "summaries"),
    ]
    assert json.loads(letters[2]["raw"])["worker"] == "w9"
    assert "fingerprint" in letters[1]["detail"]
    source = merger.inputs[0].source  # terminated with the checkpoint after them
    wait_until(lambda: source.bus_stats().terminated == 3, "the 3 messages terminated")
    assert merger.api.status()["rejected"] == {"bad_summary": 1, "foreign_summary": 2}


def test_an_idle_partition_does_not_hold_the_merger_back(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    # every order goes to partition 0; w2 never gets one. Its idle watermark (the clock,
    # after input.idle_seconds) passes the feed's panes, and the empty summary it publishes
    # there lets the merger close them: no timeout (an hour here), nothing missing
    now = time.time()
    orders = [o for o in _orders(6000, seed=13) if partition_of(o["id"], 2) == 0]
    shift = (int(now // PANE) - 12) * PANE - T0  # the feed ends about a minute ago
    for order in orders:
        order["ts"] = round(order["ts"] + shift, 3)
    publish(nats.url, "orders.0", [json.dumps(o).encode() for o in orders])
    publish(nats.url, "orders.0", _closing(orders)[0])
    cluster.start("w1", _config(nats, tmp_path, "w1"))
    cluster.start("w2", _config(nats, tmp_path, "w2", input={"idle_seconds": 0.5}))
    config = _config(nats, tmp_path, "m")
    merger = cluster.start("m", config)
    last = _last_pane(orders)
    wait_until(lambda: (_closed_through(merger) or 0) >= last, f"the merger to close pane {last}")
    status = merger.api.status()["cluster"]
    assert status["incomplete_panes"] == [] and status["last_pane"]["w2"] >= last
    worker = cluster.services["w2"]
    assert worker.pipeline.engine.transactions_seen == 0
    assert worker.api.status()["cluster"]["published"] >= 1  # empty summaries only
    _assert_equals_replay(merger.pipeline.engine, orders, config, tmp_path)


def test_a_stopped_worker_is_named_and_counted_again_when_it_returns(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    first = _orders(4000, 3)
    second = _orders(3000, 4, start=4000)
    third = _orders(4000, 5, start=7000)
    engine = {**ENGINE, "window_seconds": 16 * PANE}  # the window holds every pane of the feed
    _publish(nats.url, _partition(first))
    config = _config(nats, tmp_path, "m", engine=engine, cluster={"pane_timeout_seconds": 1.0})
    workers = {w: _config(nats, tmp_path, w, engine=engine) for w in WORKERS}
    for w in WORKERS:
        cluster.start(w, workers[w])
    merger = cluster.start("m", config)
    # the first part's panes close but its last (the next part's orders close that one)
    wait_until(lambda: (_closed_through(merger) or 0) >= _last_pane(first) - 1, "the first panes")
    cluster.stop("w2")  # a clean stop: everything it counted is published
    _publish(nats.url, _partition(second))
    # w1 goes on; the merger waits a second per pane, then closes them without w2
    wait_until(lambda: (_closed_through(merger) or 0) >= _last_pane(second) - 1, "panes without w2")
    (run,) = merger.api.status()["cluster"]["incomplete_panes"]
    assert run["missing_workers"] == ["w2"] and run["last"] >= _last_pane(second) - 1
    scrape = parse_metrics(generate_latest(merger.registry).decode())
    missing = scrape[("streamcount_cluster_missing_summaries_total", (("worker", "w2"),))]
    assert missing == run["last"] - run["first"] + 1
    assert scrape[("streamcount_cluster_panes_closed_total", (("how", "timeout"),))] >= 1

    # w2 returns and catches up: its summaries of the panes closed without it are late
    # (dead-lettered, never added); its later panes are merged as before
    back = cluster.start("w2", workers["w2"])
    wait_until(
        lambda: (back.api.status()["cluster"]["last_published_pane"] or 0) >= run["last"],
        "w2 to catch up",
    )
    _publish(nats.url, _partition(third))
    _publish(nats.url, _closing(third))
    last = _last_pane(third)
    wait_until(lambda: _closed_through(merger) == last, f"the merger to close pane {last}")
    status = merger.api.status()["cluster"]
    assert status["late"]["w2"] >= 1
    runs = status["incomplete_panes"]
    assert {w for r in runs for w in r["missing_workers"]} == {"w2"}
    letters = [json.loads(x) for x in (tmp_path / "dead-letter-m.jsonl").read_text().splitlines()]
    assert letters and {d["reason"] for d in letters} == {"late_summary"}
    late = [json.loads(d["raw"]) for d in letters]
    assert {d["worker"] for d in late} == {"w2"}
    assert all(any(r["first"] <= d["pane"] <= r["last"] for r in runs) for d in late)

    # the window holds every order but w2's in the panes closed without it
    def lost(order: dict[str, Any]) -> bool:
        pane = int(order["ts"] // PANE)
        return partition_of(order["id"], 2) == 1 and any(
            r["first"] <= pane <= r["last"] for r in runs
        )

    orders = first + second + third
    kept = [o for o in orders if not lost(o)]
    assert len(kept) < len(orders)
    _assert_equals_replay(merger.pipeline.engine, kept, config, tmp_path)


def test_alerts_on_panes_closed_without_a_worker_name_it_in_their_evidence(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    # the pair is bought only in partition 1's orders: with w2 missing its rate drops to 0,
    # a change the alert must not hide came from a missing part
    orders = _orders(8000, seed=10, spacing=0.004)
    rng = random.Random(11)
    for order in orders:
        if partition_of(order["id"], 2) == 1 and rng.random() < 0.3:
            order["items"] = list(dict.fromkeys([*order["items"], "oat-loaf", "plum-jam"]))
        else:
            order["items"] = [i for i in order["items"] if i not in ("oat-loaf", "plum-jam")]
    parts = _partition(orders)
    cut = [len([o for o in orders[:6000] if partition_of(o["id"], 2) == p]) for p in (0, 1)]
    _publish(nats.url, [parts[0][: cut[0]], parts[1][: cut[1]]])
    sink = tmp_path / "alerts.jsonl"
    config = _config(
        nats, tmp_path, "m", cluster={"pane_timeout_seconds": 1.0}, sinks={"file": str(sink)}
    )
    for w in WORKERS:
        cluster.start(w, _config(nats, tmp_path, w))
    merger = cluster.start("m", config)
    wait_until(
        lambda: (_closed_through(merger) or 0) >= _last_pane(orders[:6000]) - 1, "the first panes"
    )
    cluster.stop("w2")
    _publish(nats.url, [parts[0][cut[0] :], []])
    _publish(nats.url, [_closing(orders)[0], []])
    last = _last_pane(orders)
    wait_until(lambda: _closed_through(merger) == last, "the panes without w2")
    records = wait_until(
        lambda: [json.loads(x) for x in sink.read_text().splitlines()] if sink.exists() else [],
        "an alert",
    )
    text = resources.files("streamcount").joinpath("schemas/alert.schema.json").read_text()
    for record in records:
        jsonschema.validate(record, json.loads(text))
    faded = [
        r for r in records if r["kind"] == "faded" and {"oat-loaf", "plum-jam"} <= set(r["items"])
    ]
    assert faded, records
    (run,) = faded[0]["evidence"]["incomplete_panes"]
    assert run["missing_workers"] == ["w2"] and run["first"] <= faded[0]["pane"] <= last
    assert all("incomplete_panes" not in r["evidence"] for r in records if r["pane"] < run["first"])


def test_input_is_acknowledged_only_after_its_panes_are_on_the_bus(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster
) -> None:
    # a summaries stream that does not take the worker's subject: nothing it publishes is
    # stored, so no checkpoint may be written and no order acknowledged
    add_stream(nats.url, "PANES", ["elsewhere.*"])
    orders = _orders(3000, seed=9)
    parts = _partition(orders)
    seqs = publish(nats.url, "orders.0", parts[0] + _closing(orders)[0])
    config = _config(nats, tmp_path, "w1", cluster={"publish_timeout_seconds": 0.2})
    worker = cluster.start("w1", config)
    wait_until(lambda: worker.pipeline.engine.transactions_seen == len(parts[0]) + 1, "counted")
    wait_until(lambda: worker.api.status()["cluster"]["pending"] >= 3, "panes waiting")
    time.sleep(1.0)  # several checkpoint intervals
    assert list_checkpoints(tmp_path / "ckpt-w1") == []
    assert consumer_info(nats.url, "ORDERS", "w1").ack_floor.stream_seq == 0
    scrape = parse_metrics(generate_latest(worker.registry).decode())
    assert scrape[("streamcount_checkpoints_total", (("result", "failed"),))] >= 2
    assert not worker.api.ready()  # pane summaries cannot be delivered

    async def take_panes() -> None:
        import nats as nats_client

        nc = await nats_client.connect(nats.url)
        try:
            js = nc.jetstream()
            info = await js.stream_info("PANES")
            info.config.subjects = ["elsewhere.*", "panes.*"]
            await js.update_stream(info.config)
        finally:
            await nc.close()

    run_async(take_panes())
    wait_until(lambda: list_checkpoints(tmp_path / "ckpt-w1"), "a checkpoint")
    wait_until(
        lambda: consumer_info(nats.url, "ORDERS", "w1").ack_floor.stream_seq == seqs[-1],
        "the orders acknowledged",
    )
    status = wait_until(
        lambda: (c := worker.api.status()["cluster"])["pending"] == 0 and c, "nothing pending"
    )
    assert status["last_published_pane"] == _last_pane(orders) and status["connected"]
    published = [mid for _, mid, _ in _stream_headers(nats.url, "PANES")]
    panes = sorted({int(mid.split(":")[1]) for mid in published})
    first = int(T0 // PANE)
    # every pane of the feed; maybe an empty one just before it (the first order's watermark)
    assert [p for p in panes if p >= first] == list(range(first, _last_pane(orders) + 1))
    assert all(p >= first - 1 for p in panes)


@pytest.mark.parametrize("epsilon", [0.0, 0.01], ids=["exact", "lossy"])
def test_bus_restarts_mid_stream_lose_nothing_and_count_nothing_twice(
    nats: NatsServer, tmp_path: Path, cluster: _Cluster, epsilon: float
) -> None:
    engine = {**ENGINE, "epsilon": epsilon, "batch_size": 300}
    orders = _orders(9000, seed=6)
    parts = _partition(orders)
    thirds = [[p[i * len(p) // 3 : (i + 1) * len(p) // 3] for p in parts] for i in range(3)]
    _publish(nats.url, thirds[0])
    for w in WORKERS:
        cluster.start(w, _config(nats, tmp_path, w, engine=engine))
    config = _config(nats, tmp_path, "m", engine=engine)
    merger = cluster.start("m", config)
    wait_until(lambda: (_closed_through(merger) or 0) >= _last_pane(orders[:3000]) - 2, "counting")
    nats.restart()  # every connection drops: consumers resume, publishers publish again
    _publish(nats.url, thirds[1])
    nats.restart(kill=True)
    _publish(nats.url, thirds[2])
    _publish(nats.url, _closing(orders))
    last = _last_pane(orders)
    wait_until(
        lambda: _closed_through(merger) == last, f"the merger to close pane {last}", timeout=90
    )
    status = merger.api.status()["cluster"]
    assert status["incomplete_panes"] == [] and status["late"] == {}
    if epsilon == 0:
        _assert_equals_replay(merger.pipeline.engine, orders, config, tmp_path)
        return
    _assert_within_bounds(merger.pipeline.engine, orders)
    # and the same window as the merge of an uninterrupted run of the same settings: the
    # summaries are a function of each partition's orders alone
    reference = tmp_path / "again"
    reference.mkdir()
    with nats_server_running(reference / "store") as again:
        add_stream(again.url)
        _publish(again.url, _partition(orders))
        _publish(again.url, _closing(orders))
        quiet = _Cluster()
        try:
            for w in WORKERS:
                quiet.start(w, _config(again, reference, w, engine=engine))
            twin = quiet.start("m", _config(again, reference, "m", engine=engine))
            wait_until(lambda: _closed_through(twin) == last, "the uninterrupted merger")
            assert _table(twin.pipeline.engine.snapshot()) == _table(
                merger.pipeline.engine.snapshot()
            )
        finally:
            quiet.close()


def test_workers_and_merger_speak_tls_to_the_nats_server(
    tmp_path: Path, cluster: _Cluster, monkeypatch: pytest.MonkeyPatch
) -> None:
    """``tls://`` servers: the server's certificate is verified against the trusted
    authorities, here a private one named by ``SSL_CERT_FILE`` (README, TLS to the NATS
    server)."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.skip("the openssl command is needed to make a test certificate")
    cert, key = tmp_path / "cert.pem", tmp_path / "key.pem"
    subprocess.run(
        [
            *(openssl, "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2"),
            *("-keyout", str(key), "-out", str(cert), "-subj", "/CN=127.0.0.1"),
            *("-addext", "subjectAltName=IP:127.0.0.1"),
        ],
        check=True,
        capture_output=True,
        timeout=60,
    )
    port = free_port()
    store = tmp_path / "tls-store"
    proc = subprocess.Popen(
        [
            *(require_tool("nats-server"), "-js", "-sd", str(store), "-a", "127.0.0.1"),
            *("-p", str(port), "--tls", "--tlscert", str(cert), "--tlskey", str(key)),
            *("-l", str(tmp_path / "tls-nats.log")),
        ],
        stdin=subprocess.DEVNULL,
    )
    try:
        url = f"tls://127.0.0.1:{port}"
        # the server is up, but its certificate is trusted by nobody yet: refused
        wait_until(
            lambda: "CERTIFICATE_VERIFY_FAILED" in (_refused(url) or ""),
            "the certificate to be refused",
            timeout=20,
        )
        monkeypatch.setenv("SSL_CERT_FILE", str(cert))
        wait_until(lambda: _refused(url) is None, "a verified TLS connection", timeout=20)
        add_stream(url)
        orders = _orders(3000, seed=12)
        _publish(url, _partition(orders))
        _publish(url, _closing(orders))
        for w in WORKERS:
            cluster.start(w, _config(url, tmp_path, w))
        config = _config(url, tmp_path, "m")
        merger = cluster.start("m", config)
        last = _last_pane(orders)
        wait_until(lambda: _closed_through(merger) == last, f"the merger to close pane {last}")
        _assert_equals_replay(merger.pipeline.engine, orders, config, tmp_path)
        cluster.close()
    finally:
        proc.terminate()
        proc.wait(30)


def _refused(url: str) -> str | None:
    """Why a TLS connection to ``url`` fails (``None``: it works)."""

    errors: list[str] = []

    async def note(exc: Exception) -> None:
        errors.append(f"{type(exc).__name__}: {exc}")

    async def go() -> None:
        import nats as nats_client

        nc = await nats_client.connect(
            url, connect_timeout=2, max_reconnect_attempts=1, allow_reconnect=False, error_cb=note
        )
        await nc.close()

    try:
        run_async(go())
    except Exception as exc:
        return "; ".join([*errors, f"{type(exc).__name__}: {exc}"])
    return None


# -- processes killed at random moments (subprocesses, SIGKILL) --------------------------------


def _yaml(server: NatsServer, tmp: Path, role: str, interval: float, **kw: Any) -> dict[str, Any]:
    data = _mapping(server, tmp, role, **kw)
    data["checkpoint"]["checkpoint_interval_seconds"] = interval
    data["server"] = {"listen": "127.0.0.1:0"}
    return data


def _kill_cycles(
    rng: random.Random,
    url: str,
    parts: list[list[bytes]],
    kills: int,
    start: Callable[[], Any],
    progress: Callable[[Any], int],
    checkpointed: Callable[[], int],
) -> list[int]:
    """Publish the feed in ``kills`` slices, partition 1 one slice behind partition 0 (so the
    merger holds w1's panes waiting for w2's); during each slice start the victim, let it make
    some progress and SIGKILL it at a random moment. Returns what the victim's checkpoint held
    after each kill. The rest of partition 1 is left to the caller."""
    sent = [0] * len(parts)
    held = []
    for cycle in range(kills):
        victim = start()
        before = progress(victim)
        for p, messages in enumerate(parts):
            share = len(messages) * (cycle + 1 - p) // kills
            while sent[p] < share:
                k = min(rng.randint(50, 400), share - sent[p])
                publish(url, f"orders.{p}", messages[sent[p] : sent[p] + k])
                sent[p] += k
        wait_until(lambda v=victim, b=before: progress(v) > b, "progress before the kill")
        time.sleep(rng.uniform(0.0, 0.4))
        victim.kill()
        held.append(checkpointed())
    publish(url, "orders.1", parts[1][sent[1] :])
    return held


def _checkpointed(directory: Path, config: Config) -> int:
    """Transactions the newest checkpoint in ``directory`` holds (0: none yet)."""
    loaded = load_latest_checkpoint(
        directory, fingerprint=fingerprint(config), settings=fingerprint_settings(config)
    )
    return 0 if loaded is None else int(loaded[0]["pipeline"]["engine"]["transactions_seen"])


@pytest.mark.slow
@pytest.mark.parametrize("epsilon", [0.0, 0.01], ids=["exact", "lossy"])
def test_a_worker_killed_at_random_moments_counts_exactly_once(
    nats: NatsServer, tmp_path: Path, services: ServiceRunner, epsilon: float
) -> None:
    rng = random.Random(20250301)
    orders = _orders(16000, seed=7)
    parts = _partition(orders)
    interval = rng.uniform(0.05, 0.2)
    engine = {**ENGINE, "epsilon": epsilon, "batch_size": 300}
    w2 = services.start(_yaml(nats, tmp_path, "w2", interval, engine=engine))
    merger = services.start(_yaml(nats, tmp_path, "m", interval, engine=engine))
    w1_config = _yaml(nats, tmp_path, "w1", interval, engine=engine)
    held = _kill_cycles(
        rng,
        nats.url,
        parts,
        10,
        lambda: services.start(w1_config),
        lambda v: v.status()["transactions_seen"],
        lambda: _checkpointed(tmp_path / "ckpt-w1", _config(nats, tmp_path, "w1", engine=engine)),
    )
    assert held == sorted(held) and sum(0 < n < len(parts[0]) for n in held) >= 5, held
    w1 = services.start(w1_config)
    _publish(nats.url, _closing(orders))
    last = _last_pane(orders)
    merger.wait_status(lambda s: s["cluster"]["closed_through_pane"] == last, "every pane merged")
    status = merger.status()["cluster"]
    assert status["incomplete_panes"] == [] and status["summaries"].get("refused", 0) == 0
    for process in (w1, w2, merger):
        assert process.stop() == 0, process.describe()
    config = _config(nats, tmp_path, "m", engine=engine)
    merged, _ = _merger_engine(tmp_path / "ckpt-m", config)
    if epsilon == 0:
        _assert_equals_replay(merged, orders, config, tmp_path)
    else:
        _assert_within_bounds(merged, orders)


@pytest.mark.slow
def test_the_merger_killed_at_random_moments_counts_exactly_once(
    nats: NatsServer, tmp_path: Path, services: ServiceRunner
) -> None:
    rng = random.Random(20250302)
    orders = _orders(16000, seed=8)
    parts = _partition(orders)
    interval = rng.uniform(0.05, 0.2)
    workers = [services.start(_yaml(nats, tmp_path, w, interval)) for w in WORKERS]
    m_config = _yaml(nats, tmp_path, "m", interval)
    config = _config(nats, tmp_path, "m")
    held = _kill_cycles(
        rng,
        nats.url,
        parts,
        10,
        lambda: services.start(m_config),
        lambda v: v.status()["cluster"]["summaries"].get("merged", 0),
        lambda: _checkpointed(tmp_path / "ckpt-m", config),
    )
    assert held == sorted(held) and sum(0 < n < len(orders) for n in held) >= 5, held
    merger = services.start(m_config)
    _publish(nats.url, _closing(orders))
    last = _last_pane(orders)
    merger.wait_status(lambda s: s["cluster"]["closed_through_pane"] == last, "every pane merged")
    for process in (*workers, merger):
        assert process.stop() == 0, process.describe()
    engine, meta = _merger_engine(tmp_path / "ckpt-m", config)
    assert meta["extensions"]["cluster"]["incomplete"] == []
    _assert_equals_replay(engine, orders, config, tmp_path)
