"""tests/data against its README: every listed file is there with the recorded content.

The README's "Integrity" table (sha256 of the decompressed content, sizes) and "Statistics"
table (transactions, distinct items, occurrences, lengths) are read here and checked against
the files; the statistics are recomputed with the oracle's reader (gzip + whitespace split,
tests/oracle.py), independent of streamcount. The published figures the README quotes beside
them (FIMI'03 table, UCI) are checked by hand there, not here: this module pins that the files
are the ones described.
"""

from __future__ import annotations

import gzip
import hashlib
import re

import pytest
from data_files import DATA_DIR, data_path
from oracle import read_transactions

README = DATA_DIR / "README.md"
#: the whole folder must stay "a few MB": it is cloned with every checkout
MAX_FOLDER_BYTES = 5 * 1024 * 1024


def _table(heading: str) -> list[dict[str, str]]:
    """Rows of the first Markdown table under ``## heading`` in the README, keyed by header."""
    lines = README.read_text(encoding="utf-8").splitlines()
    try:
        start = lines.index(f"## {heading}")
    except ValueError:
        raise AssertionError(f"{README.name}: no '## {heading}' section") from None
    rows: list[list[str]] = []
    for line in lines[start + 1 :]:
        if line.startswith("## "):
            break
        if line.startswith("|"):
            rows.append([c.strip().strip("`") for c in line.strip().strip("|").split("|")])
        elif rows:
            break  # the table ended
    assert len(rows) > 2, f"{README.name}: no table under '## {heading}'"
    header, sep, *body = rows
    assert all(re.fullmatch(r":?-+:?", c) for c in sep), f"bad table separator under {heading}"
    return [dict(zip(header, row, strict=True)) for row in body]


def _int(text: str) -> int:
    return int(text.replace(",", ""))


INTEGRITY = _table("Integrity")
STATISTICS = _table("Statistics")


def _content(name: str) -> bytes:
    path = data_path(name)
    if name.endswith(".gz"):
        with gzip.open(path, "rb") as fh:
            return fh.read()
    return path.read_bytes()


@pytest.mark.parametrize("row", INTEGRITY, ids=lambda r: r["file"])
def test_listed_file_exists_with_its_sha256_and_sizes(row: dict[str, str]) -> None:
    name = row["file"]
    content = _content(name)  # a missing file raises FileNotFoundError: a failure, never a skip
    assert hashlib.sha256(content).hexdigest() == row["sha256 of decompressed content"], name
    assert len(content) == _int(row["decompressed bytes"]), name
    assert data_path(name).stat().st_size == _int(row["file bytes"]), name


def test_every_file_in_the_folder_is_listed_and_the_folder_stays_small() -> None:
    present = {p.name for p in DATA_DIR.iterdir()} - {"README.md"}
    listed = {row["file"] for row in INTEGRITY}
    assert present == listed, f"unlisted: {present - listed}, listed but absent: {listed - present}"
    total = sum(p.stat().st_size for p in DATA_DIR.iterdir())
    assert total <= MAX_FOLDER_BYTES, f"tests/data holds {total:,} bytes"


@pytest.mark.parametrize("row", STATISTICS, ids=lambda r: r["file"])
def test_statistics_in_the_readme_are_those_of_the_file(row: dict[str, str]) -> None:
    baskets = [set(t) for t in read_transactions(row["file"])]
    lengths = [len(t) for t in baskets]
    assert len(baskets) == _int(row["transactions"])
    assert len(set().union(*baskets)) == _int(row["distinct items"])
    assert sum(lengths) == _int(row["item occurrences"])
    assert f"{sum(lengths) / len(baskets):.3f}" == row["average length"]
    assert (min(lengths), max(lengths)) == (_int(row["shortest"]), _int(row["longest"]))


def test_every_dataset_with_statistics_is_in_the_integrity_table() -> None:
    assert {r["file"] for r in STATISTICS} <= {r["file"] for r in INTEGRITY}


def test_a_missing_dataset_is_an_error_naming_it() -> None:
    with pytest.raises(FileNotFoundError, match=r"'no-such\.dat\.gz' not found in tests/data/"):
        data_path("no-such.dat.gz")
