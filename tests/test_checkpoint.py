"""Checkpoint files: round trip, damage detection, settings mismatch, retention, crash safety."""

from __future__ import annotations

import hashlib
import json
import os
import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from streamcount.config.load import apply_overrides, fingerprint, fingerprint_settings
from streamcount.config.settings import Config, EngineConfig
from streamcount.engine.engine import Engine
from streamcount.errors import CheckpointError
from streamcount.service.checkpoint import (
    FORMAT_VERSION,
    MAGIC,
    list_checkpoints,
    load_checkpoint,
    load_latest_checkpoint,
    save_checkpoint,
)

FP = "a" * 64


def _arrays() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(7)
    return {
        "counts": rng.integers(0, 1000, size=17, dtype=np.int64),
        "items": rng.integers(0, 50, size=(6, 3), dtype=np.int32),
        "ratio": rng.random(5),
        "flags": np.array([True, False, True]),
        "names": np.array(["tea", "scone", "jam"]),
        "blob": np.frombuffer("crème brûlée".encode(), dtype=np.uint8).copy(),
        "empty": np.zeros(0, dtype=np.int64),
        "empty2d": np.zeros((0, 4), dtype=np.int32),
        "big_endian": np.arange(4, dtype=">u2"),
        "fortran": np.asfortranarray(np.arange(12, dtype=np.float32).reshape(3, 4)),
    }


def _snapshot_dir(directory: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(directory.iterdir())}


def test_round_trip_of_several_dtypes(tmp_path: Path) -> None:
    arrays = _arrays()
    meta = {"next_seq": 12345, "panes": [{"index": 3, "counted": 200}], "ts": None}
    path = save_checkpoint(tmp_path, meta=meta, arrays=arrays, fingerprint=FP)
    assert path.name == "checkpoint-0000000001.sc"
    loaded = load_latest_checkpoint(tmp_path, fingerprint=FP)
    assert loaded is not None
    got_meta, got = loaded
    assert got_meta == meta
    assert set(got) == set(arrays)
    for name, arr in arrays.items():
        assert got[name].dtype == arr.dtype, name
        assert got[name].shape == arr.shape, name
        np.testing.assert_array_equal(got[name], arr, err_msg=name)
    # the arrays are writable (the engine may keep updating restored counts in place)
    got["counts"][0] += 1
    assert got["items"].flags.c_contiguous


def test_file_layout_is_as_documented(tmp_path: Path) -> None:
    path = save_checkpoint(
        tmp_path, meta={"k": 1}, arrays={"x": np.arange(3, dtype="<i4")}, fingerprint=FP
    )
    raw = path.read_bytes()
    assert raw[:7] == MAGIC
    assert int.from_bytes(raw[7:11], "little") == FORMAT_VERSION
    manifest_len = int.from_bytes(raw[11:19], "little")
    assert (19 + manifest_len) % 8 == 0
    manifest = json.loads(raw[19 : 19 + manifest_len])
    assert manifest["fingerprint"] == FP
    assert manifest["arrays"] == [
        {"name": "x", "dtype": "<i4", "shape": [3], "offset": 0, "length": 12}
    ]
    data = raw[19 + manifest_len : 19 + manifest_len + 12]
    assert np.frombuffer(data, dtype="<i4").tolist() == [0, 1, 2]
    # the last 32 bytes are SHA-256 (hashlib, the reference) of everything before them
    assert raw[-32:] == hashlib.sha256(raw[:-32]).digest()


def test_no_checkpoint_is_none(tmp_path: Path) -> None:
    assert load_latest_checkpoint(tmp_path / "missing", fingerprint=FP) is None
    assert load_latest_checkpoint(tmp_path, fingerprint=FP) is None


def test_object_dtype_refused(tmp_path: Path) -> None:
    with pytest.raises(CheckpointError, match="'names' has dtype object"):
        save_checkpoint(
            tmp_path,
            meta={},
            arrays={"names": np.array(["a", None], dtype=object)},
            fingerprint=FP,
        )
    assert list(tmp_path.iterdir()) == []


def test_meta_must_be_json(tmp_path: Path) -> None:
    with pytest.raises(CheckpointError, match="JSON"):
        save_checkpoint(tmp_path, meta={"x": float("nan")}, arrays={}, fingerprint=FP)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("keep_fraction", [0.0, 0.01, 0.3, 0.5, 0.9, 0.999])
