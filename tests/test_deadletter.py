"""Dead-letter file: real bad records from the decoders, written and read back as JSON."""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
import textwrap

import pytest

from streamcount.errors import ParseError
from streamcount.intake.deadletter import RAW_CHARS, DeadLetterFile
from streamcount.intake.formats import BasketDecoder, JsonlDecoder

FIELDS = {"time", "source", "offset", "reason", "detail", "raw", "raw_truncated"}


def rejected(decoder, record: bytes, offset: int = 0) -> ParseError:
    with pytest.raises(ParseError) as info:
        decoder.feed(record, offset, offset + len(record) + 1)
    return info.value


def read_lines(path) -> list[dict]:
    return [json.loads(line) for line in path.read_text(encoding="utf-8").splitlines()]


def test_lines_parse_as_json_with_every_field(tmp_path):
    path = tmp_path / "nested" / "dir" / "dead.jsonl"  # parent directories are created
    clock = iter([1000.5, 1001.0, 1002.25])
    dl = DeadLetterFile(path, clock=lambda: next(clock))
    dl.write(rejected(JsonlDecoder(), b'{"items": ["a"', 17), source="orders.jsonl")
    dl.write(rejected(JsonlDecoder(), b'{"id": 4}', 40), source="orders.jsonl")
    dl.write(rejected(BasketDecoder(), b"tea \xff\xfe jam", 3), source="-")
    dl.flush()
    rows = read_lines(path)
    assert [set(r) for r in rows] == [FIELDS] * 3
    assert [(r["time"], r["source"], r["offset"], r["reason"]) for r in rows] == [
        (1000.5, "orders.jsonl", 17, "malformed"),
        (1001.0, "orders.jsonl", 40, "missing_field"),
        (1002.25, "-", 3, "bad_encoding"),
    ]
    assert rows[1]["raw"] == '{"id": 4}'
    assert "'items'" in rows[1]["detail"]
    # invalid bytes are shown as backslash escapes, the rest as text
    assert rows[2]["raw"] == "tea \\xff\\xfe jam"
    assert rows[2]["raw_truncated"] is False
    assert dl.counts() == {"malformed": 1, "missing_field": 1, "bad_encoding": 1}
    dl.close()


def test_raw_is_cut_to_4096_characters(tmp_path):
    path = tmp_path / "dead.jsonl"
    record = b"{" + b"x" * 10_000
    with DeadLetterFile(path) as dl:
        dl.write(rejected(JsonlDecoder(max_record_bytes=100_000), record), source="s")
        dl.write(rejected(JsonlDecoder(), b"[" + b"y" * (RAW_CHARS - 1)), source="s")
    long_row, exact_row = read_lines(path)
    assert len(long_row["raw"]) == RAW_CHARS
    assert long_row["raw"] == record[:RAW_CHARS].decode()
    assert long_row["raw_truncated"] is True
    assert len(exact_row["raw"]) == RAW_CHARS
    assert exact_row["raw_truncated"] is False


def test_non_ascii_text_survives_the_round_trip(tmp_path):
    path = tmp_path / "dead.jsonl"
    with DeadLetterFile(path) as dl:
        dl.write(rejected(JsonlDecoder(), '{"items": []}  # thé'.encode()), source="s")
    (row,) = read_lines(path)
    assert row["raw"] == '{"items": []}  # thé'


def test_without_a_path_it_only_counts(tmp_path):
    dl = DeadLetterFile(None)
    for record in (b"a b c d", b"a b c d e", b"\xff"):
        try:
            BasketDecoder(max_basket_items=3).feed(record, 0, 1)
        except ParseError as exc:
            dl.write(exc, source="-")
    dl.flush()
    dl.close()
    assert dl.counts() == {"too_many_items": 2, "bad_encoding": 1}
    assert list(tmp_path.iterdir()) == []


def test_buffered_until_flush_and_appends_after_reopen(tmp_path):
    path = tmp_path / "dead.jsonl"
    path.write_text('{"earlier": true}\n')
    dl = DeadLetterFile(path)
    dl.write(ParseError("empty", "no items", offset=1, raw=b"{}"), source="a")
    dl.flush()
    assert len(path.read_text().splitlines()) == 2
    dl.close()
    dl.write(ParseError("empty", "no items", offset=2, raw="{}"), source="a")
    dl.close()
    rows = read_lines(path)
    assert rows[0] == {"earlier": True}
    assert [r["offset"] for r in rows[1:]] == [1, 2]
    assert dl.counts() == {"empty": 2}


