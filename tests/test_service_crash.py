"""Crash safety of ``streamcount run``: SIGKILL at random points, SIGTERM/SIGINT, corrupt
checkpoints. Every process is real; the reference is an uninterrupted in-process replay of the
same file (``streamcount.replay.replay_file`` with the same engine settings), which must match
the service's final state itemset by itemset: nothing lost, nothing counted twice.
"""

from __future__ import annotations

import hashlib
import random
import signal
import time
from pathlib import Path
from typing import Any

import pytest
from service_helpers import ServiceProcess, ServiceRunner

from streamcount.config.load import config_from_mapping, fingerprint, fingerprint_settings
from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import WindowSnapshot
from streamcount.replay import replay_file
from streamcount.service.checkpoint import list_checkpoints, load_latest_checkpoint

#: Lossy Counting with real deletions (bucket width 100), a window of 4 panes of 5,000 that
#: slides twice over the 40,000 lines, counted in batches of 1,000
ENGINE = {
    "epsilon": 0.01,
    "window_size": 20000,
    "pane_size": 5000,
    "batch_size": 1000,
    "max_itemset_size": 3,
    "max_basket_items": 50,
}


def _feed(n: int, seed: int) -> list[bytes]:
    """``n`` basket lines of an invented shop: 400 SKUs with skewed popularity, and three
    products often bought together."""
    rng = random.Random(seed)
    skus = [f"sku-{i:04d}" for i in range(400)]
    weights = [1.0 / (rank + 1) ** 0.8 for rank in range(len(skus))]
    out = []
    for _ in range(n):
        basket = rng.choices(skus, weights, k=rng.randint(1, 10))
        if rng.random() < 0.1:
            basket += ["loose-tea", "scone", "clotted-cream"][: rng.randint(2, 3)]
        out.append((" ".join(dict.fromkeys(basket)) + "\n").encode())
    return out


def _config(feed: Path, checkpoint_dir: Path, interval: float) -> dict[str, Any]:
    return {
        "input": {"path": str(feed), "poll_interval_seconds": 0.02},
        "engine": ENGINE,
        "checkpoint": {
            "checkpoint_dir": str(checkpoint_dir),
            "checkpoint_interval_seconds": interval,
        },
    }


def _engine_config() -> Config:
    return config_from_mapping({"engine": ENGINE, "input": {"format": "basket"}})


def _load_engine(checkpoint_dir: Path) -> tuple[Engine, dict[str, Any]] | None:
    """The engine of the newest checkpoint (``None`` when there is none)."""
    cfg = _engine_config()
    loaded = load_latest_checkpoint(
        checkpoint_dir, fingerprint=fingerprint(cfg), settings=fingerprint_settings(cfg)
    )
    if loaded is None:
        return None
    meta, arrays = loaded
    return Engine.from_state(cfg.engine, meta["pipeline"]["engine"], arrays), meta


def _table(snap: WindowSnapshot) -> dict[tuple[str, ...], tuple[int, int]]:
    """Every tracked itemset of the window by names: (count, upper)."""
    out = {}
    for level in snap.levels:
        for row, count, upper in zip(
            level.items.tolist(), level.count.tolist(), level.upper.tolist(), strict=True
        ):
            out[tuple(sorted(snap.item_names[i] for i in row))] = (count, upper)
    return out


def _assert_same_as_replay(engine: Engine, feed: Path) -> None:
    reference = replay_file(str(feed), _engine_config(), progress=None).engine
    # neither flushes its last partial batch (batch cuts are count-based, so both states are a
    # function of the input alone); both present it as an exact overlay
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
    assert len(got_table) == len(want_table)
    differing = {k: (got_table.get(k), v) for k, v in want_table.items() if got_table.get(k) != v}
    assert not differing, f"{len(differing)} itemsets differ, e.g. {list(differing.items())[:5]}"


def _run_to_end(services: ServiceRunner, config: dict[str, Any]) -> ServiceProcess:
    """``run --no-follow`` from the checkpoint: must read to the end and exit 0."""
    service = services.start(config, "--no-follow", wait=False)
    code = service.wait_exit()
    assert code == 0, service.describe()
    return service


