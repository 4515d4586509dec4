"""The merger's bookkeeping (streamcount.cluster.collect) on real encoded summaries, without a
bus: when a pane is complete, the timeout and the runs of missing workers, late, duplicate and
refused summaries, chunks, checkpoints; and the alert record's ``evidence.incomplete_panes``
against the published schema."""

from __future__ import annotations

import json
from importlib import resources

import jsonschema
import numpy as np
import pytest

from streamcount.alerts.record import Evidence
from streamcount.cluster.collect import PaneCollector
from streamcount.cluster.publisher import message_id
from streamcount.engine.counters import Level, LossySummary
from streamcount.engine.wire import CHUNK_HEADER_BYTES, PaneMeta, chunks, encode_pane
from streamcount.rules.measures import Measure

FP = "f" * 64


def _summary(
    worker: str, pane: int, baskets: list[list[str]], *, fp: str = FP, catalogue: str = "none"
) -> bytes:
    """A real pane summary (exact counts of ``baskets``) as a worker would send it."""
    names = sorted({i for b in baskets for i in b})
    ids = {n: i for i, n in enumerate(names)}
    summary = LossySummary(0.0, 2)
    if baskets:
        summary.add_baskets([[ids[i] for i in b] for b in baskets])
    meta = PaneMeta(pane, len(baskets), 0.0, 2, fp, catalogue, None, None, worker)
    return encode_pane(summary, names, meta)


def _collector(timeout: float = 10.0) -> PaneCollector:
    return PaneCollector(
        ("w1", "w2"), fingerprint=FP, epsilon=0.0, max_itemset_size=2, timeout=timeout
    )


def _send(c: PaneCollector, payload: bytes, now: float = 0.0, room: int = 1 << 20) -> list[str]:
    return [c.receive(part, now).result for part in chunks(payload, room)]


def test_a_pane_closes_when_every_worker_reached_it() -> None:
    c = _collector()
    assert _send(c, _summary("w1", 100, [["tea", "jam"]])) == ["merged"]
    assert c.due(1.0, caught_up=True) == []  # w2 never reported: wait
    assert _send(c, _summary("w2", 100, [["tea"]])) == ["merged"]
    (close,) = c.due(1.0, caught_up=True)
    assert (close.index, close.how, [p.worker for p in close.parts]) == (
        100,
        "complete",
        ["w1", "w2"],
    )
    assert c.closed_through == 100 and not c.parts


def test_a_later_pane_says_the_panes_before_it_hold_nothing() -> None:
    # w2 sends pane 103 only: it holds nothing for 101 and 102, which close with w1's parts
    c = _collector()
    for pane in (101, 102, 103):
        _send(c, _summary("w1", pane, [["tea"]]))
    _send(c, _summary("w2", 103, [["jam"]]))
    closes = c.due(0.0, caught_up=False)
    assert [(x.index, [p.worker for p in x.parts]) for x in closes] == [
        (101, ["w1"]),
        (102, ["w1"]),
        (103, ["w1", "w2"]),
    ]
    # an empty summary at a worker's watermark moves the frontier past panes nobody sent
    _send(c, _summary("w1", 110, []))
    _send(c, _summary("w2", 108, []))
    (close,) = c.due(0.0, caught_up=False)
    assert (close.index, c.closed_through) == (108, 108)
    assert [(p.worker, p.meta.transactions) for p in close.parts] == [("w2", 0)]


