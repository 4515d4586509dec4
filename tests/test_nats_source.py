"""The ``nats`` source against a real, private ``nats-server -js`` (never mocked).

The reference for every count is ``replay`` of the same records written to a file (an
uninterrupted in-process count, ``streamcount.replay.replay_file``), compared itemset by
itemset: nothing lost, nothing counted twice, whatever happened to the bus or the service.
"""

from __future__ import annotations

import json
import random
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest
from nats_server import (
    NatsServer,
    add_stream,
    consumer_info,
    nats_server_running,
    publish,
    stream_info,
)
from service_helpers import ServiceRunner, wait_until

from streamcount.config.load import config_from_mapping, fingerprint, fingerprint_settings
from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.intake.records import Decoded
from streamcount.intake.sources.nats import JetStreamSource, StreamGapError
from streamcount.replay import replay_file
from streamcount.service.checkpoint import load_latest_checkpoint
from streamcount.service.loop import Service

#: Lossy Counting with real deletions (bucket width 100) over a sliding count-based window
ENGINE = {
    "epsilon": 0.01,
    "window_size": 4000,
    "pane_size": 1000,
    "batch_size": 500,
    "max_itemset_size": 3,
    "max_basket_items": 50,
}


@pytest.fixture
def nats(tmp_path: Path) -> Iterator[NatsServer]:
    with nats_server_running(tmp_path / "nats-store") as server:
        add_stream(server.url)
        yield server


def _orders(n: int, seed: int, start: int = 0) -> list[bytes]:
    """``n`` JSON orders of an invented shop: 300 products with skewed popularity and three
    often bought together."""
    rng = random.Random(seed)
    skus = [f"sku-{i:03d}" for i in range(300)]
    weights = [1.0 / (rank + 1) ** 0.8 for rank in range(len(skus))]
    out = []
    for i in range(start, start + n):
        basket = rng.choices(skus, weights, k=rng.randint(1, 8))
        if rng.random() < 0.1:
            basket += ["loose-tea", "scone", "clotted-cream"][: rng.randint(2, 3)]
        order = {"id": f"o-{i:06d}", "ts": 1_735_689_600 + i, "items": list(dict.fromkeys(basket))}
        out.append(json.dumps(order).encode())
    return out


def _config(server: NatsServer, tmp_path: Path, **sections: Any) -> Config:
    data: dict[str, Any] = {
        "input": {
            "source": "nats",
            "format": "jsonl",
            "dead_letter_path": str(tmp_path / "dead-letter.jsonl"),
            "nats": {"servers": [server.url], "reconnect_wait_seconds": 0.1},
        },
        "engine": ENGINE,
        "server": {"listen": None},
        "sinks": {"log": False},
    }
    for key, value in sections.items():
        if key == "nats":
            data["input"]["nats"].update(value)
        elif key == "input":
            data["input"].update(value)
        else:
            data[key] = value
    return config_from_mapping(data)


def _run(config: Config, until: Callable[[Service], bool], *, timeout: float = 60.0) -> Service:
    """Run a :class:`Service` in this thread until ``until(service)`` holds (then a clean
    stop: final checkpoint, sources closed)."""
    service = Service(config)
    deadline = time.monotonic() + timeout

    def go_on(svc: Service) -> bool:
        if until(svc):
            return False
        assert time.monotonic() < deadline, f"timed out: {svc.pipeline.engine.transactions_seen}"
        return True

    service.run(install_signals=False, on_turn=go_on, turn_timeout=0.05)
    return service


def _seen(n: int) -> Callable[[Service], bool]:
    return lambda svc: svc.pipeline.engine.transactions_seen >= n


def _table(snap: WindowSnapshot) -> dict[tuple[str, ...], tuple[int, int]]:
    out = {}
    for level in snap.levels:
        for row, count, upper in zip(
            level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True
        ):
            out[tuple(sorted(snap.item_names[i] for i in row))] = (count, upper)
    return out


