"""The catalogue on real files: its checks (file, line, column), filters, renames, unknown
items, reloads that keep or refuse a new version, and the history across a checkpoint.

Check values are worked out by hand from the small files written here (the line and column of
each planted mistake, the counts of each basket file).
"""

from __future__ import annotations

import os
import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest
import yaml

from streamcount.catalogue.state import CatalogueState
from streamcount.catalogue.table import load_catalogue
from streamcount.config.load import config_from_mapping
from streamcount.errors import CatalogueError, CheckpointError
from streamcount.intake.records import Decoded
from streamcount.pipeline import Pipeline

COLUMNS = ("sku", "product", "category")

GOOD = """sku,sku_name,product,product_name,category
throw-ochre,"Wool throw, ochre",wool-throw,Wool throw,linens
throw-sage,"Wool throw, sage",wool-throw,Wool throw,linens
tea-green,Green tea 100 g,tea,Loose tea,tea-and-coffee
mug,Stoneware mug,mug,Stoneware mug,tea-and-coffee
"""


def write(path: Path, text: str | bytes) -> Path:
    if isinstance(text, str):
        text = text.encode("utf-8")
    path.write_bytes(text)
    return path


def error_of(tmp_path: Path, text: str | bytes) -> CatalogueError:
    path = write(tmp_path / "catalogue.csv", text)
    with pytest.raises(CatalogueError) as info:
        load_catalogue(path, COLUMNS, "_name")
    return info.value


# ---- the file's checks -----------------------------------------------------------------------


def test_a_good_file(tmp_path: Path) -> None:
    table = load_catalogue(write(tmp_path / "c.csv", GOOD), COLUMNS, "_name")
    assert table.rows == 4
    assert table.parent["throw-ochre"] == "wool-throw" and table.parent["wool-throw"] == "linens"
    assert table.display["throw-ochre"] == "Wool throw, ochre"
    assert table.display["wool-throw"] == "Wool throw"
    assert table.level["mug"] == 0 and table.parent["mug"] == "tea-and-coffee"


@pytest.mark.parametrize(
    ("text", "line", "column", "words"),
    [
        # the header lacks the sku column
        ("item,product\na,b\n", 1, None, "no 'sku' column"),
        # line 3: the sku cell (column 1) is empty
        ("sku,product\na,p\n,p\n", 3, 1, "'sku' cell is empty"),
        # line 2 has three fields, the header two
        ("sku,product\na,p,x\n", 2, None, "3 fields"),
        # line 3 puts product p under another category (column 3)
        ("sku,product,category\na,p,c1\nb,p,c2\n", 3, 3, "on line 2"),
        # line 3 makes the product p a SKU
        ("sku,product\na,p\np,q\n", 3, 1, "a product on line 2"),
        # line 3 lists SKU a again under another product
        ("sku,product\na,p\na,q\n", 3, 1, "listed again"),
        # a right-to-left override in a display name, line 2, column 2
        ("sku,sku_name,product\na,tea\u202emal,p\n", 2, 2, "U+202E"),
        # a right-to-left isolate and a line separator in display names (as item names: refused)
        ("sku,product,product_name\na,p,Pots \u2067x\n", 2, 3, "U+2067"),
        ("sku,sku_name,product\na,two\u2028lines,p\n", 2, 2, "U+2028"),
        # a control character in a name, line 2, column 3
        ("sku,product,category\na,p,c\x07\n", 2, 3, "U+0007"),
        # two display names for product p (line 3, column 4)
        ("sku,product,product_name\na,p,Pots\nb,p,Pans\n", 3, 3, "differs"),
        # a name twice on its own row (not in adjacent columns)
        ("sku,product,category\na,p,a\n", 2, 3, "already on this row"),
    ],
)
def test_bad_rows_name_file_line_and_column(
    tmp_path: Path, text: str, line: int, column: int | None, words: str
) -> None:
    err = error_of(tmp_path, text)
    assert err.path.endswith("catalogue.csv") and str(tmp_path) in str(err)
    assert err.line == line and err.column == column
    assert words in err.problem
    where = f"line {line}" + (f", column {column}" if column else "")
    assert where in str(err)