def test_the_timeout_closes_without_the_missing_worker_and_names_it() -> None:
    c = _collector(timeout=10.0)
    _send(c, _summary("w2", 99, [["tea"]]), now=0.0)
    _send(c, _summary("w1", 99, [["tea"]]), now=0.0)
    c.due(0.0, caught_up=True)
    _send(c, _summary("w1", 102, [["tea"]]), now=5.0)
    _send(c, _summary("w1", 103, [["tea"]]), now=7.0)
    assert c.due(14.9, caught_up=True) == []  # 9.9 s since the first summary beyond 99
    assert c.due(30.0, caught_up=False) == []  # a backlog being read: no timeout
    (first,) = c.due(15.0, caught_up=True)
    assert (first.index, first.how, first.missing) == (102, "timeout", ("w2",))
    assert first.runs == ((100, 102, ("w2",)),)  # 100 and 101 were empty for w1
    assert c.due(16.9, caught_up=True) == []  # pane 103's first summary came at 7.0
    (second,) = c.due(17.0, caught_up=True)
    assert (second.index, second.missing, second.runs) == (103, ("w2",), ((103, 103, ("w2",)),))
    assert c.incomplete == [(100, 103, ("w2",))]
    assert c.totals.missing["w2"] == 4 and c.totals.closed["timeout"] == 2
    assert c.incomplete_between(101, 102) == ((101, 102, ("w2",)),)
    # w2 comes back: its summaries of closed panes are late, never added; new panes count
    late = c.receive(chunks(_summary("w2", 102, [["jam"]]))[0], 20.0)
    assert (late.result, late.reason, json.loads(late.raw)["worker"]) == (
        "late",
        "late_summary",
        "w2",
    )
    assert "arrived after the pane was closed without it" in late.detail
    _send(c, _summary("w2", 104, [["jam"]]), now=21.0)
    _send(c, _summary("w1", 104, [["tea"]]), now=21.0)
    (back,) = c.due(21.0, caught_up=True)
    assert (back.index, back.how, len(back.parts)) == (104, "complete", 2)
    assert c.totals.late == {"w2": 1}


def test_duplicates_are_dropped_and_foreign_or_damaged_summaries_refused() -> None:
    c = _collector()
    payload = _summary("w1", 100, [["tea", "jam"]])
    assert _send(c, payload) == ["merged"]
    assert _send(c, payload) == ["duplicate"]  # the same summary again, pane still open
    _send(c, _summary("w2", 100, []))
    c.due(0.0, caught_up=False)
    assert _send(c, payload) == ["duplicate"]  # merged already
    foreign = c.receive(chunks(_summary("w1", 101, [["tea"]], fp="0" * 64))[0], 0.0)
    assert (foreign.result, foreign.reason) == ("refused", "foreign_summary")
    assert "fingerprint" in foreign.detail and "same ones" in foreign.detail
    stranger = c.receive(chunks(_summary("w9", 101, [["tea"]]))[0], 0.0)
    assert (stranger.result, stranger.reason) == ("refused", "foreign_summary")
    assert "not one of cluster.workers" in stranger.detail
    garbage = c.receive(b"not a summary at all", 0.0)
    assert (garbage.result, garbage.reason) == ("refused", "bad_summary")
    damaged = bytearray(chunks(_summary("w1", 101, [["tea"]]))[0])
    damaged[-40] ^= 1
    assert c.receive(bytes(damaged), 0.0).reason == "bad_summary"
    assert dict(c.totals.received) == {"merged": 2, "duplicate": 2, "refused": 4}
    assert c.parts == {}  # nothing refused was kept


def test_chunks_are_held_until_the_last_one_and_survive_a_checkpoint() -> None:
    baskets = [[f"item-{i}", f"item-{i + 1}", f"item-{i + 7}"] for i in range(300)]
    payload = _summary("w1", 100, baskets)
    room = CHUNK_HEADER_BYTES + 1500
    parts = chunks(payload, room)
    assert len(parts) > 3
    c = _collector()
    assert [c.receive(p, 1.0).result for p in parts[:2]] == ["held", "held"]
    assert c.receive(parts[1], 1.0).result == "duplicate"  # the same chunk once more
    _send(c, _summary("w2", 100, [["tea"]]), now=2.0)
    meta, arrays = c.state()
    restored = _collector()
    restored.load_state(json.loads(json.dumps(meta)), arrays)
    assert restored.held_chunks == 2 and list(restored.parts) == [100]
    assert [restored.receive(p, 3.0).result for p in parts[2:]][-1] == "merged"
    (close,) = restored.due(3.0, caught_up=True)
    (w1,) = [p for p in close.parts if p.worker == "w1"]
    assert w1.meta.transactions == 300 and w1.payload == payload
    assert restored.parts == {} and restored.held_chunks == 0