def _assert_same_as_replay(engine: Engine, records: list[bytes], config: Config, tmp: Path) -> None:
    """``engine`` holds exactly what replay counts from ``records`` written one per line."""
    feed = tmp / f"reference-{time.monotonic_ns()}.jsonl"
    feed.write_bytes(b"".join(r + b"\n" for r in records))
    reference = replay_file(str(feed), config, progress=None).engine
    # neither counts its last partial batch into the summaries; both show it as an overlay
    got, want = engine.fresh_snapshot(), reference.fresh_snapshot()
    assert engine.window.buffered == reference.window.buffered
    assert engine.transactions_seen == reference.transactions_seen
    assert (got.first_seq, got.last_seq, got.transactions, got.max_error) == (
        want.first_seq,
        want.last_seq,
        want.transactions,
        want.max_error,
    )
    got_table, want_table = _table(got), _table(want)
    assert len(got_table) == len(want_table) > 100
    differing = {k: (got_table.get(k), v) for k, v in want_table.items() if got_table.get(k) != v}
    assert not differing, f"{len(differing)} itemsets differ, e.g. {list(differing.items())[:5]}"


def _ndjson_messages(records: list[bytes], seed: int) -> list[bytes]:
    """The records grouped into NDJSON messages of 1 to 60 lines."""
    rng = random.Random(seed)
    out, i = [], 0
    while i < len(records):
        k = rng.randint(1, 60)
        out.append(b"\n".join(records[i : i + k]) + b"\n")
        i += k
    return out


@pytest.mark.parametrize("batched", [False, True], ids=["one_per_message", "ndjson_batches"])
def test_counts_equal_replay_and_each_batch_is_acknowledged(
    nats: NatsServer, tmp_path: Path, batched: bool
) -> None:
    records = _orders(6000, seed=1)
    messages = _ndjson_messages(records, seed=2) if batched else records
    seqs = publish(nats.url, "orders.0", messages)
    config = _config(nats, tmp_path)  # no checkpoints: each counted batch is acknowledged
    service = _run(config, _seen(len(records)))
    source = service.inputs[0].source
    assert isinstance(source, JetStreamSource)
    assert source.position() == {"stream": "ORDERS", "seq": seqs[-1]}
    _assert_same_as_replay(service.pipeline.engine, records, config, tmp_path)
    info = consumer_info(nats.url)
    assert info.ack_floor.stream_seq == seqs[-1]
    assert info.num_ack_pending == 0 and info.num_pending == 0
    stats = source.bus_stats()
    assert (stats.redeliveries, stats.reconnects, stats.gap_messages) == (0, 0, 0)


def test_acknowledged_only_at_checkpoints_and_resumed_after_the_last(
    nats: NatsServer, tmp_path: Path
) -> None:
    records = _orders(5000, seed=3)
    checkpoints = {"checkpoint_dir": str(tmp_path / "ckpt"), "checkpoint_interval_seconds": 3600}
    config = _config(nats, tmp_path, checkpoint=checkpoints)
    first = publish(nats.url, "orders.0", records[:3000])
    seen_before_stop: list[int] = []

    def until(svc: Service) -> bool:
        if svc.pipeline.engine.transactions_seen < 3000:
            return False
        # counted, not yet checkpointed: nothing acknowledged
        seen_before_stop.append(consumer_info(nats.url).ack_floor.stream_seq)
        return True

    service = _run(config, until)
    assert seen_before_stop == [0]
    # the final checkpoint holds sequence 3000, and everything up to it is acknowledged
    assert consumer_info(nats.url).ack_floor.stream_seq == first[-1] == 3000
    assert service.positions() == {"nats": {"stream": "ORDERS", "seq": 3000}}

    publish(nats.url, "orders.0", records[3000:])
    resumed = _run(config, _seen(5000))
    assert consumer_info(nats.url).ack_floor.stream_seq == 5000
    _assert_same_as_replay(resumed.pipeline.engine, records, config, tmp_path)


