"""Items in id space: filters, renames and catalogue levels as arrays indexed by item id.

The catalogue (:mod:`streamcount.catalogue`) answers by *name*: what a name read from the feed
counts as (:meth:`ItemResolver.expand`) and what a counted name is (:meth:`ItemResolver.describe`).
:class:`ItemTables` asks it once per distinct name in the engine's vocabulary and keeps the
answers as arrays, so a whole batch is mapped with a few numpy gathers and no Python object
per item:

* **expansion** (CSR ``exp_ptr`` / ``exp_ids``): the ids a feed item is counted as: nothing
  (ignored by a filter), itself, its base-level ancestor (e.g. its product), or that plus its
  ancestors at the other counted levels (generalised itemsets, Srikant & Agrawal 1995: each
  transaction is extended with the ancestors of its items);
* **ancestors** (CSR ``anc_ptr`` / ``anc_ids``): with several levels counted, every catalogue
  ancestor of an item, nearest first; their pairs with the item form
  :attr:`ItemTables.excluded`, the pairs no summary counts (an itemset never holds an item
  with its own ancestor);
* the **parent** of each item (its nearest counted ancestor, for the R-interest measure), its
  level, which filter removed it, whether the catalogue knows it, and its display name.

A new catalogue version (:meth:`ItemTables.reset`) rebuilds the tables from the vocabulary; ids
never change. :meth:`ItemTables.view` hands out a frozen :class:`ItemTaxonomy` for snapshots.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
from numpy.typing import NDArray

from streamcount.engine.keys import PairSet
from streamcount.engine.vocab import ItemVocabulary

__all__ = ["ItemFacts", "ItemResolver", "ItemTables", "ItemTaxonomy"]


@dataclass(frozen=True, slots=True)
class ItemFacts:
    """What the catalogue says of one counted item.

    Attributes
    ----------
    level:
        Index of its level in the resolver's ``level_names``; -1: not in the catalogue.
    parent:
        Its nearest ancestor among the levels counted (``None``: none).
    ancestors:
        With several levels counted, every catalogue ancestor, nearest first: no counted
        itemset holds the item with one of them. Empty with one level (items are counted as
        mapped, and nothing is excluded).
    display_name:
        The name people read (``None``: none).
    """

    level: int = -1
    parent: str | None = None
    ancestors: tuple[str, ...] = ()
    display_name: str | None = None


class ItemResolver(Protocol):
    """What the engine asks of a catalogue, name by name (answers never change for a given
    resolver; a new catalogue version is a new resolver)."""

    @property
    def version(self) -> str:
        """Identifies the catalogue in force (a hash of its file and settings)."""
        ...

    @property
    def identity(self) -> bool:
        """True when every feed item counts as itself alone (no filter, no rename, one level):
        the engine then skips the mapping."""
        ...

    @property
    def filter_labels(self) -> tuple[str, ...]:
        """The labels an item can be removed under (the ``filter`` metric label)."""
        ...

    @property
    def level_names(self) -> tuple[str, ...]:
        """The catalogue's levels, most specific first (``sku``, ``product``, ...)."""
        ...

    def expand(self, name: str) -> tuple[tuple[str, ...], int, bool]:
        """``(counted names, filter, known)`` of an item read from the feed: the names it is
        counted as (its base-level item first, then that item's counted ancestors; empty when
        a filter removes it), the index into :attr:`filter_labels` of the filter that removed
        it (-1: none) and whether the catalogue knows it."""
        ...

    def describe(self, name: str) -> ItemFacts:
        """What the catalogue says of a counted item (its level, parent, ancestors, display
        name)."""
        ...