def test_truncated_file(tmp_path: Path, keep_fraction: float) -> None:
    path = save_checkpoint(tmp_path, meta={"a": 1}, arrays=_arrays(), fingerprint=FP)
    raw = path.read_bytes()
    path.write_bytes(raw[: int(len(raw) * keep_fraction)])
    before = _snapshot_dir(tmp_path)
    with pytest.raises(CheckpointError, match="truncated") as info:
        load_latest_checkpoint(tmp_path, fingerprint=FP)
    assert str(path) in str(info.value)
    assert "--fresh" in str(info.value)
    assert _snapshot_dir(tmp_path) == before  # nothing deleted or rewritten


def test_every_single_flipped_byte_is_detected(tmp_path: Path) -> None:
    path = save_checkpoint(
        tmp_path,
        meta={"seq": 9},
        arrays={"c": np.arange(5, dtype=np.int64), "n": np.array(["tea"])},
        fingerprint=FP,
    )
    raw = path.read_bytes()
    for i in range(len(raw)):
        flipped = bytearray(raw)
        flipped[i] ^= 0x10
        path.write_bytes(bytes(flipped))
        with pytest.raises(CheckpointError):
            load_checkpoint(path, fingerprint=FP)
    path.write_bytes(raw)
    assert load_checkpoint(path, fingerprint=FP)[0] == {"seq": 9}


def test_flipped_data_byte_reports_checksum(tmp_path: Path) -> None:
    save_checkpoint(tmp_path, meta={}, arrays={"a": np.arange(1)}, fingerprint=FP)
    path = save_checkpoint(tmp_path, meta={}, arrays={"a": np.arange(100)}, fingerprint=FP)
    raw = bytearray(path.read_bytes())
    raw[-100] ^= 0x01  # inside the array bytes
    path.write_bytes(bytes(raw))
    before = _snapshot_dir(tmp_path)
    with pytest.raises(CheckpointError, match="checksum mismatch") as info:
        load_latest_checkpoint(tmp_path, fingerprint=FP)
    # the older good checkpoint is named, but not used silently
    assert "checkpoint-0000000001.sc exists" in str(info.value)
    assert _snapshot_dir(tmp_path) == before


def test_wrong_magic_and_version(tmp_path: Path) -> None:
    path = save_checkpoint(tmp_path, meta={}, arrays={}, fingerprint=FP)
    raw = path.read_bytes()
    path.write_bytes(b"PK\x03\x04" + raw[4:])
    with pytest.raises(CheckpointError, match="not a streamcount checkpoint"):
        load_checkpoint(path, fingerprint=FP)
    newer = raw[:7] + (FORMAT_VERSION + 1).to_bytes(4, "little") + raw[11:]
    path.write_bytes(newer)
    with pytest.raises(CheckpointError, match=f"format version {FORMAT_VERSION + 1}"):
        load_checkpoint(path, fingerprint=FP)


def test_other_fingerprint_names_the_settings(tmp_path: Path) -> None:
    old = Config()
    new = apply_overrides(old, {"engine.epsilon": 0.002})
    save_checkpoint(
        tmp_path,
        meta={},
        arrays={},
        fingerprint=fingerprint(old),
        settings=fingerprint_settings(old),
    )
    before = _snapshot_dir(tmp_path)
    with pytest.raises(CheckpointError) as info:
        load_latest_checkpoint(
            tmp_path, fingerprint=fingerprint(new), settings=fingerprint_settings(new)
        )
    message = str(info.value)
    assert "was written with other settings" in message
    assert "engine.epsilon: 0.001 then, 0.002 now" in message
    assert "start with --fresh to discard it, or restore the settings" in message
    assert _snapshot_dir(tmp_path) == before
    # without the stored settings the message still says what to do
    with pytest.raises(CheckpointError, match=r"other settings .*fingerprint"):
        load_latest_checkpoint(tmp_path, fingerprint=fingerprint(new))
    # the same settings load
    assert load_latest_checkpoint(tmp_path, fingerprint=fingerprint(old)) is not None


def test_keep_two_retention(tmp_path: Path) -> None:
    for i in range(5):
        save_checkpoint(tmp_path, meta={"i": i}, arrays={}, fingerprint=FP, keep=2)
    names = [p.name for p in list_checkpoints(tmp_path)]
    assert names == ["checkpoint-0000000004.sc", "checkpoint-0000000005.sc"]
    assert load_latest_checkpoint(tmp_path, fingerprint=FP) == ({"i": 4}, {})
    save_checkpoint(tmp_path, meta={"i": 5}, arrays={}, fingerprint=FP, keep=1)
    assert [p.name for p in list_checkpoints(tmp_path)] == ["checkpoint-0000000006.sc"]
    with pytest.raises(ValueError, match="keep=0"):
        save_checkpoint(tmp_path, meta={}, arrays={}, fingerprint=FP, keep=0)


