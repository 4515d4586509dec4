"""``replay --workers N`` gives exactly the report of one process.

The reference is the one-process replay (``workers=1``) of the same file with the same
settings; its own correctness is tested against brute-force recounts elsewhere. Compared:
the whole JSON report (itemsets, rules, alerts, window, input counts) and the vocabulary (item
names in id order, so every tie order is the same). The reading grid is shrunk (BLOCK_BYTES)
so small files split into many parts; the cases cover rejections that shift pane boundaries
(blank lines, separators only, too many items, bad JSON), a byte-order mark, event times,
planted drifts that raise alerts, Lossy Counting with deletions, and vocabulary compaction
(its threshold lowered). Real processes and real files throughout.
"""

from __future__ import annotations

import gzip
import json
import subprocess
import sys
from itertools import pairwise
from pathlib import Path

import pytest
from data_files import data_path
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from streamcount import replay_workers
from streamcount.config.settings import (
    AlertsConfig,
    Config,
    EngineConfig,
    InputConfig,
    RulesConfig,
)
from streamcount.demo.generator import Drift, GeneratorParams, SyntheticFeed, write_jsonl
from streamcount.engine import engine as engine_module
from streamcount.intake import bulk
from streamcount.intake.bulk import iter_batches, part_starts
from streamcount.replay import replay_file

REPORT = ("itemsets", "rules", "alerts")


def _config(k: int = 3, epsilon: float = 0.01, fmt: str = "basket", **engine: object) -> Config:
    settings_: dict[str, object] = dict(
        epsilon=epsilon, max_itemset_size=k, window_size=2000, pane_size=500, batch_size=200
    )
    settings_.update(engine)
    if "window_seconds" in engine:
        del settings_["window_size"], settings_["pane_size"]
    return Config(
        engine=EngineConfig(**settings_),  # type: ignore[arg-type]
        rules=RulesConfig(min_support=0.004, min_confidence=0.2),
        alerts=AlertsConfig(),
        input=InputConfig(format=fmt),
    )


def _both(path: Path, config: Config, workers: int) -> tuple[dict, dict, object]:
    one = replay_file(str(path), config, report=REPORT, progress=None)
    many = replay_file(str(path), config, report=REPORT, progress=None, workers=workers)
    assert list(one.engine.vocabulary.names) == list(many.engine.vocabulary.names)
    return one.report, many.report, many.stats


@pytest.fixture
def small_blocks(monkeypatch: pytest.MonkeyPatch) -> int:
    monkeypatch.setattr(bulk, "BLOCK_BYTES", 4096)
    return 4096


# ---- reading a file in parts ---------------------------------------------------------------

_LINE = st.one_of(
    st.binary(max_size=30).map(lambda b: b.replace(b"\n", b" ")),
    st.sampled_from([b"", b"  ", b"a b\r", b"x" * 90, b"\xef\xbb\xbfbom"]),
)


@settings(max_examples=60)
@given(
    lines=st.lists(_LINE, max_size=80),
    final_newline=st.booleans(),
    block=st.integers(8, 64),
    limit=st.integers(4, 40),
    parts=st.integers(2, 9),
)
def test_parts_read_exactly_as_the_whole_file(
    tmp_path_factory: pytest.TempPathFactory,
    lines: list[bytes],
    final_newline: bool,
    block: int,
    limit: int,
    parts: int,
) -> None:
    """Every batch of the whole file (lines, offsets, cut marks) comes out of exactly one part,
    in order: a part starts just after the last newline of a block of the reading grid."""
    path = tmp_path_factory.mktemp("parts") / "f.txt"
    data = b"\n".join(lines) + (b"\n" if final_newline and lines else b"")
    # a file starting with the gzip magic bytes is read as gzip (open_input), which is never
    # read in parts: not what this test is about
    assume(not data.startswith(b"\x1f\x8b"))
    path.write_bytes(data)

    def batches(**kw: int) -> list[tuple[object, ...]]:
        out = []
        for b in iter_batches(str(path), max_record_bytes=limit, block_bytes=block, **kw):
            cut = None if b.too_long is None else b.too_long.tolist()
            offsets = None if b.offsets is None else b.offsets.tolist()
            out.append((b.lines, offsets, b.end_offset, cut))
        return out

    starts = part_starts(str(path), len(data), parts, block)
    assert starts[0] == 0 and starts == sorted(set(starts))
    bounds = [*starts, len(data)]
    pieces = []
    for lo, hi in pairwise(bounds):
        pieces += batches(start=lo, stop=hi)
    assert pieces == batches()


