"""Sources on real files in tmp_path (appends, partial lines, rotation, truncation, resume),
a real pipe for standard input, and the in-memory source."""

from __future__ import annotations

import io
import json
import logging
import os
import threading
from typing import NamedTuple

import pytest

from streamcount.errors import InputError
from streamcount.intake.records import RecordBatch
from streamcount.intake.sources import FollowedFile, IterableSource, StdinSource

LOGGER = "streamcount.intake.sources"


class Rec(NamedTuple):
    """One record out of a batch: its bytes, where it starts and ends, whether it was cut."""

    data: bytes
    offset: int
    end_offset: int
    too_long: bool = False


def flat(batches: list[RecordBatch]) -> list[Rec]:
    """The records of a read, one by one (the batches' offsets are checked to be in order)."""
    out = []
    for b in batches:
        assert b.offsets is not None and len(b.offsets) == len(b.lines)
        for i, line in enumerate(b.lines):
            cut = bool(b.too_long[i]) if b.too_long is not None else False
            out.append(Rec(line, b.offset(i), b.end_of(i), cut))
    return out


def append(path, data: bytes) -> None:
    with open(path, "ab") as f:
        f.write(data)


def lines_of(records: list[Rec]) -> list[bytes]:
    return [r.data for r in records]


def check_offsets(path_bytes: bytes, records: list[Rec]) -> None:
    """Every record's offsets point at its bytes in the file (an oracle outside the reader)."""
    for r in records:
        if not r.too_long:
            assert path_bytes[r.offset : r.offset + len(r.data)] == r.data
            tail = path_bytes[r.offset + len(r.data) : r.end_offset]
            assert tail in (b"\n", b"")


def test_appends_are_picked_up_and_partial_line_is_held(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"tea jam\nscone\nmil")
    with FollowedFile(path) as src:
        got = flat(src.read())
        assert lines_of(got) == [b"tea jam", b"scone"]
        assert [(r.offset, r.end_offset) for r in got] == [(0, 8), (8, 14)]
        assert src.position()["offset"] == 14
        assert flat(src.read()) == []  # "mil" has no newline yet
        append(path, b"k bread")
        assert flat(src.read()) == []
        append(path, b"\nbutter\n")
        more = flat(src.read())
        assert lines_of(more) == [b"milk bread", b"butter"]
        assert src.position()["offset"] == path.stat().st_size
        assert not src.exhausted
        check_offsets(path.read_bytes(), got + more)


def test_max_records_limits_one_read(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"".join(b"line%d\n" % i for i in range(25)))
    src = FollowedFile(path)
    batches = [flat(src.read(max_records=10)) for _ in range(4)]
    assert [len(b) for b in batches] == [10, 10, 5, 0]
    assert [r.data for b in batches for r in b] == [b"line%d" % i for i in range(25)]
    src.close()


def test_rotation_by_rename_finishes_old_file_then_reads_new(tmp_path, caplog):
    path = tmp_path / "orders.log"
    path.write_bytes(b"a\nb\n")
    caplog.set_level(logging.INFO, logger=LOGGER)
    src = FollowedFile(path)
    assert lines_of(flat(src.read())) == [b"a", b"b"]
    old_identity = (src.position()["device"], src.position()["inode"])
    # the writer appends a last line to the old file, then rotates
    append(path, b"c\nlast-without-newline")
    os.rename(path, tmp_path / "orders.log.1")
    path.write_bytes(b"new1\nnew2\n")
    got = flat(src.read())
    assert lines_of(got) == [b"c", b"last-without-newline", b"new1", b"new2"]
    assert [r.offset for r in got] == [4, 6, 0, 5]
    pos = src.position()
    assert (pos["device"], pos["inode"]) != old_identity
    assert pos["offset"] == 10
    rotated = [r for r in caplog.records if "rotated" in r.getMessage()]
    assert len(rotated) == 1
    assert rotated[0].levelno == logging.INFO
    src.close()


def test_rotation_where_new_file_appears_later(tmp_path):
    path = tmp_path / "orders.log"
    path.write_bytes(b"a\n")
    src = FollowedFile(path)
    assert lines_of(flat(src.read())) == [b"a"]
    os.rename(path, tmp_path / "orders.log.1")
    append(tmp_path / "orders.log.1", b"b\n")  # writer still on the old file
    assert lines_of(flat(src.read())) == [b"b"]
    assert flat(src.read()) == []
    path.write_bytes(b"c\n")
    assert lines_of(flat(src.read())) == [b"c"]
    src.close()