def test_undecodable_messages_are_dead_lettered_and_terminated(
    nats: NatsServer, tmp_path: Path
) -> None:
    # terminations are published by the server as advisories: keep them in a stream to read
    advisories = "$JS.EVENT.ADVISORY.CONSUMER.MSG_TERMINATED.ORDERS.streamcount"
    add_stream(nats.url, "TERMINATED", [advisories])
    good = _orders(3000, seed=4)
    bad_line = b'{"id": "x-2", "items": "tea"}'
    mixed = good[1000] + b"\n" + bad_line + b"\n" + good[1001]
    messages = [*good[:1000], b"not json at all", mixed, *good[1002:2000], b'{"items": []}']
    messages += good[2000:]
    seqs = publish(nats.url, "orders.0", messages)
    garbage_seq, mixed_seq, empty_seq = seqs[1000], seqs[1001], seqs[1000 + 1 + 1 + 998]
    checkpoints = {"checkpoint_dir": str(tmp_path / "ckpt"), "checkpoint_interval_seconds": 3600}
    config = _config(nats, tmp_path, checkpoint=checkpoints)
    service = _run(config, _seen(len(good)))
    _assert_same_as_replay(service.pipeline.engine, good, config, tmp_path)

    letters = [json.loads(x) for x in (tmp_path / "dead-letter.jsonl").read_text().splitlines()]
    assert [(d["offset"], d["reason"], d["source"]) for d in letters] == [
        (garbage_seq, "malformed", "nats"),
        (mixed_seq, "wrong_type", "nats"),
        (empty_seq, "empty", "nats"),
    ]
    assert letters[1]["raw"] == bad_line.decode()

    def terminated() -> list[int]:
        state = stream_info(nats.url, "TERMINATED").state
        return [] if state.messages < 2 else _advisory_seqs(nats.url, state.messages)

    # the two messages with nothing countable were terminated; the mixed one was not
    assert wait_until(terminated, "two termination advisories", timeout=10) == sorted(
        [garbage_seq, empty_seq]
    )
    assert service.inputs[0].source.bus_stats().terminated == 2
    assert consumer_info(nats.url).ack_floor.stream_seq == seqs[-1]


def _advisory_seqs(url: str, count: int) -> list[int]:
    from nats_server import run_async

    async def go() -> list[int]:
        import nats as nats_client

        nc = await nats_client.connect(url)
        try:
            js = nc.jetstream()
            out = []
            for seq in range(1, count + 1):
                msg = await js.get_msg("TERMINATED", seq)
                out.append(int(json.loads(msg.data)["stream_seq"]))
            return sorted(out)
        finally:
            await nc.close()

    return run_async(go())


def test_retention_gap_is_refused_then_accepted_on_request(
    tmp_path: Path, services: ServiceRunner
) -> None:
    with nats_server_running(tmp_path / "store") as server:
        add_stream(server.url, max_msgs=100)  # limits retention: the oldest go first
        records = _orders(250, seed=5)
        publish(server.url, "orders.0", records[:50])
        checkpoints = {
            "checkpoint_dir": str(tmp_path / "ckpt"),
            "checkpoint_interval_seconds": 3600,
        }
        config = _config(server, tmp_path, checkpoint=checkpoints)
        _run(config, _seen(50))  # the checkpoint holds sequence 50
        publish(server.url, "orders.0", records[50:])  # the stream keeps 151..250 only
        assert stream_info(server.url).state.first_seq == 151

        with pytest.raises(StreamGapError) as refused:
            Service(config)
        message = str(refused.value)
        assert "no longer holds sequence 51" in message and "first available: 151" in message
        assert "100 messages" in message and "--accept-gap" in message

        # the command line says the same, exits 2, and writes nothing
        yaml_config = services.write_config(
            {
                "input": {
                    "source": "nats",
                    "format": "jsonl",
                    "nats": {"servers": [server.url]},
                },
                "engine": ENGINE,
                "checkpoint": checkpoints,
            }
        )
        proc = services.run_cli("run", "--config", str(yaml_config))
        assert proc.returncode == 2, proc.stderr
        assert "no longer holds sequence 51" in proc.stderr and "--accept-gap" in proc.stderr

        accepted = config_from_mapping(
            {**_mapping(config), "input": {**_mapping(config)["input"], "nats": {
                **_mapping(config)["input"]["nats"], "accept_gap": True}}}
        )  # fmt: skip
        service = _run(accepted, _seen(150))
        source = service.inputs[0].source
        assert source.gap == {"after": 50, "first_available": 151, "messages": 100,
                              "accepted": True}  # fmt: skip
        assert source.bus_stats().gap_messages == 100
        _assert_same_as_replay(
            service.pipeline.engine, records[:50] + records[150:], config, tmp_path
        )
        # once accepted, the next start resumes normally after the new checkpoint
        publish(server.url, "orders.0", _orders(10, seed=6, start=250))
        again = _run(config, _seen(160))
        assert again.inputs[0].source.gap is None


def _mapping(config: Config) -> dict[str, Any]:
    from streamcount.config.load import config_to_mapping

    return config_to_mapping(config)


