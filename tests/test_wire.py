"""The pane-summary wire format: exact round trips, and every damage refused.

Property tests (hypothesis) draw summaries with arbitrary names (any Unicode, lone surrogates
included), ids, counts up to 2**62 and headers; a real pane counted by the engine goes through
too, and a pane larger than a NATS server's largest message crosses a real ``nats-server``
in chunks (tests/nats_server.py).
"""

from __future__ import annotations

import asyncio
import random
from pathlib import Path
from types import SimpleNamespace
from typing import Any

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from nats_server import add_stream, nats_server_running

from streamcount.engine.counters import Level, LossySummary
from streamcount.engine.wire import (
    CHUNK_HEADER_BYTES,
    DEFAULT_MAX_BYTES,
    PaneMeta,
    Reassembler,
    WireError,
    chunks,
    decode_pane,
    encode_pane,
    join_chunks,
)

_FLOATS = st.floats(allow_nan=False)
_TEXT = st.text(st.characters(codec=None), max_size=20)  # surrogates included


@st.composite
def panes(draw: st.DrawFn) -> tuple[Any, list[str], PaneMeta]:
    """A summary (levels of sorted, distinct rows of ascending ids), the names its ids index
    (more than it uses) and a header."""
    names = draw(st.lists(_TEXT, min_size=1, max_size=40, unique=True))
    k_max = draw(st.integers(1, 4))
    big = st.integers(0, 2**62)
    levels = []
    for k in range(1, k_max + 1):
        if k > len(names):
            levels.append(Level.empty(k))
            continue
        rows = draw(
            st.lists(
                st.lists(st.integers(0, len(names) - 1), min_size=k, max_size=k, unique=True),
                max_size=30,
            )
        )
        unique_rows = sorted({tuple(sorted(r)) for r in rows})
        n = len(unique_rows)
        items = np.array(unique_rows, dtype=np.int32).reshape(n, k)
        f = np.array(draw(st.lists(big, min_size=n, max_size=n)), dtype=np.int64)
        delta = np.array(draw(st.lists(big, min_size=n, max_size=n)), dtype=np.int64)
        levels.append(Level(items, f, delta))
    meta = PaneMeta(
        pane_index=draw(st.integers(-(2**62), 2**62)),
        transactions=draw(big),
        epsilon=draw(st.floats(0.0, 0.999)),
        max_itemset_size=k_max,
        fingerprint=draw(_TEXT),
        catalogue=draw(_TEXT),
        start=draw(st.none() | _FLOATS),
        end=draw(st.none() | _FLOATS),
        worker=draw(_TEXT),
    )
    summary = SimpleNamespace(levels=tuple(levels), n=meta.transactions)
    return summary, names, meta


def _by_name(levels: Any, names: list[str]) -> list[list[tuple[tuple[str, ...], int, int]]]:
    """Each level as (item names, f, delta) rows, in order."""
    return [
        [
            (tuple(names[i] for i in row), f, d)
            for row, f, d in zip(lv.items.tolist(), lv.f.tolist(), lv.delta.tolist(), strict=True)
        ]
        for lv in levels
    ]


@given(panes())
def test_decode_gives_back_what_was_encoded(pane: tuple[Any, list[str], PaneMeta]) -> None:
    summary, names, meta = pane
    got_meta, got_levels, got_names = decode_pane(encode_pane(summary, names, meta))
    assert got_meta == meta
    assert _by_name(got_levels, got_names) == _by_name(summary.levels, names)
    # only the names the summary uses travel, in the sender's id order (so rows stay sorted)
    used = sorted({i for lv in summary.levels for i in lv.items.reshape(-1).tolist()})
    assert got_names == [names[i] for i in used]
    for lv in got_levels:
        assert lv.items.dtype == np.int32 and lv.f.dtype == lv.delta.dtype == np.int64


@given(panes(), st.data())
def test_any_flipped_byte_is_refused(pane: tuple[Any, list[str], PaneMeta], data: Any) -> None:
    payload = bytearray(encode_pane(*pane))
    at = data.draw(st.integers(0, len(payload) - 1), label="byte")
    payload[at] ^= data.draw(st.integers(1, 255), label="mask")
    with pytest.raises(WireError):
        decode_pane(bytes(payload))


