"""examples/cluster stays true: its configs load, the workers and the merger share one settings
fingerprint (the merger refuses summaries of another), each worker reads its own partition and
publishes to its own subject, and the stream definitions are the JetStream configurations the
README describes (file storage, limits retention)."""

from __future__ import annotations

import json
from pathlib import Path

from streamcount.config.describe import fingerprint
from streamcount.config.load import load_config

EXAMPLE = Path(__file__).resolve().parents[1] / "examples" / "cluster"


def test_workers_and_merger_share_their_counting_settings() -> None:
    merger = load_config(EXAMPLE / "merger.yaml")
    workers = [load_config(EXAMPLE / f"worker-{i}.yaml") for i in (1, 2)]
    assert merger.cluster.role == "merger" and merger.cluster.workers == ("w1", "w2")
    assert {fingerprint(w) for w in workers} == {fingerprint(merger)}
    for i, worker in enumerate(workers):
        assert worker.cluster.role == "worker" and worker.cluster.worker == f"w{i + 1}"
        assert worker.input.source == ("nats",) and worker.input.nats.subject == f"orders.{i}"
        assert worker.cluster.subject == merger.cluster.subject == "panes.{worker}"
        assert worker.checkpoint.checkpoint_dir is not None
    assert len({w.input.nats.durable for w in workers}) == 2
    dirs = {c.checkpoint.checkpoint_dir for c in (*workers, merger)}
    assert len(dirs) == 3


def test_streams_use_file_storage_and_take_the_subjects() -> None:
    orders = json.loads((EXAMPLE / "streams" / "ORDERS.json").read_text(encoding="utf-8"))
    panes = json.loads((EXAMPLE / "streams" / "PANES.json").read_text(encoding="utf-8"))
    merger = load_config(EXAMPLE / "merger.yaml")
    for stream in (orders, panes):
        assert (stream["storage"], stream["retention"]) == ("file", "limits")
    assert panes["name"] == merger.cluster.stream and panes["subjects"] == ["panes.*"]
    assert orders["subjects"] == ["orders.*"]
    # a republished summary is dropped by the server within the duplicate window (1 h)
    assert panes["duplicate_window"] == 3600 * 10**9
    script = (EXAMPLE / "run.sh").read_text(encoding="utf-8")
    assert "--partitions 2" in script and "merge --config merger.yaml" in script
