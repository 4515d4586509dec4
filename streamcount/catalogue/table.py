"""The catalogue file: a CSV that maps each SKU to its ancestors (product, category, ...).

Layout (header names set by ``items.level_columns`` and ``items.display_name_suffix``)::

    sku,sku_name,product,product_name,category,category_name
    throw-wool-ochre,"Wool throw, ochre",wool-throw,Wool throw,linens,Linens
    throw-wool-sage,"Wool throw, sage",wool-throw,Wool throw,linens,Linens

* The first row names the columns. The hierarchy columns are those of ``items.level_columns``
  the header holds, most specific first; the first (``sku``) is required, deeper levels are
  optional (a ``department`` column after ``category`` is one more level). A column named
  ``<level column><suffix>`` (``product_name``) holds that level's display names. Other
  columns are ignored.
* Each row places one SKU under its ancestors. An empty cell skips that level (the SKU's
  parent is then the next non-empty cell). A name repeated in the next column of its row is
  the same item (a product sold in one SKU may use its product id as SKU).
* Rules, each error naming the file, line and column: every name has one level (a name is not
  a SKU on one row and a product on another); every item has one parent (a product is in one
  category); a SKU is listed once (or again with the same ancestors); names and display names
  hold no control characters (:mod:`streamcount.catalogue.text`); one display name per item.
* Cells are read as UTF-8 (a byte-order mark is allowed), stripped of surrounding spaces and,
  with ``nfc`` (``input.normalize: nfc``, as the feed's names), put in Unicode normal form C.

The file's SHA-256 is its version.

Examples
--------
>>> data = b"sku,product,category\\nsock-m,sock,apparel\\nsock-l,sock,apparel\\nmug,mug,kitchen\\n"
>>> table = parse_catalogue(data, "catalogue.csv", ("sku", "product", "category"), "_name")
>>> table.columns, table.parent["sock-m"], table.parent["sock"], table.level["mug"]
(('sku', 'product', 'category'), 'sock', 'apparel', 0)
>>> table.parent["mug"]  # the one-SKU product: its SKU is the product itself
'kitchen'
"""

from __future__ import annotations

import csv
import hashlib
import io
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from streamcount.catalogue.text import normalize_name, text_problem
from streamcount.errors import CatalogueError

__all__ = ["CatalogueTable", "load_catalogue", "parse_catalogue"]


@dataclass(frozen=True, slots=True)
class CatalogueTable:
    """A parsed catalogue file.

    Attributes
    ----------
    path:
        The file it was read from.
    sha256:
        SHA-256 (hex) of the file's bytes: the catalogue version.
    columns:
        The hierarchy columns the file holds, most specific first (the catalogue's levels).
    level:
        Per name, the index in ``columns`` of its level.
    parent:
        Per name, its parent (the next name up on its rows); roots are absent.
    display:
        Per name, its display name (only names that have one).
    rows:
        Data rows read.
    """

    path: str
    sha256: str
    columns: tuple[str, ...]
    level: dict[str, int] = field(default_factory=dict)
    parent: dict[str, str] = field(default_factory=dict)
    display: dict[str, str] = field(default_factory=dict)
    rows: int = 0

    def chain(self, name: str) -> list[str]:
        """``name`` and its ancestors, nearest first (just ``[name]`` for an unknown name)."""
        out = [name]
        while out[-1] in self.parent:
            out.append(self.parent[out[-1]])
        return out


def load_catalogue(
    path: str | Path, level_columns: Sequence[str], display_name_suffix: str, *, nfc: bool = True
) -> CatalogueTable:
    """Read and check a catalogue file.

    Raises
    ------
    CatalogueError
        Naming the file, and the line and column where the file breaks a rule.
    """
    text_path = str(path)
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise CatalogueError(text_path, "no such file (items.catalogue)") from None
    except IsADirectoryError:
        raise CatalogueError(text_path, "is a directory, not a CSV file") from None
    except OSError as exc:
        raise CatalogueError(text_path, f"cannot be read ({exc.strerror})") from None
    return parse_catalogue(data, text_path, level_columns, display_name_suffix, nfc=nfc)


def _decode(data: bytes, path: str) -> str:
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise CatalogueError(
            path,
            f"byte {data[exc.start : exc.start + 1]!r} at byte column {column} is not UTF-8; "
            "save the file as UTF-8",
            line=line,
        ) from None
    return text.removeprefix("\ufeff")