def test_message_ids_name_worker_pane_chunk_and_payload() -> None:
    payload = _summary("w1", 7, [["tea"]])
    ids = {message_id("w1", 7, i, payload) for i in range(3)}
    assert len(ids) == 3 and all(i.startswith("w1:7:") for i in ids)
    other = _summary("w1", 7, [["jam"]])
    assert message_id("w1", 7, 0, other) != message_id("w1", 7, 0, payload)


def _evidence(**extra: object) -> Evidence:
    m = Measure(0.1, 0.05, 0.2)
    return Evidence("up", m, m, 100, 12.0, 10.0, 2.0, 5, 1, None, 10, 0.001, 1.0, **extra)  # type: ignore[arg-type]


def test_incomplete_panes_in_the_evidence_follow_the_schema() -> None:
    text = resources.files("streamcount").joinpath("schemas/alert.schema.json").read_text()
    schema = json.loads(text)
    evidence_schema = {**schema["properties"]["evidence"], "$defs": schema["$defs"]}
    plain = _evidence().as_dict()
    assert "incomplete_panes" not in plain  # one process: the record is unchanged
    jsonschema.validate(plain, evidence_schema)
    named = _evidence(incomplete_panes=((100, 103, ("w2",)),)).as_dict()
    assert named["incomplete_panes"] == [{"first": 100, "last": 103, "missing_workers": ["w2"]}]
    jsonschema.validate(named, evidence_schema)
    named["incomplete_panes"][0]["missing_workers"] = []
    with pytest.raises(jsonschema.ValidationError):
        jsonschema.validate(named, evidence_schema)


def test_a_summary_inconsistent_with_its_header_is_refused() -> None:
    summary = LossySummary(0.0, 1)
    summary._levels = [Level(np.array([[0]], dtype=np.int32), np.array([5]), np.array([0]))]
    summary.n = 3
    meta = PaneMeta(100, 3, 0.0, 1, FP, "none", None, None, "w1")  # 3 transactions, a count of 5
    c = PaneCollector(("w1",), fingerprint=FP, epsilon=0.0, max_itemset_size=1, timeout=1.0)
    got = c.receive(chunks(encode_pane(summary, ["tea"], meta))[0], 0.0)
    assert (got.result, got.reason) == ("refused", "bad_summary")


def test_parts_under_different_catalogue_versions_are_merged_and_reported() -> None:
    """Workers share one catalogue; a pane whose parts were mapped under different versions
    keeps every part's bounds (it is merged) but is logged, counted and listed, and the list
    survives a checkpoint. Parts holding no transaction say nothing about a catalogue."""
    c = _collector()
    _send(c, _summary("w1", 100, [["tea", "jam"]], catalogue="aaaa"))
    _send(c, _summary("w2", 100, [["tea"]], catalogue="aaaa"))
    _send(c, _summary("w1", 101, [["tea"]], catalogue="aaaa"))
    _send(c, _summary("w2", 101, [["jam"]], catalogue="aaaa,bbbb"))
    _send(c, _summary("w1", 102, [["tea"]], catalogue="bbbb"))
    _send(c, _summary("w2", 102, [], catalogue="aaaa"))  # empty: no catalogue in play
    closes = c.due(1.0, caught_up=True)
    assert [cl.index for cl in closes] == [100, 101, 102]
    assert [len(cl.parts) for cl in closes] == [2, 2, 2]
    assert c.totals.mixed_catalogue == 1
    assert c.mixed_catalogue == [(101, {"w1": "aaaa", "w2": "aaaa,bbbb"})]
    meta, arrays = c.state()
    again = _collector()
    again.load_state(json.loads(json.dumps(meta)), arrays)
    assert again.mixed_catalogue == c.mixed_catalogue
