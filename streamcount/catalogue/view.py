"""What readers show of an item beside its id: its level and display name, from a snapshot.

For the HTTP API, the alert records and the page (their owners call these; the catalogue does
not write their output):

* :func:`item_details` is the one place that makes the ``item_details`` map of the API's
  answers (``/v1/rules``, ``/v1/itemsets``, ``/v1/history``) and of the alert records:
  ``{name: {"level", "display_name"}}`` for the items named there that the catalogue says
  something about (a level or a display name; either may be ``null``). Items the catalogue
  does not know are left out; without a catalogue there is no map at all (``None``: callers
  leave the key out, so answers without a catalogue are as before).
* :class:`ItemDetails` answers, for item names of one snapshot, ``{"item", "level",
  "display_name"}`` per item (``level`` and ``display_name`` are ``null`` without a catalogue
  or for an item it does not know). Display names are untrusted text (checked at load like
  item names, see :mod:`streamcount.catalogue.text`): escape them where they are shown.
* :func:`generalises` says whether one itemset is another with some items replaced by their
  ancestors (``{wool-throw, beeswax-candle}`` generalises ``{wool-throw,
  beeswax-candle/lavender}``), so rule families can fold the echoes of a product-level rule at
  the SKU level into it.

Examples
--------
>>> import numpy as np
>>> from streamcount.engine.snapshot import WindowSnapshot
>>> from streamcount.engine.taxonomy import ItemTaxonomy
>>> tax = ItemTaxonomy("v", ("sku", "product"), np.array([0, 1, -1], dtype=np.int8),
...                    np.array([1, -1, -1], dtype=np.int32), np.array([[1], [-1], [-1]],
...                    dtype=np.int32), {0: "Wool throw, ochre", 1: "Wool throw"})
>>> snap = WindowSnapshot(0, 0, 0, 0, 0.0, None, 0, (), ["throw/ochre", "throw", "gift-card"],
...                       taxonomy=tax)
>>> details = ItemDetails(snap)
>>> details(["throw", "gift-card"])
[{'item': 'throw', 'level': 'product', 'display_name': 'Wool throw'},
 {'item': 'gift-card', 'level': None, 'display_name': None}]
>>> item_details(details, ["throw/ochre", "gift-card", "throw"])
{'throw': {'level': 'product', 'display_name': 'Wool throw'},
 'throw/ochre': {'level': 'sku', 'display_name': 'Wool throw, ochre'}}
>>> print(item_details(WindowSnapshot(0, 0, 0, 0, 0.0, None, 0, (), ["gift-card"]), ["gift-card"]))
None
>>> details.generalises(["throw", "gift-card"], ["throw/ochre", "gift-card"])
True
>>> details.generalises(["throw/ochre", "gift-card"], ["throw", "gift-card"])
False
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from streamcount.engine.snapshot import WindowSnapshot

__all__ = ["ItemDetail", "ItemDetails", "generalises", "item_details"]

#: one entry of an ``item_details`` map: ``{"level": str | None, "display_name": str | None}``
ItemDetail = dict[str, str | None]


class ItemDetails:
    """Levels and display names of the items of one snapshot (a name index built once).

    Parameters
    ----------
    snapshot:
        The snapshot the names are read from.
    catalogue:
        Whether a catalogue file is configured (``items.catalogue``). Filters or renames alone
        also give snapshots a taxonomy, one that knows no item: :attr:`configured` is false
        then, and :func:`item_details` gives no map.

    Cost: O(vocabulary) to build the name index (on first use), O(1) per item asked.
    """

    def __init__(self, snapshot: WindowSnapshot, *, catalogue: bool = True) -> None:
        self.snapshot = snapshot
        self.taxonomy = snapshot.taxonomy
        self.catalogue = bool(catalogue)
        self._index: dict[str, int] | None = None

    def _id(self, name: str) -> int:
        if self._index is None:
            self._index = {n: i for i, n in enumerate(self.snapshot.item_names)}
        return self._index.get(name, -1)

    def detail(self, name: str) -> dict[str, Any]:
        """``{"item", "level", "display_name"}`` of one item name."""
        if self.taxonomy is None:
            return {"item": name, "level": None, "display_name": None}
        item_id = self._id(name)
        return {
            "item": name,
            "level": self.taxonomy.level_of(item_id),
            "display_name": self.taxonomy.display_name(item_id) if item_id >= 0 else None,
        }

    @property
    def configured(self) -> bool:
        """Whether a catalogue file is in force (configured, and the snapshot carries its
        taxonomy)."""
        return self.catalogue and self.taxonomy is not None

    def about(self, names: Iterable[str]) -> dict[str, ItemDetail]:
        """The ``item_details`` map of ``names`` (see :func:`item_details`), by name; empty
        without a catalogue."""
        out: dict[str, ItemDetail] = {}
        if not self.configured:
            return out
        for name in sorted(set(names)):
            found = self.detail(name)
            if found["level"] is not None or found["display_name"] is not None:
                out[name] = {"level": found["level"], "display_name": found["display_name"]}
        return out

    def __call__(self, names: Iterable[str]) -> list[dict[str, Any]]:
        """:meth:`detail` of each name, in the order given."""
        return [self.detail(name) for name in names]

    def generalises(self, general: Sequence[str], specific: Sequence[str]) -> bool:
        """See :func:`generalises` (with this snapshot's taxonomy)."""
        if self.taxonomy is None:
            return False
        return generalises(
            [self._id(n) for n in general], [self._id(n) for n in specific], self.taxonomy
        )


def item_details(
    source: WindowSnapshot | ItemDetails, names: Iterable[str]
) -> dict[str, ItemDetail] | None:
    """The ``item_details`` map of the items ``names`` (any order, repeats allowed): for each
    item the catalogue says something about, ``{"level": <level name or null>,
    "display_name": <text or null>}``, sorted by name; ``None`` when no catalogue is in force
    (the caller then leaves the key out).

    ``source`` is an :class:`ItemDetails` of the snapshot the names were read from (reused
    across calls: it indexes the vocabulary once), or the snapshot itself (a catalogue file
    is then taken to be configured when it carries a taxonomy). Display names are
    untrusted text, checked at load like item names (:mod:`streamcount.catalogue.text`).
    """
    details = source if isinstance(source, ItemDetails) else ItemDetails(source)
    if not details.configured:
        return None
    return details.about(names)


def generalises(general: Sequence[int], specific: Sequence[int], taxonomy: Any) -> bool:
    """Whether itemset ``general`` is ``specific`` with at least one item replaced by one of
    its catalogue ancestors (item ids; every item of ``general`` equals or is an ancestor of a
    different item of ``specific``, and the two have as many items).

    ``taxonomy`` is a snapshot's :class:`~streamcount.engine.taxonomy.ItemTaxonomy`.
    """
    if len(general) != len(specific) or sorted(general) == sorted(specific):
        return False
    n = len(general)
    g = np.repeat(np.asarray(general, dtype=np.int32), n)
    s = np.tile(np.asarray(specific, dtype=np.int32), n)
    fits = ((g == s) | taxonomy.is_ancestor(g, s)).reshape(n, n)
    # a perfect matching of general items to specific ones (Kuhn's augmenting paths)
    owner = [-1] * n

    def place(i: int, seen: list[bool]) -> bool:
        for j in np.flatnonzero(fits[i]).tolist():
            if not seen[j]:
                seen[j] = True
                if owner[j] < 0 or place(owner[j], seen):
                    owner[j] = i
                    return True
        return False

    return all(place(i, [False] * n) for i in range(n))
