"""What an item read from the feed is counted as: filters, renames, then the catalogue levels.

:class:`ItemCatalogue` answers the engine's two questions by name
(:class:`~streamcount.engine.taxonomy.ItemResolver`):

``expand(name)``
    1. a filter (``items.ignore`` / ``items.allow``) may remove the item: it counts as nothing;
    2. rename rules (``items.rename``) rewrite the name;
    3. the catalogue places the name at a level with its ancestors. ``items.levels`` lists the
       levels counted, most specific first. The item counts as its ancestor at the first
       counted level (its *base* item: the product when counting products), plus, with
       several levels, that item's ancestors at the other counted levels (the transaction
       extended with the ancestors of its items, Srikant & Agrawal 1995).

    A name the catalogue does not know stays itself at every level. A SKU with an empty cell
    at a counted level stays itself at that level too (its nearest known item at or below the
    level stands for it).

``describe(name)``
    The level of a counted item, its parent (nearest counted ancestor), its catalogue
    ancestors when several levels are counted (the items no itemset may hold with it: an
    itemset never holds an item with its own ancestor) and its display name.

Filters see the names as read; renames and the catalogue see them after the filters. An
ancestor counts whatever the filters say of its name (filters are about lines of an order).

Examples
--------
>>> from streamcount.catalogue.filters import ItemFilter
>>> from streamcount.catalogue.rename import RenameRules
>>> from streamcount.catalogue.table import parse_catalogue
>>> data = b"sku,product,category\\nsock-m,sock,apparel\\nsock-l,sock,apparel\\nmug,mug,kitchen\\n"
>>> table = parse_catalogue(data, "c.csv", ("sku", "product", "category"), "_name")
>>> cat = ItemCatalogue.build(table, ("sku", "product"), ItemFilter.from_config(["fee:*"], None),
...                           RenameRules.parse(["(.+)-XL => \\\\1-l"]))
>>> cat.expand("sock-m"), cat.expand("sock-XL"), cat.expand("mug")
((('sock-m', 'sock'), -1, True), (('sock-l', 'sock'), -1, True), (('mug',), -1, True))
>>> cat.expand("fee:delivery"), cat.expand("gift-card")
(((), 0, True), (('gift-card',), -1, False))
>>> cat.describe("sock-m")
ItemFacts(level=0, parent='sock', ancestors=('sock', 'apparel'), display_name=None)
>>> cat.describe("gift-card")
ItemFacts(level=-1, parent=None, ancestors=(), display_name=None)
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Sequence
from dataclasses import dataclass

from streamcount.catalogue.filters import ItemFilter
from streamcount.catalogue.rename import RenameRules
from streamcount.catalogue.table import CatalogueTable
from streamcount.engine.taxonomy import ItemFacts
from streamcount.errors import CatalogueError

__all__ = ["ItemCatalogue"]


@dataclass(frozen=True, slots=True)
class ItemCatalogue:
    """Filters, renames and a catalogue table with the levels counted; immutable (a reload
    makes a new one). Implements :class:`~streamcount.engine.taxonomy.ItemResolver`.

    Attributes
    ----------
    table:
        The catalogue file, or ``None`` without one.
    level_names:
        The catalogue's levels (the file's hierarchy columns), most specific first.
    counted:
        Indices into ``level_names`` of the levels counted, ascending.
    version:
        SHA-256 (hex) over the file's hash and every setting that changes the mapping.
    """

    table: CatalogueTable | None
    level_names: tuple[str, ...]
    counted: tuple[int, ...]
    filters: ItemFilter
    rename: RenameRules
    version: str

    @classmethod
    def build(
        cls,
        table: CatalogueTable | None,
        levels: Sequence[str],
        filters: ItemFilter,
        rename: RenameRules,
        *,
        settings: object = None,
    ) -> ItemCatalogue:
        """Put the pieces together; ``settings`` (JSON-able) takes part in the version.

        Raises
        ------
        CatalogueError
            When ``levels`` names a level the file does not hold.
        """
        names = table.columns if table is not None else (levels[0],)
        missing = [lv for lv in levels if lv not in names]
        if missing:
            where = table.path if table is not None else "<no file>"
            raise CatalogueError(
                where,
                f"items.levels counts {missing} but the file's hierarchy columns are "
                f"{list(names)}; add the column or remove the level",
                line=1 if table is not None else None,
            )
        counted = tuple(sorted(names.index(lv) for lv in levels))
        payload = json.dumps(
            {"file": table.sha256 if table is not None else None, "settings": settings},
            sort_keys=True,
            default=list,
        )
        version = hashlib.sha256(payload.encode("utf-8")).hexdigest()
        return cls(table, tuple(names), counted, filters, rename, version)

    # -- ItemResolver ---------------------------------------------------------------------------

    @property
    def identity(self) -> bool:
        return not self.filters and not self.rename and self.counted == (0,)

    @property
    def filter_labels(self) -> tuple[str, ...]:
        return self.filters.labels

    def expand(self, name: str) -> tuple[tuple[str, ...], int, bool]:
        label = self.filters.classify(name) if self.filters else None
        if label is not None:
            return (), self.filters.labels.index(label), True
        renamed = self.rename(name) if self.rename else name
        known = self.table is None or renamed in self.table.level
        base = self._at(renamed, self.counted[0])
        return (base, *self._counted_ancestors(base)), -1, known

    def describe(self, name: str) -> ItemFacts:
        table = self.table
        if table is None or name not in table.level:
            return ItemFacts()
        counted = self._counted_ancestors(name)
        return ItemFacts(
            table.level[name],
            counted[0] if counted else None,
            tuple(table.chain(name)[1:]) if len(self.counted) > 1 else (),
            table.display.get(name),
        )

    # -- helpers -------------------------------------------------------------------------------

    def _counted_ancestors(self, name: str) -> tuple[str, ...]:
        """The items standing for ``name`` at the counted levels above its own, nearest
        first (``name`` itself excluded)."""
        table = self.table
        if table is None or name not in table.level:
            return ()
        own = table.level[name]
        out: list[str] = []
        for c in self.counted:
            if c > own:
                up = self._at(name, c)
                if up != name and up not in out:
                    out.append(up)
        return tuple(out)

    def _at(self, name: str, level: int) -> str:
        """The item standing for ``name`` at ``level``: its most general ancestor (itself
        included) whose level is at most ``level``; ``name`` itself when there is none."""
        table = self.table
        if table is None or name not in table.level:
            return name
        found = name
        for node in table.chain(name):
            if table.level[node] <= level:
                found = node
            else:
                break
        return found

    def display_name(self, name: str) -> str | None:
        """The display name of ``name`` (``None``: none)."""
        return None if self.table is None else self.table.display.get(name)

    def level_of(self, name: str) -> str | None:
        """The level name of ``name`` (``None``: not in the catalogue)."""
        level = self.describe(name).level
        return None if level < 0 else self.level_names[level]