@given(panes(), st.data())
def test_a_truncated_or_extended_payload_is_refused(
    pane: tuple[Any, list[str], PaneMeta], data: Any
) -> None:
    payload = encode_pane(*pane)
    cut = data.draw(st.integers(0, len(payload) - 1), label="cut")
    with pytest.raises(WireError):
        decode_pane(payload[:cut])
    with pytest.raises(WireError):
        decode_pane(payload + b"\0")


def test_refusals_say_what_is_wrong() -> None:
    summary = SimpleNamespace(levels=(Level.empty(1),), n=0)
    payload = encode_pane(summary, [], PaneMeta(0, 0, 0.0, 1, "f", "c"))
    with pytest.raises(WireError, match="no 'SCPW' magic"):
        decode_pane(b"{}" + payload)
    newer = payload[:4] + (2).to_bytes(2, "little") + payload[6:]
    with pytest.raises(WireError, match="wire version 2; this streamcount reads version 1"):
        decode_pane(newer)
    damaged = bytearray(payload)
    damaged[10] ^= 1
    with pytest.raises(WireError, match="SHA-256 checksum does not match"):
        decode_pane(bytes(damaged))


def test_encode_refuses_a_summary_that_disagrees_with_its_header() -> None:
    level = Level(np.array([[0]], np.int32), np.array([3]), np.array([0]))
    summary = SimpleNamespace(levels=(level,), n=5)
    with pytest.raises(ValueError, match="counted 5 transactions, meta says 4"):
        encode_pane(summary, ["tea"], PaneMeta(0, 4, 0.0, 1, "f", "c"))
    with pytest.raises(ValueError, match=r"1 levels but meta\.max_itemset_size is 2"):
        encode_pane(summary, ["tea"], PaneMeta(0, 5, 0.0, 2, "f", "c"))
    with pytest.raises(ValueError, match="item ids reach 0, but 0 names"):
        encode_pane(summary, [], PaneMeta(0, 5, 0.0, 1, "f", "c"))
    negative = SimpleNamespace(levels=(Level(level.items, np.array([-1]), level.delta),), n=5)
    with pytest.raises(ValueError, match="negative"):
        encode_pane(negative, ["tea"], PaneMeta(0, 5, 0.0, 1, "f", "c"))


