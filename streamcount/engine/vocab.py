"""Item vocabulary: item names interned to dense integer ids.

Ids are handed out in order of first appearance (0, 1, 2, ...), so they depend only on the
order of the feed, never on the process (no built-in ``hash()`` of strings), and survive a
checkpoint round trip unchanged.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from itertools import chain, repeat

import numpy as np

__all__ = ["ItemVocabulary"]


class _Interner(dict[str, int]):
    """A dict that gives an unseen name the next id on lookup (``__missing__``)."""

    __slots__ = ("names",)

    def __init__(self) -> None:
        super().__init__()
        self.names: list[str] = []

    def __missing__(self, name: str) -> int:
        new_id = len(self.names)
        self.names.append(name)
        self[name] = new_id
        return new_id


class ItemVocabulary:
    """Maps item names to dense ids ``0..size-1`` and back.

    Cost: one dict lookup per item occurrence (C-level ``map``); memory one dict entry and
    one list slot per distinct item.

    Examples
    --------
    >>> vocab = ItemVocabulary()
    >>> vocab.encode_flat(["tea", "honey", "tea"]).tolist()
    [0, 1, 0]
    >>> vocab.name(1), len(vocab)
    ('honey', 2)
    """

    __slots__ = ("_interner",)

    def __init__(self, names: Iterable[str] = ()) -> None:
        self._interner = _Interner()
        for name in names:
            self._interner[name]

    def __len__(self) -> int:
        return len(self._interner.names)

    @property
    def names(self) -> Sequence[str]:
        """Names by id (a read-only view is the caller's duty; the list only ever grows)."""
        return self._interner.names

    def name(self, item_id: int) -> str:
        return self._interner.names[item_id]

    def get(self, name: str) -> int | None:
        """The id of ``name``, or ``None`` when it was never seen (does not intern)."""
        return dict.get(self._interner, name)

    def encode_flat(self, names: Iterable[str], count: int = -1) -> np.ndarray:
        """Intern a flat sequence of names; int32 ids in the same order."""
        return np.fromiter(map(self._interner.__getitem__, names), dtype=np.int32, count=count)

    def encode_table(self, names: Sequence[str], codes: np.ndarray) -> np.ndarray:
        """Intern a table of distinct ``names`` that ``codes`` index; returns the int32 id of
        each name (``table[codes]`` are the ids of the occurrences).

        One dict lookup per distinct name, none per occurrence. Names not seen before get
        their ids in order of first appearance in ``codes`` (what :meth:`encode_flat` of the
        occurrences would give); names that ``codes`` never use are not interned (their
        entry is ``-1``).

        >>> vocab = ItemVocabulary(["tea"])
        >>> vocab.encode_table(["jam", "tea", "honey", "scone"], np.array([2, 1, 0, 2])).tolist()
        [2, 0, 1, -1]
        >>> list(vocab.names)
        ['tea', 'honey', 'jam']
        """
        interner = self._interner
        table = np.fromiter(map(interner.get, names, repeat(-1)), dtype=np.int32, count=len(names))
        missing = np.flatnonzero(table < 0)
        if missing.shape[0]:
            first = np.full(len(names), np.iinfo(np.int64).max, dtype=np.int64)
            used, at = np.unique(np.asarray(codes, dtype=np.int64), return_index=True)
            first[used] = at
            missing = missing[np.argsort(first[missing], kind="stable")]
            missing = missing[first[missing] < np.iinfo(np.int64).max]
            for i in missing.tolist():
                table[i] = interner[names[i]]
        return table

    def encode_baskets(self, baskets: Sequence[Sequence[str]]) -> tuple[np.ndarray, np.ndarray]:
        """Intern a list of baskets: ``(flat ids, lengths)`` with no per-item Python object."""
        lengths = np.fromiter(map(len, baskets), dtype=np.int64, count=len(baskets))
        flat = self.encode_flat(chain.from_iterable(baskets), int(lengths.sum()))
        return flat, lengths

    def compact(self, keep: np.ndarray) -> np.ndarray:
        """Release the names whose ``keep`` flag is false; returns the old-to-new id map
        (``-1`` for a released name).

        The kept names keep their order, so the map is increasing: sorted rows of ids stay
        sorted after it. The table is rebuilt (a Python dict never shrinks when entries are
        deleted); the old names list is left untouched, so snapshots built before keep reading
        the names they were built with. Cost: O(kept names).

        >>> vocab = ItemVocabulary(["tea", "jam", "honey", "scone"])
        >>> vocab.compact(np.array([True, False, True, False])).tolist()
        [0, -1, 1, -1]
        >>> list(vocab.names), vocab.get("jam")
        (['tea', 'honey'], None)
        """
        keep = np.asarray(keep, dtype=bool)
        if keep.shape != (len(self),):
            raise ValueError(f"keep has shape {keep.shape}, the vocabulary {len(self)} names")
        mapping = np.full(len(self), -1, dtype=np.int32)
        kept = np.flatnonzero(keep)
        mapping[kept] = np.arange(kept.shape[0], dtype=np.int32)
        old = self._interner.names
        fresh = _Interner()
        for i in kept.tolist():
            fresh[old[i]]
        self._interner = fresh
        return mapping

    # -- persistence -------------------------------------------------------------------------

    def to_arrays(self) -> dict[str, np.ndarray]:
        """Names as one UTF-8 byte array plus end offsets (no pickle, no object dtype)."""
        encoded = [n.encode("utf-8") for n in self._interner.names]
        ends = np.cumsum([len(b) for b in encoded], dtype=np.int64)
        blob = np.frombuffer(b"".join(encoded), dtype=np.uint8).copy()
        return {"vocab.bytes": blob, "vocab.ends": ends}

    @classmethod
    def from_arrays(cls, arrays: dict[str, np.ndarray]) -> ItemVocabulary:
        blob = arrays["vocab.bytes"].tobytes()
        ends = arrays["vocab.ends"].tolist()
        starts = [0, *ends[:-1]] if ends else []
        return cls(blob[s:e].decode("utf-8") for s, e in zip(starts, ends, strict=True))