def test_unwritable_path_warns_and_keeps_counting_even_as_root(tmp_path, caplog):
    target = tmp_path / "is-a-directory"
    target.mkdir()  # opening a directory for append fails for every user
    caplog.set_level(logging.WARNING, logger="streamcount.intake.deadletter")
    dl = DeadLetterFile(target)
    dl.write(ParseError("malformed", "x", offset=0, raw=b"{"), source="s")
    dl.write(ParseError("malformed", "x", offset=1, raw=b"{"), source="s")
    dl.flush()
    dl.close()
    assert dl.counts() == {"malformed": 2}
    assert dl.failed_writes == 2
    assert sum("cannot be written" in r.getMessage() for r in caplog.records) == 1


# --- losses are counted per record, logged with the number lost, and exposed as a metric ---


def _bad_records(n: int, start: int = 0) -> list[ParseError]:
    decoder = BasketDecoder(max_basket_items=1)
    return [rejected(decoder, f"tea jam-{i}".encode(), i) for i in range(start, start + n)]


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full (Linux)")
def test_full_device_counts_every_record_lost(caplog):
    # /dev/full accepts the open and fails every write with ENOSPC, as a full disk does
    caplog.set_level(logging.INFO, logger="streamcount.intake.deadletter")
    dl = DeadLetterFile("/dev/full")
    for error in _bad_records(502):
        dl.write(error, source="orders.csv")
    dl.flush()
    assert dl.failed_writes == 502
    assert dl.counts() == {"too_many_items": 502}
    for error in _bad_records(7, start=502):
        dl.write(error, source="orders.csv")
    dl.close()
    assert dl.failed_writes == 509
    warnings = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
    # one warning for the streak (the next would come a minute later), with the number lost,
    # the role, the path and the way out
    assert len(warnings) == 1, warnings
    (message,) = warnings
    assert "502 records lost so far" in message
    assert "dead-letter /dev/full" in message
    assert "no space left" in message and "input.dead_letter_path" in message
    assert "record(s)" not in message


def test_write_cut_short_counts_only_the_lines_that_did_not_arrive(tmp_path):
    # A real short write: the file size limit (RLIMIT_FSIZE) stops a write part-way, as a disk
    # filling up does; then the limit is lifted and writing goes on. Run in a child process so
    # the limit never touches the test process.
    path = tmp_path / "dead.jsonl"
    script = textwrap.dedent(
        f"""
        import json, resource, signal
        from streamcount.errors import ParseError
        from streamcount.intake.deadletter import DeadLetterFile
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a failed write, not a killed process
        soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
        resource.setrlimit(resource.RLIMIT_FSIZE, (1000, hard))
        dl = DeadLetterFile({str(path)!r})
        for i in range(40):
            dl.write(ParseError("empty", "no item", offset=i, raw=b"," * 7), source="s")
        dl.flush()
        lost_first = dl.failed_writes
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        for i in range(40, 45):
            dl.write(ParseError("empty", "no item", offset=i, raw=b"," * 7), source="s")
        dl.close()
        print(json.dumps([lost_first, dl.failed_writes]))
        """
    )
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=60, check=False
    )
    assert done.returncode == 0, done.stderr
    lost_first, lost_total = json.loads(done.stdout)
    lines = path.read_bytes().split(b"\n")
    assert lines[-1] == b""
    whole = []
    torn = []
    for line in lines[:-1]:
        try:
            whole.append(json.loads(line))
        except ValueError:
            torn.append(line)
    assert path.stat().st_size >= 1000  # the first flush filled the file up to the limit
    # the cut line is alone on its line: the next write started a new one
    assert len(torn) == 1 and len(torn[0]) < len(lines[0])
    offsets = [row["offset"] for row in whole]
    assert offsets == [*range(len(offsets) - 5), *range(40, 45)]
    assert lost_first == lost_total == 40 - (len(offsets) - 5)
    assert 0 < lost_first < 40


def test_lost_records_reach_the_metric(tmp_path):
    from prometheus_client import CollectorRegistry

    from streamcount.service.metrics import Metrics

    registry = CollectorRegistry()
    metrics = Metrics(registry, statistics=lambda: None)
    target = tmp_path / "a-directory"
    target.mkdir()
    dl = DeadLetterFile(target)
    for error in _bad_records(3):
        dl.write(error, source="s")
    dl.flush()
    metrics.observe_dead_letters(dl.failed_writes)
    metrics.observe_dead_letters(dl.failed_writes)  # a running total: no double count
    assert registry.get_sample_value("streamcount_dead_letters_lost_total") == 3
    for error in _bad_records(2):
        dl.write(error, source="s")
    dl.close()
    metrics.observe_dead_letters(dl.failed_writes)
    assert registry.get_sample_value("streamcount_dead_letters_lost_total") == 5
