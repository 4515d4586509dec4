"""Item filters: lines of an order that are not products (fees, bags, discounts) are removed
before counting.

``items.ignore`` lists exact names and glob patterns; ``items.allow``, when set, lists the only
names and patterns that are counted. Patterns are **case-sensitive** globs matched against the
whole name (:func:`fnmatch.fnmatchcase`: ``*`` any run of characters, ``?`` one character,
``[abc]`` / ``[!abc]`` one of / none of a set); an entry without ``*``, ``?`` or ``[`` is an exact
name. To ignore a name that holds a ``*``, write the star as ``[*]``.

**Ignore wins:** an item both allowed and ignored is ignored.

Every removed item is counted under the *filter* that removed it: the ignore entry's text as
configured, or :data:`NOT_ALLOWED` for an item no allow entry matches. So the ``filter`` label
of ``streamcount_items_ignored_total`` takes at most ``len(items.ignore) + 1`` values.

Examples
--------
>>> f = ItemFilter.from_config(["fee:*", "carrier-bag"], allow=None)
>>> f.classify("fee:delivery"), f.classify("carrier-bag"), f.classify("wool-throw")
('fee:*', 'carrier-bag', None)
>>> f.classify("Fee:delivery") is None  # case-sensitive
True
>>> g = ItemFilter.from_config(["*-sample"], allow=["tea-*"])
>>> g.classify("tea-green"), g.classify("tea-green-sample"), g.classify("honey")
(None, '*-sample', 'not allowed')
"""

from __future__ import annotations

import fnmatch
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

__all__ = ["NOT_ALLOWED", "ItemFilter", "is_glob"]

#: the filter label of items removed because no ``items.allow`` entry matches them
NOT_ALLOWED = "not allowed"

_GLOB_CHARS = re.compile(r"[*?\[]")


def is_glob(entry: str) -> bool:
    """Whether an ignore or allow entry is a pattern (holds ``*``, ``?`` or ``[``).

    >>> is_glob("fee:*"), is_glob("carrier-bag")
    (True, False)
    """
    return _GLOB_CHARS.search(entry) is not None


@dataclass(frozen=True, slots=True)
class _Entries:
    """Exact names (one set look-up) and compiled globs, each with its label."""

    exact: dict[str, str]
    globs: tuple[tuple[re.Pattern[str], str], ...]

    @classmethod
    def build(cls, entries: Iterable[str]) -> _Entries:
        exact: dict[str, str] = {}
        globs: list[tuple[re.Pattern[str], str]] = []
        for entry in entries:
            if is_glob(entry):
                globs.append((re.compile(fnmatch.translate(entry)), entry))
            else:
                exact.setdefault(entry, entry)
        return cls(exact, tuple(globs))

    def match(self, name: str) -> str | None:
        label = self.exact.get(name)
        if label is not None:
            return label
        for pattern, entry in self.globs:
            if pattern.match(name) is not None:
                return entry
        return None


@dataclass(frozen=True, slots=True)
class ItemFilter:
    """The ignore list and the optional allow list.

    Cost: one dict look-up plus one regular-expression match per glob, per *distinct* name
    (the engine classifies each name once and keeps the answer in an array).
    """

    ignore: _Entries
    allow: _Entries | None
    #: every label an item can be counted under, ignore entries first (for the metric's labels)
    labels: tuple[str, ...]

    @classmethod
    def from_config(cls, ignore: Sequence[str], allow: Sequence[str] | None) -> ItemFilter:
        labels = list(dict.fromkeys(ignore))
        if allow is not None:
            labels.append(NOT_ALLOWED)
        return cls(
            _Entries.build(ignore), None if allow is None else _Entries.build(allow), tuple(labels)
        )

    def __bool__(self) -> bool:
        return bool(self.labels)

    def classify(self, name: str) -> str | None:
        """The label of the filter that removes ``name``, or ``None`` when it is counted."""
        label = self.ignore.match(name)
        if label is not None:
            return label
        if self.allow is not None and self.allow.match(name) is None:
            return NOT_ALLOWED
        return None