def test_truncation_starts_again_from_zero(tmp_path, caplog):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"one\ntwo\nthree\n")
    caplog.set_level(logging.INFO, logger=LOGGER)
    src = FollowedFile(path)
    assert len(flat(src.read())) == 3
    with open(path, "r+b") as f:  # copy-and-truncate: same file, emptied in place
        f.truncate(0)
    append(path, b"four\n")
    got = flat(src.read())
    assert lines_of(got) == [b"four"]
    assert got[0].offset == 0
    assert src.position()["offset"] == 5
    assert sum("truncated" in r.getMessage() for r in caplog.records) == 1
    src.close()


def test_resume_from_position_continues_exactly(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\nb\nc\n")
    first = FollowedFile(path)
    assert lines_of(flat(first.read(max_records=2))) == [b"a", b"b"]
    saved = json.loads(json.dumps(first.position()))  # a checkpoint stores JSON
    first.close()
    append(path, b"d\n")
    second = FollowedFile.from_position(path, saved, poll_interval_seconds=0.01)
    got = flat(second.read())
    assert lines_of(got) == [b"c", b"d"]
    assert got[0].offset == 4
    second.close()


def test_resume_after_rotation_while_stopped_reads_new_file_from_zero(tmp_path, caplog):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\nb\n")
    first = FollowedFile(path)
    flat(first.read(max_records=1))
    saved = first.position()
    first.close()
    os.rename(path, tmp_path / "feed.txt.1")
    path.write_bytes(b"x\ny\n")
    caplog.set_level(logging.WARNING, logger=LOGGER)
    second = FollowedFile.from_position(path, saved)
    assert lines_of(flat(second.read())) == [b"x", b"y"]
    assert any("rotated while stopped" in r.getMessage() for r in caplog.records)
    second.close()


def test_resume_after_truncation_while_stopped(tmp_path, caplog):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"aaaa\nbbbb\n")
    first = FollowedFile(path)
    flat(first.read())
    saved = first.position()
    first.close()
    with open(path, "r+b") as f:
        f.truncate(0)
        f.write(b"z\n")
    caplog.set_level(logging.WARNING, logger=LOGGER)
    second = FollowedFile.from_position(path, saved)
    assert lines_of(flat(second.read())) == [b"z"]
    assert any("truncated while stopped" in r.getMessage() for r in caplog.records)
    second.close()


def test_position_for_another_path_is_ignored(tmp_path, caplog):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\nb\n")
    caplog.set_level(logging.WARNING, logger=LOGGER)
    src = FollowedFile.from_position(path, {"path": "/elsewhere", "offset": 2, "device": 1})
    assert lines_of(flat(src.read())) == [b"a", b"b"]
    assert any("/elsewhere" in r.getMessage() for r in caplog.records)
    with pytest.raises(InputError, match="not valid"):
        FollowedFile.from_position(path, {"offset": 3})
    src.close()


def test_over_long_line_is_cut_and_the_rest_skipped(tmp_path):
    path = tmp_path / "feed.txt"
    limit = 100
    long_line = b"q" * 250_000  # several internal reads
    path.write_bytes(b"ok\n" + long_line + b"\nafter\n")
    src = FollowedFile(path, max_record_bytes=limit)
    got = flat(src.read())
    assert [(r.data, r.too_long) for r in got] == [
        (b"ok", False),
        (b"q" * limit, True),
        (b"after", False),
    ]
    assert (got[1].offset, got[1].end_offset) == (3, 3 + len(long_line) + 1)
    assert got[2].offset == 3 + len(long_line) + 1
    src.close()


def test_over_long_line_arriving_in_pieces(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"x" * 30)
    src = FollowedFile(path, max_record_bytes=20)
    assert flat(src.read()) == []  # 30 bytes and no newline yet: held (only the first 20)
    append(path, b"y" * 30)
    assert flat(src.read()) == []
    append(path, b"z\nnext\n")
    got = flat(src.read())
    assert [(r.data, r.too_long, r.offset, r.end_offset) for r in got] == [
        (b"x" * 20, True, 0, 62),
        (b"next", False, 62, 67),
    ]
    assert src.position()["offset"] == 67
    src.close()