def test_a_line_cut_short_at_a_block_end_does_not_end_the_file(tmp_path: Path) -> None:
    """Regression: when the newline ending an over-long line was the last byte of a block,
    the reading stopped there and the rest of the file was lost."""
    path = tmp_path / "f.txt"
    path.write_bytes(b"x" * 31 + b"\n" + b"tea jam\n")  # the newline is byte 31: block 3's last
    got = [
        (b.lines, b.offsets.tolist() if b.offsets is not None else None, b.end_offset)
        for b in iter_batches(str(path), max_record_bytes=7, block_bytes=8)
    ]
    assert got == [([b"x" * 7], [0], 32), ([b"tea jam"], [32], 40)]


def test_a_part_of_a_compressed_file_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "f.txt.gz"
    path.write_bytes(gzip.compress(b"a b\nc\n"))
    with pytest.raises(Exception, match="only a plain file"):
        list(iter_batches(str(path), start=2, stop=4))


# ---- the same report ------------------------------------------------------------------------


def _basket_file(path: Path, lines: int) -> Path:
    """T10I4D100K's first lines with lines the replay sets aside or skips mixed in, and a
    byte-order mark at the start."""
    with gzip.open(data_path("T10I4D100K.dat.gz"), "rt", encoding="ascii") as fh:
        rows = [next(fh).rstrip("\n") for _ in range(lines)]
    too_many = " ".join(str(i) for i in range(1000, 1300))
    for i in range(0, lines, 97):
        rows[i] = ["", " , ,", too_many, "   "][(i // 97) % 4]
    path.write_bytes(b"\xef\xbb\xbf" + ("\n".join(rows) + "\n").encode())
    return path


@pytest.mark.parametrize(("k", "epsilon", "workers"), [(3, 0.01, 2), (2, 0.002, 3), (3, 0.0, 2)])
def test_basket_lines_give_the_report_of_one_process(
    tmp_path: Path, small_blocks: int, k: int, epsilon: float, workers: int
) -> None:
    path = _basket_file(tmp_path / "orders.dat", 6000)
    one, many, stats = _both(path, _config(k, epsilon), workers)
    assert stats["workers"] == workers and stats["parts"] > workers  # type: ignore[index]
    assert one["input"]["rejected"]  # the boundaries really were shifted
    assert one["itemsets"]
    assert many == one


def _drift_feed(path: Path, transactions: int, *, churn: bool = False) -> Path:
    """A synthetic JSON-lines feed with event times and two planted drifts (alerts fire),
    and some records the decoder sets aside; with ``churn``, item names change pane by pane
    so that old names leave the window (vocabulary compaction)."""
    feed = SyntheticFeed(
        GeneratorParams(transactions=transactions, items=150, patterns=60, seed=3),
        (
            Drift(("item-0007", "item-0042"), start=transactions // 3, rate=0.2),
            Drift(("item-0011", "item-0019"), start=0, stop=transactions // 2, rate=0.15),
        ),
        names=lambda i: f"item-{i:04d}",
    )
    records = list(feed.records(start_time=1_700_000_000.0))
    if churn:
        records = [
            (ts, [f"{name}-v{(i // 450) % 7}" if j % 2 else name for j, name in enumerate(items)])
            for i, (ts, items) in enumerate(records)
        ]
    with path.open("w", encoding="utf-8") as out:
        write_jsonl(records, out)
    lines = path.read_text(encoding="utf-8").splitlines()
    for i in range(5, len(lines), 211):
        lines[i] = ['{"id": 1, "items": "not a list"}', "not json", "", '{"items": []}'][i % 4]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def test_json_lines_with_drifts_give_the_same_alerts(tmp_path: Path, small_blocks: int) -> None:
    path = _drift_feed(tmp_path / "orders.jsonl", 9000)
    config = _config(2, 0.005, "jsonl", window_size=1500, pane_size=300, batch_size=100)
    one, many, _ = _both(path, config, 2)
    assert one["alerts"] and one["rules"], "the planted drifts raise rules and alerts"
    assert one["input"]["rejected"]
    assert many == one


def test_vocabulary_compaction_happens_at_the_same_points(
    tmp_path: Path, small_blocks: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(engine_module, "COMPACT_MIN_RELEASED", 20)
    path = _drift_feed(tmp_path / "churn.jsonl", 9000, churn=True)
    config = _config(3, 0.01, "jsonl", window_size=900, pane_size=300, batch_size=100)
    one = replay_file(str(path), config, report=REPORT, progress=None)
    seen = {
        n
        for line in path.read_text().splitlines()
        if line.startswith("{")
        for n in (
            json.loads(line).get("items") or []
            if isinstance(json.loads(line).get("items"), list)
            else []
        )
    }
    assert len(one.engine.vocabulary) < len(seen), "names were released"
    for workers in (2, 3):
        many = replay_file(str(path), config, report=REPORT, progress=None, workers=workers)
        assert list(many.engine.vocabulary.names) == list(one.engine.vocabulary.names)
        assert many.report == one.report


@pytest.mark.parametrize(
    ("name", "fmt", "timed", "why"),
    [
        ("orders.dat.gz", "basket", False, "compressed"),
        ("orders.csv", "csv", False, "csv records span lines"),
        ("orders.jsonl", "jsonl", True, "time-based window"),
    ],
)
def test_inputs_that_cannot_be_split_run_in_one_process(
    tmp_path: Path, small_blocks: int, name: str, fmt: str, timed: bool, why: str
) -> None:
    path = tmp_path / name
    if fmt == "csv":
        rows = ["order_id,item,ts"] + [f"o{i // 3},item{i % 11},{i}" for i in range(3000)]
        path.write_text("\n".join(rows) + "\n")
    elif fmt == "jsonl":
        _drift_feed(path, 3000)
    else:
        path.write_bytes(gzip.compress(_basket_file(tmp_path / "plain.dat", 3000).read_bytes()))
    extra = {"window_seconds": 600.0, "pane_seconds": 60.0} if timed else {}
    config = _config(2, 0.01, fmt, **extra)
    one, many, stats = _both(path, config, 2)
    assert stats["workers"] == 1 and why in stats["why_one_process"]  # type: ignore[index]
    assert many == one


def test_a_failing_worker_fails_the_replay(
    tmp_path: Path, small_blocks: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = _basket_file(tmp_path / "orders.dat", 3000)

    def broken(*args: object) -> None:
        raise OSError("disk gone")

    monkeypatch.setattr(replay_workers, "_decode_part", broken)
    monkeypatch.setattr(
        replay_workers, "_context", lambda: replay_workers.multiprocessing.get_context("fork")
    )
    with pytest.raises(OSError, match="disk gone"):
        replay_file(str(path), _config(), progress=None, workers=2)


def test_cli_workers_give_the_same_report(tmp_path: Path) -> None:
    """``streamcount replay --workers 2`` in a real process, on a file of several blocks of
    the real reading grid (1 MB), against ``--workers 1``."""
    path = _basket_file(tmp_path / "orders.dat", 70_000)
    assert path.stat().st_size > 2 * bulk.BLOCK_BYTES
    outputs = []
    for workers in ("1", "2"):
        proc = subprocess.run(
            [
                sys.executable,
                "-m",
                "streamcount",
                "replay",
                str(path),
                "--workers",
                workers,
                "--report",
                "itemsets,rules",
                "--max-itemset-size",
                "2",
                "--pane-size",
                "5000",
                "--window-size",
                "20000",
            ],
            capture_output=True,
            text=True,
            check=True,
        )
        outputs.append(json.loads(proc.stdout))
    assert outputs[0] == outputs[1]
    assert outputs[0]["itemsets"]
    gz = tmp_path / "orders.dat.gz"
    gz.write_bytes(gzip.compress(path.read_bytes()[:200_000]))
    proc = subprocess.run(
        [sys.executable, "-m", "streamcount", "replay", str(gz), "--workers", "2"],
        capture_output=True,
        text=True,
        check=True,
    )
    assert "one process (a compressed file cannot be split by offset)" in proc.stderr