@dataclass(frozen=True, slots=True)
class ItemTaxonomy:
    """The catalogue as a snapshot sees it: per item id, frozen.

    Ids at or beyond ``len(level)`` (interned after this view was made) count as unknown.

    Attributes
    ----------
    version:
        The catalogue version in force when the view was made.
    level_names:
        The catalogue's levels, most specific first.
    level:
        Per item id, the index of its level in ``level_names``; -1 when the catalogue does
        not know it.
    parent:
        Per item id, its nearest counted ancestor; -1: none.
    ancestors:
        ``(n, depth)`` catalogue ancestors of each item, nearest first, padded with -1 (empty
        with one level counted).
    display_names:
        Display names by item id (only items that have one). Shared, append-only.
    """

    version: str
    level_names: tuple[str, ...]
    level: NDArray[np.int8]
    parent: NDArray[np.int32]
    ancestors: NDArray[np.int32]
    display_names: Mapping[int, str] = field(default_factory=dict)

    def __len__(self) -> int:
        return int(self.level.shape[0])

    def level_of(self, item_id: int) -> str | None:
        """The level name of an item (``None``: not in the catalogue)."""
        if 0 <= item_id < len(self) and self.level[item_id] >= 0:
            return self.level_names[int(self.level[item_id])]
        return None

    def display_name(self, item_id: int) -> str | None:
        """The display name of an item (``None``: none)."""
        return self.display_names.get(int(item_id))

    def parents(self, ids: NDArray[np.int32]) -> NDArray[np.int32]:
        """The nearest counted ancestor of each id (-1: none), vectorised."""
        ids = np.asarray(ids, dtype=np.int32)
        out = np.full(ids.shape, -1, dtype=np.int32)
        inside = (ids >= 0) & (ids < len(self))
        out[inside] = self.parent[ids[inside]]
        return out

    def is_ancestor(self, a: NDArray[np.int32], b: NDArray[np.int32]) -> NDArray[np.bool_]:
        """Elementwise: is ``a[i]`` a catalogue ancestor of ``b[i]``?"""
        a = np.asarray(a, dtype=np.int32)
        b = np.asarray(b, dtype=np.int32)
        out = np.zeros(np.broadcast_shapes(a.shape, b.shape), dtype=bool)
        if self.ancestors.shape[1] == 0:
            return out
        a, b = np.broadcast_arrays(a, b)
        inside = (b >= 0) & (b < len(self)) & (a >= 0)
        rows = self.ancestors[b[inside]]
        out[inside] = (rows == a[inside][:, None]).any(axis=1)
        return out


def _csr(lists: Sequence[Sequence[int]]) -> tuple[NDArray[np.int64], NDArray[np.int32]]:
    lengths = np.fromiter(map(len, lists), dtype=np.int64, count=len(lists))
    ptr = np.zeros(len(lists) + 1, dtype=np.int64)
    np.cumsum(lengths, out=ptr[1:])
    flat = np.fromiter((i for row in lists for i in row), dtype=np.int32, count=int(ptr[-1]))
    return ptr, flat


def _append_csr(
    ptr: NDArray[np.int64], flat: NDArray[np.int32], lists: Sequence[Sequence[int]]
) -> tuple[NDArray[np.int64], NDArray[np.int32]]:
    more_ptr, more_flat = _csr(lists)
    return (
        np.concatenate((ptr, ptr[-1] + more_ptr[1:])),
        np.concatenate((flat, more_flat)),
    )


def _gather(
    ptr: NDArray[np.int64], flat: NDArray[np.int32], rows: NDArray[np.int32]
) -> tuple[NDArray[np.int32], NDArray[np.int64]]:
    """The CSR rows ``rows`` one after another, and each one's length."""
    lengths = ptr[rows + 1] - ptr[rows]
    total = int(lengths.sum())
    starts = ptr[rows] - (np.cumsum(lengths) - lengths)
    take = np.repeat(starts, lengths) + np.arange(total, dtype=np.int64)
    return flat[take], lengths