def test_waits_for_missing_file_and_logs_once(tmp_path, caplog):
    path = tmp_path / "later.txt"
    caplog.set_level(logging.INFO, logger=LOGGER)
    src = FollowedFile(path)
    assert flat(src.read()) == []
    assert flat(src.read()) == []
    assert src.position() == {"path": str(path), "device": None, "inode": None, "offset": 0}
    path.write_bytes(b"hello\n")
    assert lines_of(flat(src.read())) == [b"hello"]
    waiting = [r for r in caplog.records if "waiting for" in r.getMessage()]
    assert len(waiting) == 1
    src.close()


def test_no_follow_returns_final_line_and_becomes_exhausted(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\nb\nlast")
    src = FollowedFile(path, follow=False)
    got = flat(src.read())
    assert lines_of(got) == [b"a", b"b", b"last"]
    assert (got[-1].offset, got[-1].end_offset) == (4, 8)
    assert src.exhausted
    assert flat(src.read()) == []
    check_offsets(path.read_bytes(), got)
    src.close()
    with pytest.raises(InputError) as info:
        FollowedFile(tmp_path / "missing.txt", follow=False)
    assert "missing.txt" in str(info.value)


def test_no_follow_over_long_final_line(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\n" + b"w" * 50)
    src = FollowedFile(path, follow=False, max_record_bytes=10)
    got = flat(src.read())
    assert [(r.data, r.too_long, r.end_offset) for r in got] == [
        (b"a", False, 2),
        (b"w" * 10, True, 52),
    ]
    src.close()


def test_start_at_end_skips_existing_content_and_partial_line(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"old\nhalf-writ")
    src = FollowedFile(path, start_at="end")
    assert flat(src.read()) == []
    append(path, b"ten\nnew\n")
    got = flat(src.read())
    assert lines_of(got) == [b"new"]
    assert got[0].offset == len(b"old\nhalf-written\n")
    src.close()


def test_read_after_close_is_an_error(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"a\n")
    src = FollowedFile(path)
    src.close()
    src.close()
    with pytest.raises(InputError):
        flat(src.read())


def test_read_with_timeout_returns_empty_when_nothing_arrives(tmp_path):
    path = tmp_path / "feed.txt"
    path.write_bytes(b"")
    src = FollowedFile(path, poll_interval_seconds=0.01)
    assert flat(src.read(timeout=0.05)) == []
    src.close()


def test_stdin_source_reads_a_real_pipe_to_its_end():
    read_fd, write_fd = os.pipe()
    payload = b"tea jam\n\nscone\n" + b"v" * 40 + b"\nno-newline"

    def writer() -> None:
        with os.fdopen(write_fd, "wb") as w:
            for i in range(0, len(payload), 7):  # arrives in small pieces
                w.write(payload[i : i + 7])
                w.flush()

    thread = threading.Thread(target=writer)
    thread.start()
    with os.fdopen(read_fd, "rb") as r:
        src = StdinSource(r, max_record_bytes=16)
        got: list[Rec] = []
        while not src.exhausted:
            got += flat(src.read(timeout=1.0))
        thread.join()
    assert [(g.data, g.too_long) for g in got] == [
        (b"tea jam", False),
        (b"", False),
        (b"scone", False),
        (b"v" * 16, True),
        (b"no-newline", False),
    ]
    assert [g.offset for g in got] == [0, 8, 9, 15, 56]
    assert got[-1].end_offset == len(payload)
    assert src.position() is None  # a pipe cannot be re-read: not resumable
    src.close()


def test_stdin_source_respects_max_records():
    src = StdinSource(io.BytesIO(b"".join(b"%d\n" % i for i in range(30))))
    got: list[Rec] = []
    while not src.exhausted:
        batch = flat(src.read(max_records=4, timeout=1.0))
        assert len(batch) <= 4
        got += batch
    assert lines_of(got) == [b"%d" % i for i in range(30)]


def test_iterable_source():
    src = IterableSource(["tea", b"jam\n", b"x" * 9], max_record_bytes=5)
    first = flat(src.read(max_records=2))
    assert [(r.data, r.offset, r.end_offset) for r in first] == [(b"tea", 0, 4), (b"jam", 4, 8)]
    assert not src.exhausted
    rest = flat(src.read())
    assert [(r.data, r.too_long) for r in rest] == [(b"xxxxx", True)]
    assert src.exhausted
    assert rest[0].end_offset == 18
    assert src.position() is None