def test_server_restart_mid_stream_counts_exactly(nats: NatsServer, tmp_path: Path) -> None:
    records = _orders(8000, seed=7)
    checkpoints = {"checkpoint_dir": str(tmp_path / "ckpt"), "checkpoint_interval_seconds": 0.2}
    config = _config(nats, tmp_path, checkpoint=checkpoints)
    publish(nats.url, "orders.0", records[:3000])
    service = Service(config)
    done = threading.Event()
    failure: list[BaseException] = []

    def run() -> None:
        try:
            service.run(install_signals=False, on_turn=lambda s: not done.is_set())
        except BaseException as exc:  # reported by the test thread
            failure.append(exc)

    thread = threading.Thread(target=run)
    thread.start()
    try:
        source = service.inputs[0].source
        assert isinstance(source, JetStreamSource)
        wait_until(lambda: service.pipeline.engine.transactions_seen >= 3000, "first part")
        nats.stop()
        wait_until(lambda: not source.connected, "the source to notice the server is away")
        assert not source.bus_stats().connected
        # the service stays up and says it is not ready while the bus is away
        wait_until(lambda: not service.api.ready(), "/readyz to say the bus is away")
        assert service.api.healthy()
        status = service.api.status()
        assert status["sources"][0]["name"] == "nats"
        nats.start()
        publish(nats.url, "orders.0", records[3000:6000])
        # back on the bus before the next cut (else both cuts can fall in one back-off pause)
        wait_until(lambda: source.bus_stats().reconnects >= 1, "the first reconnection")
        nats.restart()  # once more, mid-stream, with messages waiting
        publish(nats.url, "orders.0", records[6000:])
        wait_until(lambda: service.pipeline.engine.transactions_seen >= 8000, "everything")
        wait_until(service.api.ready, "/readyz to be ready again")
        time.sleep(0.5)  # a duplicate would arrive now if the resume were wrong
    finally:
        done.set()
        thread.join(30)
    assert not failure, failure
    assert source.bus_stats().reconnects >= 2
    assert source.bus_stats().connected is False  # closed at shutdown
    _assert_same_as_replay(service.pipeline.engine, records, config, tmp_path)


def test_redelivered_messages_are_skipped(nats: NatsServer, tmp_path: Path) -> None:
    """An ack wait shorter than the gap between acknowledgements makes the server deliver
    every message again; none is handed out twice and the consumer is not re-created."""
    publish(nats.url, "orders.0", _orders(300, seed=8))
    checkpoints = {"checkpoint_dir": str(tmp_path / "ckpt"), "checkpoint_interval_seconds": 0.5}
    config = _config(nats, tmp_path, checkpoint=checkpoints, nats={"ack_wait_seconds": 1.0})
    source = JetStreamSource.from_config(config, None)
    try:
        seen: list[int] = []
        deadline = time.monotonic() + 4.0  # never acknowledged: redelivered after 1 s, 2 s...
        while time.monotonic() < deadline:
            for batch in source.read(1000, 0.1):
                assert batch.offsets is not None
                seen += batch.offsets.tolist()
        assert seen == list(range(1, 301))
        assert source.bus_stats().redeliveries >= 300
        assert source._client.rewinds == 0
    finally:
        source.close()


def test_csv_rows_on_the_bus(nats: NatsServer, tmp_path: Path) -> None:
    """CSV on a bus has no header row: numbered columns, one row per message."""
    rng = random.Random(9)
    rows, orders = [], []
    for i in range(1500):
        items = list(dict.fromkeys(rng.choices([f"sku-{k}" for k in range(40)], k=4)))
        orders.append(items)
        rows += [f"o-{i},{item},{1_735_689_600 + i}".encode() for item in items]
    publish(nats.url, "orders.0", rows)
    csv = {"header": False, "order_field": "0", "item_field": "1", "ts_field": "2"}
    config = _config(nats, tmp_path, input={"format": "csv", "csv": csv})
    held = lambda svc: svc.inputs[0].decoder.held  # noqa: E731 - orders still open
    service = _run(config, lambda s: s.pipeline.engine.transactions_seen + held(s) >= 1500)
    tail = service.inputs[0].decoder.close_all()
    service.pipeline.add(Decoded.from_transactions(tail))
    feed = tmp_path / "rows.csv"
    feed.write_bytes(b"".join(r + b"\n" for r in rows))
    reference = replay_file(str(feed), config, progress=None).engine
    engine = service.pipeline.engine
    assert engine.transactions_seen == reference.transactions_seen == 1500
    assert _table(engine.fresh_snapshot()) == _table(reference.fresh_snapshot())