class ItemTables:
    """Per-item answers of an :class:`ItemResolver` as arrays over the engine's vocabulary.

    Parameters
    ----------
    resolver:
        The catalogue in force.

    Attributes
    ----------
    excluded:
        The pairs (item, counted ancestor) no summary counts; the panes hold this object and
        see every update.
    ignored:
        Feed items removed since the last :meth:`reset`, per label of the resolver's
        ``filter_labels`` (:meth:`ignored_by_label` adds the earlier ones).
    unknown:
        Feed items the catalogue does not know (occurrences, cumulative).

    Cost: :meth:`sync` asks the resolver once per new name; :meth:`expand` is O(items) numpy.
    Memory: about 20 bytes per distinct name plus the ancestor pairs.
    """

    def __init__(self, resolver: ItemResolver) -> None:
        self.excluded = PairSet()
        self.unknown = 0
        self._ignored_before: dict[str, int] = {}
        self.resolver = resolver
        self.ignored: NDArray[np.int64] = np.zeros(len(resolver.filter_labels), dtype=np.int64)
        self._clear()

    def reset(self, resolver: ItemResolver) -> None:
        """Use another catalogue version from the next transaction on: the tables are rebuilt
        from the vocabulary at the next :meth:`sync` (ids never change; the counters of
        removed and unknown items carry on)."""
        self._ignored_before = self.ignored_by_label()
        self.resolver = resolver
        self.ignored = np.zeros(len(resolver.filter_labels), dtype=np.int64)
        self._clear()

    def _clear(self) -> None:
        self.size = 0
        self.exp_ptr: NDArray[np.int64] = np.zeros(1, dtype=np.int64)
        self.exp_ids: NDArray[np.int32] = np.zeros(0, dtype=np.int32)
        self.anc_ptr: NDArray[np.int64] = np.zeros(1, dtype=np.int64)
        self.anc_ids: NDArray[np.int32] = np.zeros(0, dtype=np.int32)
        self.filter_of: NDArray[np.int16] = np.zeros(0, dtype=np.int16)
        self.known: NDArray[np.bool_] = np.zeros(0, dtype=bool)
        self.level: NDArray[np.int8] = np.zeros(0, dtype=np.int8)
        self.parent: NDArray[np.int32] = np.zeros(0, dtype=np.int32)
        self.unknown_seen: NDArray[np.bool_] = np.zeros(0, dtype=bool)
        #: display names by id; append-only until the next reset (views share it)
        self.display_names: dict[int, str] = {}
        self._view: ItemTaxonomy | None = None
        self.excluded.replace(np.zeros(0, dtype=np.int32), np.zeros(0, dtype=np.int32))

    def ignored_by_label(self) -> dict[str, int]:
        """Feed items removed so far, by filter label (every label, 0 included)."""
        out = dict(self._ignored_before)
        for label, n in zip(self.resolver.filter_labels, self.ignored.tolist(), strict=True):
            out[label] = out.get(label, 0) + int(n)
        return out

    # -- building -----------------------------------------------------------------------------

    def sync(self, vocabulary: ItemVocabulary) -> None:
        """Resolve every name interned since the last call (interning the names they map to,
        which are resolved too). Cost: one resolver call per new name."""
        if self.size == len(vocabulary):
            return
        resolver = self.resolver
        names = vocabulary.names
        grew_ancestors = False
        while self.size < len(vocabulary):
            lo, hi = self.size, len(vocabulary)
            expansions: list[list[int]] = []
            ancestors: list[list[int]] = []
            parents: list[int] = []
            filters: list[int] = []
            known: list[bool] = []
            levels: list[int] = []
            intern = vocabulary.encode_flat
            for item_id in range(lo, hi):
                name = names[item_id]
                counted, flt, is_known = resolver.expand(name)
                facts = resolver.describe(name)
                expansions.append(intern(counted, len(counted)).tolist())
                ancestors.append(intern(facts.ancestors, len(facts.ancestors)).tolist())
                parents.append(-1 if facts.parent is None else int(intern([facts.parent])[0]))
                filters.append(flt)
                known.append(is_known)
                levels.append(facts.level)
                if facts.display_name is not None:
                    self.display_names[item_id] = facts.display_name
            grew_ancestors |= any(ancestors)
            self.exp_ptr, self.exp_ids = _append_csr(self.exp_ptr, self.exp_ids, expansions)
            self.anc_ptr, self.anc_ids = _append_csr(self.anc_ptr, self.anc_ids, ancestors)
            self.filter_of = np.concatenate((self.filter_of, np.array(filters, dtype=np.int16)))
            self.known = np.concatenate((self.known, np.array(known, dtype=bool)))
            self.level = np.concatenate((self.level, np.array(levels, dtype=np.int8)))
            self.parent = np.concatenate((self.parent, np.array(parents, dtype=np.int32)))
            self.unknown_seen = np.concatenate((self.unknown_seen, np.zeros(hi - lo, dtype=bool)))
            self.size = hi
        if grew_ancestors:
            lengths = np.diff(self.anc_ptr)
            items = np.repeat(np.arange(self.size, dtype=np.int32), lengths)
            self.excluded.replace(items, self.anc_ids)
        self._view = None

    def pinned_mask(self, size: int) -> NDArray[np.bool_]:
        """The ids the tables map to other than an item itself (ancestors, parents, base
        items), over a vocabulary of ``size``: the names the engine's release of unused names
        must keep, so an ancestor is never released while an item maps to it."""
        mask = np.zeros(size, dtype=bool)
        rows = np.repeat(np.arange(self.size, dtype=np.int64), np.diff(self.exp_ptr))
        targets = self.exp_ids[self.exp_ids != rows]
        for ids in (self.anc_ids, self.parent[self.parent >= 0], targets):
            mask[ids[ids < size]] = True
        return mask

    def remap(self, mapping: NDArray[np.int32], vocabulary: ItemVocabulary) -> None:
        """The vocabulary was compacted (``mapping``: old id -> new id, -1 released): rebuild
        the tables for the new ids (the catalogue is asked again, name by name); the counters
        of removed and unknown items carry on."""
        seen = self.unknown_seen
        self.reset(self.resolver)
        self.sync(vocabulary)
        old = np.flatnonzero(seen[: mapping.shape[0]])
        new = mapping[old]
        new = new[(new >= 0) & (new < self.unknown_seen.shape[0])]
        self.unknown_seen[new] = True

    # -- per batch ----------------------------------------------------------------------------

    def expand(
        self, flat: NDArray[np.int32], lengths: NDArray[np.int64]
    ) -> tuple[NDArray[np.int32], NDArray[np.int64]]:
        """Map a batch (CSR of feed item ids, after :meth:`sync`): the ids each transaction is
        counted as (not yet sorted or de-duplicated) and the new lengths (0: emptied by the
        filters). Counts the removed and the unknown items."""
        if self.ignored.size and flat.size:
            flt = self.filter_of[flat]
            hit = flt >= 0
            if hit.any():
                self.ignored += np.bincount(flt[hit], minlength=self.ignored.size)
        strangers = flat[~self.known[flat]]
        if strangers.size:
            self.unknown += int(strangers.shape[0])
            self.unknown_seen[strangers] = True
        if self.resolver.identity:
            return flat, lengths
        out, per_item = _gather(self.exp_ptr, self.exp_ids, flat)
        txn = np.repeat(np.arange(lengths.shape[0], dtype=np.int64), lengths)
        new_lengths = np.bincount(txn, weights=per_item, minlength=lengths.shape[0])
        return out, new_lengths.astype(np.int64)

    # -- reading ------------------------------------------------------------------------------

    @property
    def unknown_distinct(self) -> int:
        """Distinct feed items seen that the catalogue does not know."""
        return int(self.unknown_seen.sum())

    def view(self) -> ItemTaxonomy:
        """A frozen view for snapshots (cached until the tables change)."""
        if self._view is None:
            lengths = np.diff(self.anc_ptr)
            depth = int(lengths.max(initial=0))
            matrix = np.full((self.size, depth), -1, dtype=np.int32)
            if depth:
                rows = np.repeat(np.arange(self.size), lengths)
                cols = np.arange(self.anc_ids.shape[0]) - np.repeat(self.anc_ptr[:-1], lengths)
                matrix[rows, cols] = self.anc_ids
            self._view = ItemTaxonomy(
                self.resolver.version,
                tuple(self.resolver.level_names),
                self.level.copy(),
                self.parent.copy(),
                matrix,
                self.display_names,
            )
        return self._view

    def check_invariants(self, vocabulary_size: int) -> None:
        """Assert the tables' shapes and that every mapped id lies in the vocabulary."""
        n = self.size
        assert n <= vocabulary_size, "tables beyond the vocabulary"
        assert self.exp_ptr.shape == (n + 1,) and self.anc_ptr.shape == (n + 1,), "CSR ptr"
        assert int(self.exp_ptr[-1]) == self.exp_ids.shape[0], "expansion CSR length"
        assert int(self.anc_ptr[-1]) == self.anc_ids.shape[0], "ancestor CSR length"
        for arr in (self.exp_ids, self.anc_ids, self.parent[self.parent >= 0]):
            assert arr.size == 0 or (int(arr.min()) >= 0 and int(arr.max()) < vocabulary_size)
        assert self.filter_of.shape == self.known.shape == self.level.shape == (n,), "columns"
        assert self.parent.shape == (n,), "parents"