class _Builder:
    """Collects the rows, checking each against what earlier rows said."""

    def __init__(self, path: str, columns: tuple[str, ...]) -> None:
        self.path = path
        self.columns = columns
        self.level: dict[str, int] = {}
        self.parent: dict[str, str] = {}
        self.display: dict[str, str] = {}
        #: where each fact was first stated: (line, column)
        self.level_at: dict[str, int] = {}
        self.parent_at: dict[str, int] = {}
        self.display_at: dict[str, int] = {}
        self.sku_at: dict[str, tuple[int, tuple[str, ...]]] = {}

    def fail(self, line: int, column: int | None, problem: str) -> CatalogueError:
        return CatalogueError(self.path, problem, line=line, column=column)

    def add_row(
        self,
        line: int,
        cells: list[tuple[int, int, str]],
        displays: dict[int, tuple[int, str]],
    ) -> None:
        """One row: ``cells`` are ``(level, field number, name)`` of its non-empty hierarchy
        cells, most specific first; ``displays`` maps a level to ``(field, display name)``."""
        # adjacent repeats are one item (a product sold as one SKU): one node, several levels
        nodes: list[tuple[int, int, str]] = []
        levels_of: list[list[int]] = []
        for level, column, name in cells:
            if nodes and nodes[-1][2] == name and levels_of[-1][-1] == level - 1:
                levels_of[-1].append(level)
                continue
            for _, other_column, other in nodes:
                if other == name:
                    raise self.fail(
                        line,
                        column,
                        f"{name!r} is already on this row (column {other_column}); an item "
                        "cannot be its own ancestor",
                    )
            nodes.append((level, column, name))
            levels_of.append([level])
        sku = nodes[0][2]
        chain = tuple(name for _, _, name in nodes)
        if sku in self.sku_at:
            first, before = self.sku_at[sku]
            if before != chain:
                raise self.fail(
                    line,
                    nodes[0][1],
                    f"SKU {sku!r} is listed again with other ancestors ({' > '.join(chain)}; "
                    f"line {first} has {' > '.join(before)}); list each SKU once",
                )
        else:
            self.sku_at[sku] = (line, chain)
        for j, (level, column, name) in enumerate(nodes):
            known = self.level.get(name)
            if known is None:
                self.level[name] = level
                self.level_at[name] = line
            elif known != level:
                raise self.fail(
                    line,
                    column,
                    f"{name!r} is a {self.columns[level]} here but a {self.columns[known]} on "
                    f"line {self.level_at[name]}; every name has one level",
                )
            if j + 1 < len(nodes):
                up = nodes[j + 1][2]
                had = self.parent.get(name)
                if had is None:
                    self.parent[name] = up
                    self.parent_at[name] = line
                elif had != up:
                    raise self.fail(
                        line,
                        nodes[j + 1][1],
                        f"{self.columns[level]} {name!r} is under {up!r} here but under "
                        f"{had!r} on line {self.parent_at[name]}; every item has one parent",
                    )
            shown = next(
                (displays[lv] for lv in levels_of[j] if lv in displays and displays[lv][1]), None
            )
            if shown is not None:
                had_name = self.display.get(name)
                if had_name is None:
                    self.display[name] = shown[1]
                    self.display_at[name] = line
                elif had_name != shown[1]:
                    raise self.fail(
                        line,
                        shown[0],
                        f"display name {shown[1]!r} of {name!r} differs from {had_name!r} on "
                        f"line {self.display_at[name]}; give one display name per item",
                    )


def parse_catalogue(
    data: bytes,
    path: str,
    level_columns: Sequence[str],
    display_name_suffix: str,
    *,
    nfc: bool = True,
) -> CatalogueTable:
    """Parse and check the bytes of a catalogue file (see the module docstring).

    Raises
    ------
    CatalogueError
        Naming ``path``, and the line and column where the file breaks a rule.
    """
    text = _decode(data, path)
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    records: list[tuple[int, list[str]]] = []
    line = 1
    try:
        for row in reader:
            records.append((line, row))
            line = reader.line_num + 1
    except csv.Error as exc:
        raise CatalogueError(path, f"is not valid CSV ({exc})", line=reader.line_num) from None
    if not records:
        raise CatalogueError(path, "is empty; the first row must name the columns", line=1)
    header_line, header = records[0]
    header = [h.strip() for h in header]
    seen: dict[str, int] = {}
    for j, name in enumerate(header, start=1):
        if name in seen:
            raise CatalogueError(
                path,
                f"column name {name!r} is given twice (column {seen[name]})",
                line=header_line,
                column=j,
            )
        seen[name] = j
    if level_columns[0] not in seen:
        raise CatalogueError(
            path,
            f"the header has no {level_columns[0]!r} column (the first of "
            f"items.level_columns: {list(level_columns)}); it has {header}",
            line=header_line,
        )
    columns = tuple(c for c in level_columns if c in seen)
    level_fields = [seen[c] - 1 for c in columns]
    display_fields = {
        lvl: seen[c + display_name_suffix] - 1
        for lvl, c in enumerate(columns)
        if c + display_name_suffix in seen
    }
    builder = _Builder(path, columns)
    rows = 0
    for line, row in records[1:]:
        if not row or all(not cell.strip() for cell in row):
            continue  # a blank line
        if len(row) != len(header):
            raise CatalogueError(
                path,
                f"the row has {len(row)} fields but the header has {len(header)}",
                line=line,
            )
        cells: list[tuple[int, int, str]] = []
        for lvl, f in enumerate(level_fields):
            name = normalize_name(row[f].strip(), nfc)
            if not name:
                continue
            problem = text_problem(name)
            if problem is not None:
                raise CatalogueError(path, f"name {problem}", line=line, column=f + 1)
            cells.append((lvl, f + 1, name))
        if not cells or cells[0][0] != 0:
            raise CatalogueError(
                path,
                f"the {columns[0]!r} cell is empty; every row names a {columns[0]}",
                line=line,
                column=level_fields[0] + 1,
            )
        displays: dict[int, tuple[int, str]] = {}
        for lvl, f in display_fields.items():
            shown = normalize_name(row[f].strip(), nfc)
            problem = text_problem(shown)
            if problem is not None:
                raise CatalogueError(path, f"display name {problem}", line=line, column=f + 1)
            displays[lvl] = (f + 1, shown)
        builder.add_row(line, cells, displays)
        rows += 1
    return CatalogueTable(
        path,
        hashlib.sha256(data).hexdigest(),
        columns,
        builder.level,
        builder.parent,
        builder.display,
        rows,
    )