def _load_engine(directory: Path, config: Config) -> tuple[Engine, dict[str, Any]] | None:
    loaded = load_latest_checkpoint(
        directory, fingerprint=fingerprint(config), settings=fingerprint_settings(config)
    )
    if loaded is None:
        return None
    meta, arrays = loaded
    return Engine.from_state(config.engine, meta["pipeline"]["engine"], arrays), meta


@pytest.mark.slow
def test_sigkill_at_random_moments_counts_exactly_once(
    nats: NatsServer, tmp_path: Path, services: ServiceRunner
) -> None:
    rng = random.Random(20250101)
    records = _orders(20000, seed=10)
    messages = _ndjson_messages(records, seed=11)
    checkpoints = tmp_path / "ckpt"
    yaml_config = {
        "input": {
            "source": "nats",
            "format": "jsonl",
            "nats": {"servers": [nats.url], "reconnect_wait_seconds": 0.1},
        },
        "engine": ENGINE,
        "checkpoint": {
            "checkpoint_dir": str(checkpoints),
            "checkpoint_interval_seconds": rng.uniform(0.05, 0.2),
        },
    }
    config = _config(nats, tmp_path)
    kills, sent, progress = 5, 0, []
    for cycle in range(kills):
        service = services.start(yaml_config)
        before = service.status()["transactions_seen"]
        share = len(messages) * (cycle + 1) // kills
        while sent < share:
            k = min(rng.randint(20, 120), share - sent)
            publish(nats.url, "orders.0", messages[sent : sent + k])
            sent += k
            time.sleep(rng.uniform(0.0, 0.05))
        # kill once this run has counted something (start-up takes a while on a busy machine)
        service.wait_status(lambda s, n=before: s["transactions_seen"] > n, "counting")
        time.sleep(rng.uniform(0.0, 0.3))
        service.kill()
        state = _load_engine(checkpoints, config)
        progress.append(0 if state is None else state[0].transactions_seen)
    assert progress == sorted(progress), progress
    assert sum(0 < seen < len(records) for seen in progress) >= 3, progress

    final = services.start(yaml_config)
    final.wait_status(lambda s: s["transactions_seen"] == len(records), "every order counted")
    assert final.stop() == 0, final.describe()
    state = _load_engine(checkpoints, config)
    assert state is not None
    engine, meta = state
    assert meta["sources"]["nats"] == {"stream": "ORDERS", "seq": len(messages)}
    _assert_same_as_replay(engine, records, config, tmp_path)


def test_starts_without_a_server_and_connects_when_one_appears(tmp_path: Path) -> None:
    from nats_server import free_port
    from tools import require_tool

    server = NatsServer(require_tool("nats-server"), tmp_path / "late-store", free_port())
    config = _config(server, tmp_path)
    source = JetStreamSource.from_config(config, None)  # nothing listens there yet
    try:
        assert not source.connected and source.read(100, 0.2) == []
        # nothing known of the bus yet: not caught up (the idle watermark and a merger's pane
        # timeout must not run on a source that has never reached its server)
        assert not source.caught_up
        server.start()  # the stream may still be missing when the source comes: it waits
        time.sleep(0.5)
        assert not source.connected and not source.caught_up
        add_stream(server.url)
        publish(server.url, "orders.0", _orders(50, seed=12))
        wait_until(lambda: source.connected, "the source to connect")
        got: list[int] = []
        wait_until(
            lambda: got.extend(len(b) for b in source.read(100, 0.1)) or sum(got) == 50,
            "the 50 orders",
        )
        source.read(100, 0.1)
        assert source.caught_up
        assert source.bus_stats().reconnects == 0  # the first connection is no reconnection
    finally:
        source.close()
        server.stop()


def test_csv_on_the_bus_needs_numbered_columns() -> None:
    from streamcount.errors import ConfigError

    with pytest.raises(ConfigError, match=r"input\.csv\.header = True: must be false"):
        config_from_mapping({"input": {"source": "nats", "format": "csv"}})
    csv = {"header": False, "order_field": "0", "item_field": "1", "ts_field": "2"}
    config_from_mapping({"input": {"source": "nats", "format": "csv", "csv": csv}})