def test_stray_temp_file_from_a_crash_is_ignored(tmp_path: Path) -> None:
    save_checkpoint(tmp_path, meta={"good": True}, arrays={"a": np.arange(3)}, fingerprint=FP)
    # a crash after writing (part of) the next checkpoint, before the rename
    full = tmp_path / "scratch"
    save_checkpoint(full, meta={"good": False}, arrays={"a": np.arange(9)}, fingerprint=FP)
    partial = next(full.iterdir()).read_bytes()[:50]
    stray = tmp_path / ".checkpoint-k3x9q.sc.tmp"
    stray.write_bytes(partial)
    loaded = load_latest_checkpoint(tmp_path, fingerprint=FP)
    assert loaded is not None
    assert loaded[0] == {"good": True}
    assert stray.exists()  # loading never deletes
    # the next successful save numbers after the good one and clears the stray file
    path = save_checkpoint(tmp_path, meta={"good": True}, arrays={}, fingerprint=FP)
    assert path.name == "checkpoint-0000000002.sc"
    assert not stray.exists()


def test_failed_rename_leaves_previous_checkpoint(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    save_checkpoint(tmp_path, meta={"n": 1}, arrays={"a": np.arange(4)}, fingerprint=FP)
    before = _snapshot_dir(tmp_path)

    def crash(src: object, dst: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", crash)
    with pytest.raises(OSError, match="No space"):
        save_checkpoint(tmp_path, meta={"n": 2}, arrays={"a": np.arange(8)}, fingerprint=FP)
    monkeypatch.undo()
    assert _snapshot_dir(tmp_path) == before  # no temp file left, old one untouched
    loaded = load_latest_checkpoint(tmp_path, fingerprint=FP)
    assert loaded is not None
    assert loaded[0] == {"n": 1}


@settings(max_examples=40, deadline=None)
@given(
    arr=hnp.arrays(
        dtype=st.one_of(
            hnp.integer_dtypes(endianness="="),
            hnp.unsigned_integer_dtypes(endianness=">"),
            hnp.floating_dtypes(endianness="<"),
            hnp.boolean_dtypes(),
            hnp.unicode_string_dtypes(max_len=4),
        ),
        shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=4),
    )
)
def test_round_trip_property(arr: np.ndarray) -> None:
    with tempfile.TemporaryDirectory() as d:
        save_checkpoint(d, meta={}, arrays={"x": arr}, fingerprint=FP)
        loaded = load_latest_checkpoint(d, fingerprint=FP)
    assert loaded is not None
    got = loaded[1]["x"]
    assert got.dtype == arr.dtype
    assert got.shape == arr.shape
    # byte-for-byte equal (NaN payloads and -0.0 included)
    assert got.tobytes() == arr.tobytes()


def test_engine_state_round_trip(tmp_path: Path) -> None:
    # the real engine's state through a file: every bound identical after restore
    config = EngineConfig(epsilon=0.05, max_itemset_size=2, window_size=60, pane_size=20)
    rng = np.random.default_rng(3)
    shop = ["tea", "scone", "jam", "honey", "cream", "bread"]
    baskets = [list(rng.choice(shop, size=rng.integers(1, 4), replace=False)) for _ in range(90)]
    engine = Engine(config)
    engine.add(baskets)
    meta, arrays = engine.state()
    save_checkpoint(tmp_path, meta={"engine": meta}, arrays=arrays, fingerprint=FP)
    loaded = load_latest_checkpoint(tmp_path, fingerprint=FP)
    assert loaded is not None
    restored = Engine.from_state(config, loaded[0]["engine"], loaded[1])
    restored.check_invariants()
    a, b = engine.snapshot(), restored.snapshot()
    assert (a.transactions, a.max_error, a.first_seq, a.last_seq) == (
        b.transactions,
        b.max_error,
        b.first_seq,
        b.last_seq,
    )
    for la, lb in zip(a.levels, b.levels, strict=True):
        np.testing.assert_array_equal(la.items, lb.items)
        np.testing.assert_array_equal(la.count, lb.count)
        np.testing.assert_array_equal(la.upper, lb.upper)