@given(
    st.binary(max_size=5000),
    st.integers(CHUNK_HEADER_BYTES + 1, CHUNK_HEADER_BYTES + 700),
    st.randoms(use_true_random=False),
)
def test_chunks_fit_and_join_in_any_order(data: bytes, max_bytes: int, rng: random.Random) -> None:
    parts = chunks(data, max_bytes)
    assert all(len(p) <= max_bytes for p in parts)
    assert len(parts) == max(1, -(-len(data) // (max_bytes - CHUNK_HEADER_BYTES)))
    shuffled = parts[:]
    rng.shuffle(shuffled)
    assert join_chunks(shuffled) == data
    joiner = Reassembler()
    results = [joiner.add(p) for p in shuffled]
    assert results[-1] == data and all(r is None for r in results[:-1])
    assert joiner.pending == []


@given(st.binary(min_size=1, max_size=3000), st.data())
def test_missing_duplicated_or_damaged_chunks_are_refused(data: bytes, draw: Any) -> None:
    parts = chunks(data, CHUNK_HEADER_BYTES + 64)
    i = draw.draw(st.integers(0, len(parts) - 1), label="chunk")
    if len(parts) > 1:
        with pytest.raises(WireError, match=rf"chunks {i + 1} of {len(parts)} are missing"):
            join_chunks(parts[:i] + parts[i + 1 :])
    with pytest.raises(WireError, match=rf"chunk {i + 1} of {len(parts)} received twice"):
        join_chunks([*parts, parts[i]])
    damaged = bytearray(parts[i])
    at = draw.draw(st.integers(0, len(damaged) - 1), label="byte")
    damaged[at] ^= draw.draw(st.integers(1, 255), label="mask")
    with pytest.raises(WireError):
        join_chunks([*parts[:i], bytes(damaged), *parts[i + 1 :]])
    joiner = Reassembler()
    for part in parts[:i]:
        joiner.add(part)
    with pytest.raises(WireError):
        joiner.add(bytes(damaged))


def test_chunks_of_two_payloads_are_not_mixed() -> None:
    a, b = (
        chunks(b"a" * 300, CHUNK_HEADER_BYTES + 100),
        chunks(b"b" * 300, CHUNK_HEADER_BYTES + 100),
    )
    with pytest.raises(WireError, match="two different payloads"):
        join_chunks([a[0], b[1], a[2]])
    joiner = Reassembler()  # interleaved payloads are kept apart
    out = [joiner.add(p) for pair in zip(a, b, strict=True) for p in pair]
    assert out[-2:] == [b"a" * 300, b"b" * 300]


def _engine_pane(epsilon: float, seed: int, n: int = 5000) -> tuple[LossySummary, list[str]]:
    """A pane counted by the engine's own Lossy Counting on skewed random baskets."""
    rng = random.Random(seed)
    names = [f"quillbrook-item-{i:05d}" for i in range(2000)]
    weights = [1.0 / (rank + 1) for rank in range(len(names))]
    summary = LossySummary(epsilon, 3)
    baskets = [rng.choices(range(len(names)), weights, k=rng.randint(2, 14)) for _ in range(n)]
    for start in range(0, n, 1000):
        summary.add_baskets(baskets[start : start + 1000])
    return summary, names


def test_an_engine_pane_round_trips_into_an_equal_summary() -> None:
    summary, names = _engine_pane(0.001, seed=1)
    meta = PaneMeta(7, summary.n, 0.001, 3, "ab" * 32, "catalogue-2025-01", 0.0, 60.0, "w1")
    got_meta, levels, got_names = decode_pane(encode_pane(summary, names, meta))
    assert got_meta.absent_bound == summary.b_current
    # rebuilt on the receiver's own ids (here: the names' positions in the sender's list)
    index = {name: i for i, name in enumerate(names)}
    remap = np.array([index[x] for x in got_names], dtype=np.int32)
    arrays = {}
    for k, lv in enumerate(levels, start=1):
        arrays[f"L{k}.items"], arrays[f"L{k}.f"], arrays[f"L{k}.delta"] = (
            remap[lv.items],
            lv.f,
            lv.delta,
        )
    rebuilt = LossySummary.from_arrays(0.001, 3, got_meta.transactions, arrays, "")
    rebuilt.check_invariants()
    for a, b in zip(rebuilt.levels, summary.levels, strict=True):
        assert len(a) > 0
        assert np.array_equal(a.items, b.items)
        assert np.array_equal(a.f, b.f) and np.array_equal(a.delta, b.delta)


def test_a_pane_larger_than_the_servers_largest_message_crosses_a_real_server(
    tmp_path: Path,
) -> None:
    summary, names = _engine_pane(0.0, seed=2, n=6000)  # exact: every itemset is kept
    meta = PaneMeta(3, summary.n, 0.0, 3, "cd" * 32, "catalogue-2025-01", worker="w2")
    payload = encode_pane(summary, names, meta)
    assert len(payload) > DEFAULT_MAX_BYTES
    parts = chunks(payload, DEFAULT_MAX_BYTES)
    assert len(parts) >= 2

    with nats_server_running(tmp_path / "store") as server:  # max_payload: its 1 MB default
        add_stream(server.url, "PANES", ["panes.>"])
        received = asyncio.run(_through_jetstream(server.url, parts))
    assert [len(p) for p in received] == [len(p) for p in parts]
    got_meta, levels, got_names = decode_pane(join_chunks(received))
    assert got_meta == meta
    assert _by_name(levels, got_names) == _by_name(summary.levels, names)


async def _through_jetstream(url: str, parts: list[bytes]) -> list[bytes]:
    import nats

    nc = await nats.connect(url)
    try:
        assert nc.max_payload == DEFAULT_MAX_BYTES
        js = nc.jetstream()
        for part in parts:
            await js.publish("panes.w2", part)
        sub = await js.pull_subscribe("panes.>", durable="merger", stream="PANES")
        msgs = await sub.fetch(len(parts), timeout=10)
        for msg in msgs:
            await msg.ack()
        return [msg.data for msg in msgs]
    finally:
        await nc.close()


@pytest.mark.parametrize("size", [0, 1, DEFAULT_MAX_BYTES - CHUNK_HEADER_BYTES])
def test_one_chunk_when_it_fits(size: int) -> None:
    data = bytes(size)
    parts = chunks(data)
    assert len(parts) == 1 and len(parts[0]) == size + CHUNK_HEADER_BYTES
    assert join_chunks(parts) == data


def test_max_bytes_must_leave_room_for_a_body() -> None:
    with pytest.raises(ValueError, match="must exceed"):
        chunks(b"x", CHUNK_HEADER_BYTES)
