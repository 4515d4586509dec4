"""``streamcount generate --publish``: the generated feed on a real, private nats-server.

The oracle for the partitions is CRC-32 computed here with :func:`binascii.crc32` (the
publisher uses zlib's), pinned by the published check value of CRC-32 (``0xCBF43926`` for
``"123456789"``, from the CRC catalogue's CRC-32/ISO-HDLC entry); the oracle for the content is
``generate`` writing the same seeded feed to stdout.
"""

from __future__ import annotations

import binascii
import json
import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest
from nats_server import NatsServer, nats_server_running, stream_info, stream_messages

GENERATE = [sys.executable, "-m", "streamcount", "generate", "--transactions", "2000"]


@pytest.fixture
def nats(tmp_path: Path):  # type: ignore[no-untyped-def]
    with nats_server_running(tmp_path / "nats-store") as server:
        yield server


def _run(*args: str, seed: str = "0") -> subprocess.CompletedProcess[str]:
    env = {"PYTHONHASHSEED": seed}
    return subprocess.run(
        [*GENERATE, *args],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
        env={**os.environ, **env},
    )


def test_crc32_is_the_standard_one() -> None:
    assert binascii.crc32(b"123456789") == 0xCBF43926


def test_orders_are_partitioned_by_crc32_of_their_id_and_nothing_is_lost(
    nats: NatsServer,
) -> None:
    proc = _run(
        "--format", "jsonl", "--publish", nats.url, "--partitions", "3",
        "--orders-per-message", "5", "--stream", "ORDERS", seed="12345",
    )  # fmt: skip
    assert proc.returncode == 0, proc.stderr
    assert "published 2000 orders" in proc.stderr
    messages = stream_messages(nats.url)
    per_subject: Counter[str] = Counter()
    published: list[bytes] = []
    for subject, data in messages:
        lines = data.decode().splitlines()
        assert 1 <= len(lines) <= 5
        for line in lines:
            oid = json.loads(line)["id"]
            assert subject == f"orders.{binascii.crc32(oid.encode()) % 3}", (subject, oid)
        per_subject[subject] += len(lines)
        published += [line.encode() for line in lines]
    # every partition's messages are full but its last
    for subject, orders in per_subject.items():
        assert sum(s == subject for s, _ in messages) == -(-orders // 5)
    assert set(per_subject) == {"orders.0", "orders.1", "orders.2"}
    reference = _run("--format", "jsonl", seed="54321")  # another hash seed, same feed
    assert reference.returncode == 0, reference.stderr
    assert sorted(published) == sorted(reference.stdout.encode().splitlines())
    config = stream_info(nats.url).config  # nats-py gives the enum's value here
    assert (config.storage, config.retention) == ("file", "limits")


def test_csv_messages_hold_the_rows_of_one_order_without_a_header(nats: NatsServer) -> None:
    proc = _run("--format", "csv", "--publish", nats.url, "--stream", "ORDERS")
    assert proc.returncode == 0, proc.stderr
    messages = stream_messages(nats.url)
    assert len(messages) == 2000
    rows = []
    for subject, data in messages:
        assert subject == "orders.0"
        ids = {line.split(",")[0] for line in data.decode().splitlines()}
        assert len(ids) == 1
        rows += data.decode().splitlines()
    reference = _run("--format", "csv")
    assert rows == reference.stdout.splitlines()[1:]  # the file's first line is its header


def test_refusals_are_one_line_and_exit_2(nats: NatsServer) -> None:
    proc = _run("--publish", nats.url, "--subject", "nowhere.{partition}")
    assert proc.returncode == 2
    assert "no stream captures the subject" in proc.stderr
    both = _run("--publish", nats.url, "--output", "x.txt")
    assert both.returncode == 2 and "not both" in both.stderr
    flat = _run("--publish", nats.url, "--subject", "orders.all", "--partitions", "2")
    assert flat.returncode == 2 and "has no {partition}" in flat.stderr
    gone = _run("--publish", "nats://127.0.0.1:1")
    assert gone.returncode == 2 and "--publish nats://127.0.0.1:1" in gone.stderr