@pytest.mark.slow
def test_sigkill_at_random_points_loses_and_repeats_nothing(
    services: ServiceRunner, tmp_path: Path
) -> None:
    rng = random.Random(20240501)
    lines = _feed(40_000, seed=3)
    data = b"".join(lines)
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"")
    checkpoints = tmp_path / "checkpoints"
    config = _config(feed, checkpoints, interval=rng.uniform(0.05, 0.2))
    kills = 6
    written = 0  # bytes of ``data`` in the file
    progress = []  # transactions in the newest checkpoint after each kill
    for cycle in range(kills):
        service = services.start(config)
        # append this cycle's share in chunks (some ending mid-line), killing after a random
        # chunk; the rest of the share is written while the process is down
        quota = len(data) * (cycle + 1) // kills
        chunks = []
        while written + sum(chunks) < quota:
            chunks.append(min(rng.randint(8_000, 40_000), quota - written - sum(chunks)))
        kill_after = rng.randint(min(3, len(chunks)), len(chunks))
        for n, size in enumerate(chunks, start=1):
            with open(feed, "ab") as fh:
                fh.write(data[written : written + size])
            written += size
            time.sleep(rng.uniform(0.005, 0.04))
            if n == kill_after:
                time.sleep(rng.uniform(0.0, 0.1))
                service.kill()
        assert service.proc.returncode == -signal.SIGKILL, service.describe()
        state = _load_engine(checkpoints)
        progress.append(0 if state is None else state[0].transactions_seen)
    assert written == len(data)
    assert progress == sorted(progress), progress
    # the kills landed mid-stream: state had been saved, and more was still to come
    assert sum(0 < seen < len(lines) for seen in progress) >= 3, progress

    _run_to_end(services, config)
    state = _load_engine(checkpoints)
    assert state is not None
    engine, meta = state
    assert meta["sources"]["file"]["offset"] == len(data)
    _assert_same_as_replay(engine, feed)


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_stop_signal_writes_a_final_consistent_checkpoint(
    services: ServiceRunner, tmp_path: Path, sig: int
) -> None:
    lines = _feed(12_000, seed=4)
    data = b"".join(lines)
    feed = tmp_path / "orders.txt"
    feed.write_bytes(data[: len(data) // 3])
    checkpoints = tmp_path / "checkpoints"
    # no checkpoint on the timer: the one found afterwards is the one written at the signal
    config = _config(feed, checkpoints, interval=3600.0)
    service = services.start(config)
    cut = len(data) * 2 // 3
    with open(feed, "ab") as fh:
        fh.write(data[len(data) // 3 : cut])
    assert service.stop(sig) == 0, service.describe()
    assert "checkpoint written" in service.stderr()
    files = list_checkpoints(checkpoints)
    assert len(files) == 1, files
    state = _load_engine(checkpoints)
    assert state is not None
    engine, meta = state
    # consistent: the engine holds exactly the lines before the saved offset
    offset = meta["sources"]["file"]["offset"]
    assert engine.transactions_seen == data[:offset].count(b"\n")
    assert offset <= cut

    # and it resumes there: the rest of the file, then the same as an uninterrupted replay
    with open(feed, "ab") as fh:
        fh.write(data[cut:])
    _run_to_end(services, config)
    state = _load_engine(checkpoints)
    assert state is not None
    _assert_same_as_replay(state[0], feed)


def _digests(directory: Path) -> dict[str, str]:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in directory.iterdir()}


def _truncate(path: Path) -> None:
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])


def _flip_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x5A
    path.write_bytes(bytes(data))


@pytest.mark.parametrize("damage", ["truncated", "flipped_byte", "other_epsilon"])
def test_corrupt_checkpoint_refuses_to_start_and_fresh_starts_over(
    services: ServiceRunner, tmp_path: Path, damage: str
) -> None:
    lines = _feed(3_000, seed=5)
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"".join(lines))
    checkpoints = tmp_path / "checkpoints"
    config = _config(feed, checkpoints, interval=3600.0)
    _run_to_end(services, config)
    (path,) = list_checkpoints(checkpoints)
    if damage == "truncated":
        _truncate(path)
    elif damage == "flipped_byte":
        _flip_byte(path)
    else:
        config = {**config, "engine": {**ENGINE, "epsilon": 0.02}}
    before = _digests(checkpoints)

    refused = services.start(config, "--no-follow", wait=False)
    assert refused.wait_exit() == 2
    lines_out = refused.stderr().strip().splitlines()
    assert len(lines_out) == 1, lines_out
    message = lines_out[0]
    assert message.startswith("streamcount run: error: checkpoint "), message
    assert path.name in message and "--fresh" in message
    if damage == "other_epsilon":
        assert "engine.epsilon" in message and "other settings" in message
    else:
        assert "damaged" in message
    assert _digests(checkpoints) == before, "a refused checkpoint must be left as it was"

    fresh = services.start(config, "--no-follow", "--fresh", wait=False)
    assert fresh.wait_exit() == 0, fresh.describe()
    newest = list_checkpoints(checkpoints)[-1]
    assert newest != path
    cfg = config_from_mapping({"engine": config["engine"], "input": {"format": "basket"}})
    meta, _ = load_latest_checkpoint(
        checkpoints, fingerprint=fingerprint(cfg), settings=fingerprint_settings(cfg)
    ) or pytest.fail("no checkpoint after --fresh")
    # started over: every line counted once, not on top of the old state
    assert meta["pipeline"]["engine"]["transactions_seen"] == len(lines)


def test_a_final_checkpoint_that_fails_gives_a_nonzero_exit_naming_the_directory(
    services: ServiceRunner, tmp_path: Path
) -> None:
    lines = _feed(3_000, seed=6)
    feed = tmp_path / "orders.txt"
    feed.write_bytes(b"".join(lines))
    checkpoints = tmp_path / "checkpoints"
    service = services.start(_config(feed, checkpoints, interval=3600.0))
    service.wait_counted(3_000, last_seq=3_000)
    # the directory cannot be written when the final checkpoint is due. A chmod does not stop
    # root (CI runs as root), so a plain file takes the directory's place: creating the
    # checkpoint there fails with an OSError as a read-only directory would
    if checkpoints.exists():
        checkpoints.rename(tmp_path / "moved-away")
    checkpoints.write_bytes(b"not a directory")
    code = service.stop(signal.SIGTERM)
    err = service.stderr()
    assert code == 1, service.describe()
    assert "final checkpoint" in err and str(checkpoints) in err
    assert "checkpoint" in err.split("failed", 1)[0].splitlines()[-1]