def test_not_utf8_names_the_line(tmp_path: Path) -> None:
    err = error_of(tmp_path, b"sku,product\na,p\nb\xff,p\n")
    assert err.line == 3 and "not UTF-8" in err.problem


def test_bad_quoting_and_missing_file(tmp_path: Path) -> None:
    err = error_of(tmp_path, 'sku,product\n"a"x,p\n')
    assert "not valid CSV" in err.problem
    with pytest.raises(CatalogueError, match="no such file"):
        load_catalogue(tmp_path / "absent.csv", COLUMNS, "_name")


def test_start_up_error_names_file_line_and_column(tmp_path: Path) -> None:
    """A bad file stops the command with one line naming file, line and column (exit 2)."""
    write(tmp_path / "catalogue.csv", "sku,product,category\na,p,c1\nb,p,c2\n")
    write(tmp_path / "orders.txt", "a b\n")
    config = {"items": {"catalogue": "catalogue.csv", "levels": ["sku", "product"]}}
    write(tmp_path / "config.yaml", yaml.safe_dump(config))
    proc = subprocess.run(
        [sys.executable, "-m", "streamcount", "replay", "--config", "config.yaml", "orders.txt"],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 2
    assert "catalogue catalogue.csv, line 3, column 3:" in proc.stderr
    assert "under 'c2' here but under 'c1' on line 2" in proc.stderr


def test_levels_must_exist_in_the_file(tmp_path: Path) -> None:
    write(tmp_path / "c.csv", "sku,product\na,p\n")
    cfg = config_from_mapping(
        {"items": {"catalogue": str(tmp_path / "c.csv"), "levels": ["sku", "category"]}}
    )
    with pytest.raises(CatalogueError, match=r"counts \['category'\]"):
        CatalogueState(cfg.items)


# ---- filters, renames and unknown items on a real feed ---------------------------------------


def replay(tmp_path: Path, items: dict[str, object], feed: str, k: int = 2) -> Pipeline:
    """Counts ``feed`` (basket lines) through the real replay path; the pipeline it used."""
    from streamcount.replay import replay_file

    write(tmp_path / "orders.txt", feed)
    cfg = config_from_mapping(
        {
            "items": items,
            "engine": {
                "epsilon": 0.0,
                "max_itemset_size": k,
                "window_size": 1000,
                "pane_size": 1000,
            },
            "input": {"dead_letter_path": None},
        }
    )
    return replay_file(str(tmp_path / "orders.txt"), cfg, progress=None).pipeline


def counts(pipeline: Pipeline) -> Counter[tuple[str, ...]]:
    snap = pipeline.engine.fresh_snapshot()
    out: Counter[tuple[str, ...]] = Counter()
    for level in snap.levels:
        for row, c in zip(level.items.tolist(), level.count.tolist(), strict=True):
            out[tuple(sorted(snap.item_names[i] for i in row))] = c
    return out


FEED = """throw-ochre fee:delivery tea-green
throw-sage fee:delivery
fee:delivery fee:gift-wrap
carrier-bag mug gift-card
tea-green-XL throw-ochre
"""


def test_ignore_globs_and_exact_names(tmp_path: Path) -> None:
    pipeline = replay(tmp_path, {"ignore": ["fee:*", "carrier-bag"]}, FEED)
    got = counts(pipeline)
    # by hand: fees and the bag never counted; order 3 (fees only) set aside
    assert not [s for s in got if any(i.startswith("fee:") or i == "carrier-bag" for i in s)]
    assert got[("throw-ochre",)] == 2 and got[("gift-card", "mug")] == 1
    assert pipeline.rejected_counts == Counter({"emptied_by_filter": 1})
    stats = pipeline.engine.statistics()
    assert stats.items_ignored == {"fee:*": 4, "carrier-bag": 1}
    assert stats.transactions_seen == 4


def test_ignore_is_case_sensitive_and_wins_over_allow(tmp_path: Path) -> None:
    feed = "Fee:delivery throw-ochre\nfee:delivery tea-green\n"
    pipeline = replay(tmp_path, {"ignore": ["fee:*"], "allow": ["throw-*", "fee:*", "tea-*"]}, feed)
    got = counts(pipeline)
    # Fee:delivery is neither ignored (case) nor allowed: removed as "not allowed";
    # fee:delivery is allowed and ignored: ignored
    assert set(got) == {("throw-ochre",), ("tea-green",)}
    assert pipeline.engine.statistics().items_ignored == {"fee:*": 1, "not allowed": 1}


def test_rename_then_catalogue_levels_and_unknown_items(tmp_path: Path) -> None:
    write(tmp_path / "catalogue.csv", GOOD)
    items = {
        "ignore": ["fee:*", "carrier-bag"],
        "rename": ["(.+)-(XS|S|M|L|XL) => \\1"],
        "catalogue": str(tmp_path / "catalogue.csv"),
        "levels": ["sku", "product"],
    }
    pipeline = replay(tmp_path, items, FEED)
    got = counts(pipeline)
    # tea-green-XL is renamed tea-green; orders (by hand, extended with products):
    # 1 {throw-ochre, wool-throw, tea-green, tea}; 2 {throw-sage, wool-throw};
    # 4 {mug, gift-card} (mug is its own product); 5 {tea-green, tea, throw-ochre, wool-throw}
    assert got[("tea-green",)] == 2 and got[("tea",)] == 2
    assert got[("tea", "wool-throw")] == 2 and got[("throw-ochre", "wool-throw")] == 0
    assert got[("gift-card", "mug")] == 1
    stats = pipeline.engine.statistics()
    # gift-card is not in the catalogue: counted as itself, once
    assert stats.items_unknown == 1 and stats.items_unknown_distinct == 1


def test_one_level_counts_products(tmp_path: Path) -> None:
    write(tmp_path / "catalogue.csv", GOOD)
    items = {"catalogue": str(tmp_path / "catalogue.csv"), "levels": ["product"]}
    got = counts(replay(tmp_path, items, "throw-ochre throw-sage\nthrow-sage tea-green\n"))
    assert got == Counter({("wool-throw",): 2, ("tea",): 1, ("tea", "wool-throw"): 1})


# ---- reloads ---------------------------------------------------------------------------------


def items_config(path: Path, **extra: object) -> object:
    return config_from_mapping(
        {"items": {"catalogue": str(path), "levels": ["sku", "product"], **extra}}
    ).items


def test_reload_keeps_the_previous_version_on_a_bad_row(tmp_path: Path) -> None:
    path = write(tmp_path / "catalogue.csv", GOOD)
    state = CatalogueState(items_config(path))  # type: ignore[arg-type]
    first = state.version
    write(path, GOOD + "sock-m,,sock,,apparel\nsock-l,,sock,,linens\n")  # line 7: 2 categories
    outcome = state.reload(next_seq=11)
    assert not outcome.changed and outcome.error is not None
    assert "line 7, column 5" in outcome.error and "on line 6" in outcome.error
    assert state.version == first and state.reloads == {"ok": 0, "failed": 1}
    assert "line 7" in str(state.status()["last_error"])
    write(path, GOOD + "sock-m,,sock,,apparel\n")
    outcome = state.reload(next_seq=20)
    assert outcome.changed and state.version != first
    assert [e["from_seq"] for e in state.history] == [1, 20]
    assert state.status()["last_error"] is None
    # the same file again: no new version
    assert not state.reload(next_seq=30).changed and len(state.history) == 2


def test_poll_sees_a_changed_file(tmp_path: Path) -> None:
    path = write(tmp_path / "catalogue.csv", GOOD)
    state = CatalogueState(items_config(path, reload_seconds=1.0))  # type: ignore[arg-type]
    assert state.poll(5, now=0.0) is None  # not due yet (looked at start-up)
    write(path, GOOD + "sock-m,,sock,,apparel\n")
    os.utime(path, ns=(1, 10**18))
    outcome = state.poll(5, now=10**9)
    assert outcome is not None and outcome.changed
    state.requested = True  # SIGHUP: reload even though nothing changed
    outcome = state.poll(6, now=10**9)
    assert outcome is not None and not outcome.changed and state.reloads["ok"] == 2


def test_mapping_applies_from_the_next_transaction(tmp_path: Path) -> None:
    path = write(tmp_path / "catalogue.csv", "sku,product\na,p\nb,q\n")
    cfg = config_from_mapping(
        {
            "items": {"catalogue": str(path), "levels": ["sku", "product"]},
            "engine": {"epsilon": 0.0, "max_itemset_size": 2, "window_size": 100, "pane_size": 50},
        }
    )
    pipeline = Pipeline(cfg, alerts=False)
    pipeline.add(Decoded([["a", "b"]] * 3))
    write(path, "sku,product\na,p\nb,p\n")  # b moves to product p
    pipeline.catalogue.requested = True  # type: ignore[union-attr]
    outcome = pipeline.poll_catalogue()
    assert outcome is not None and outcome.changed
    pipeline.add(Decoded([["a", "b"]] * 2))
    got = counts(pipeline)
    # by hand: the first 3 orders count p and q, the next 2 count p only
    assert got[("p", "q")] == 3 and got[("p",)] == 5 and got[("q",)] == 3
    status = pipeline.catalogue_status()
    assert status is not None
    assert [e["from_seq"] for e in status["history"]] == [1, 4]
    assert status["panes"][0]["versions"] == [e["version"] for e in status["history"]]


def test_restart_with_a_newer_catalogue_records_it(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    path = write(tmp_path / "catalogue.csv", "sku,product\na,p\n")
    cfg = config_from_mapping(
        {
            "items": {"catalogue": str(path), "levels": ["sku", "product"]},
            "engine": {"epsilon": 0.0, "max_itemset_size": 2, "window_size": 20, "pane_size": 5},
        }
    )
    before = Pipeline(cfg, alerts=False)
    before.add(Decoded([["a", "x"]] * 12))
    meta, arrays = before.state()
    write(path, "sku,product\na,p\nx,r\n")
    after = Pipeline(cfg, alerts=False)
    with caplog.at_level("WARNING", logger="streamcount.catalogue.state"):
        after.load_state(meta, arrays)
    history = after.catalogue.history  # type: ignore[union-attr]
    assert [e["reason"] for e in history] == ["start", "restart"]
    assert history[-1]["from_seq"] == 13
    assert "Live panes counted under an older version: [0, 1, 2]" in caplog.text
    status = after.catalogue_status()
    assert status is not None and status["panes_under_older_versions"] == [0, 1, 2]
    # other levels: the saved counts are of other itemsets
    other = config_from_mapping(
        {
            "items": {"catalogue": str(path), "levels": ["product"]},
            "engine": {"epsilon": 0.0, "max_itemset_size": 2, "window_size": 20, "pane_size": 5},
        }
    )
    with pytest.raises(CheckpointError, match=r"items\.levels"):
        Pipeline(other, alerts=False).load_state(meta, arrays)


def test_a_pair_excluded_by_a_reload_leaves_the_open_pane_only(tmp_path: Path) -> None:
    """Pane 0 (orders 1-10) closes under the first file; pane 1 counts orders 11-15 under it,
    then the file puts b under p, so (b, p) holds an item with its ancestor: pane 1 drops it
    (and the triple holding it) at its next batch, pane 0 keeps what it counted."""
    path = write(tmp_path / "catalogue.csv", "sku,product\na,p\nb,q\n")
    cfg = config_from_mapping(
        {
            "items": {"catalogue": str(path), "levels": ["sku", "product"]},
            "engine": {
                "epsilon": 0.0,
                "max_itemset_size": 3,
                "window_size": 100,
                "pane_size": 10,
                "batch_size": 5,
            },
        }
    )
    pipeline = Pipeline(cfg, alerts=False)
    pipeline.add(Decoded([["a", "b", "x"]] * 15))
    write(path, "sku,product\na,p\nb,p\n")
    pipeline.catalogue.requested = True  # type: ignore[union-attr]
    assert pipeline.poll_catalogue().changed  # type: ignore[union-attr]
    pipeline.add(Decoded([["a", "b", "x"]] * 5))
    pipeline.engine.check_invariants()
    got = counts(pipeline)
    # by hand: pane 0 counted (b, p) and (b, p, x) 10 times; pane 1 dropped them
    assert got[("b", "p")] == 10 and got[("b", "p", "x")] == 10
    # (a, q) and (q,) were counted by orders 1-15; p by all 20
    assert got[("a", "q")] == 15 and got[("q",)] == 15 and got[("p",)] == 20
    assert got[("a", "b")] == 20 and got[("p", "x")] == 20


# ---- what readers show -----------------------------------------------------------------------


def test_item_details_and_generalisation_from_a_snapshot(tmp_path: Path) -> None:
    from streamcount.catalogue.view import ItemDetails

    write(tmp_path / "catalogue.csv", GOOD)
    cfg = config_from_mapping(
        {
            "items": {"catalogue": str(tmp_path / "catalogue.csv"), "levels": list(COLUMNS)},
            "engine": {"epsilon": 0.0, "max_itemset_size": 2, "window_size": 10, "pane_size": 10},
        }
    )
    pipeline = Pipeline(cfg, alerts=False)
    pipeline.add(Decoded([["throw-ochre", "throw-sage", "tea-green", "gift-card"]]))
    details = ItemDetails(pipeline.engine.fresh_snapshot())
    assert details(["throw-ochre", "wool-throw", "linens", "gift-card"]) == [
        {"item": "throw-ochre", "level": "sku", "display_name": "Wool throw, ochre"},
        {"item": "wool-throw", "level": "product", "display_name": "Wool throw"},
        {"item": "linens", "level": "category", "display_name": None},
        {"item": "gift-card", "level": None, "display_name": None},
    ]
    # the product-level itemset generalises its SKU-level echoes, not the reverse
    assert details.generalises(["tea", "wool-throw"], ["tea-green", "throw-ochre"])
    assert details.generalises(["tea-and-coffee", "linens"], ["tea-green", "throw-sage"])
    assert not details.generalises(["tea-green", "throw-ochre"], ["tea", "wool-throw"])
    assert not details.generalises(["tea", "wool-throw"], ["tea", "wool-throw"])
    assert not details.generalises(["tea", "linens"], ["tea-green", "gift-card"])
    # one ancestor stands for one item only: {wool-throw, linens} is no generalisation of
    # {throw-ochre, tea-green} (linens is not an ancestor of tea-green)
    assert not details.generalises(["wool-throw", "linens"], ["throw-ochre", "tea-green"])


def test_a_worker_names_the_catalogue_versions_each_pane_was_counted_under(
    tmp_path: Path,
) -> None:
    """What a cluster worker writes into a pane's summary: the version(s) in force for the
    pane's transactions (the catalogue's own history is the reference), so the merger can
    tell panes counted under different catalogues."""
    from streamcount.cluster.worker import catalogue_version

    path = write(tmp_path / "catalogue.csv", GOOD)
    state = CatalogueState(items_config(path))  # type: ignore[arg-type]
    first = state.version[:12]
    write(path, GOOD + "sock-m,,sock,,apparel\n")
    assert state.reload(next_seq=20).changed
    second = state.version[:12]
    assert catalogue_version(state, 1, 19) == first
    assert catalogue_version(state, 15, 25) == f"{first},{second}"
    assert catalogue_version(state, 20, 40) == second
    assert catalogue_version(state, 0, 0) == second  # an empty pane: the version in force
    assert catalogue_version(None, 1, 40) == "none"
