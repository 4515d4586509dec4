"""Rename rules: rewrite item names before they are looked up in the catalogue.

A rule is written ``PATTERN => REPLACEMENT`` (``items.rename``). ``PATTERN`` is a Python regular
expression that must match the *whole* name; ``REPLACEMENT`` is expanded like the replacement of
:func:`re.sub` (``\\1``, ``\\g<name>``). Rules are tried in order and the first that matches
applies; a name no rule matches is kept as it is. The text is split at the first `` => ``, so a
pattern may not contain that separator (write ``=\\>`` in it instead).

Examples
--------
Strip a size suffix, so every size of a product is counted as one item:

>>> rules = RenameRules.parse(["(.+)-(XS|S|M|L|XL) => \\\\1"])
>>> rules("trail-sock-M"), rules("trail-sock"), rules("sock-XXL")
('trail-sock', 'trail-sock', 'sock-XXL')
"""

from __future__ import annotations

import re
from collections.abc import Iterable
from dataclasses import dataclass

__all__ = ["SEPARATOR", "RenameRules", "parse_rule"]

#: what separates the pattern from the replacement in ``items.rename``
SEPARATOR = " => "

_GROUP_NUMBER = re.compile(r"\\(\d+)")
_GROUP_NAME = re.compile(r"\\g<([^>]*)>")


def parse_rule(text: str) -> tuple[re.Pattern[str], str]:
    """``(compiled pattern, replacement)`` of one rule.

    Raises
    ------
    ValueError
        Naming what is wrong: no separator, a pattern that does not compile, a replacement
        that refers to a group the pattern does not have, or an empty result pattern.

    >>> parse_rule("(.+)-L => \\\\1")[1]
    '\\\\1'
    >>> parse_rule("(.+)-L = \\\\1")
    Traceback (most recent call last):
    ...
    ValueError: write PATTERN => REPLACEMENT (with spaces around =>)
    """
    pattern, sep, replacement = text.partition(SEPARATOR)
    if not sep:
        raise ValueError("write PATTERN => REPLACEMENT (with spaces around =>)")
    if not pattern:
        raise ValueError("the pattern before => is empty")
    try:
        compiled = re.compile(pattern)
    except re.error as exc:
        raise ValueError(
            f"the pattern {pattern!r} is not a valid regular expression: {exc}"
        ) from None
    for match in _GROUP_NUMBER.finditer(replacement):
        number = int(match.group(1))
        if number > compiled.groups:
            raise ValueError(
                f"the replacement refers to group {number} but the pattern has "
                f"{compiled.groups} group(s)"
            )
    for match in _GROUP_NAME.finditer(replacement):
        ref = match.group(1)
        if ref.isdigit():
            if int(ref) > compiled.groups:
                raise ValueError(f"the replacement refers to group {ref}, which does not exist")
        elif ref not in compiled.groupindex:
            raise ValueError(f"the replacement refers to group {ref!r}, which does not exist")
    try:  # a last check of the template itself (escapes) on a name the pattern may match
        compiled.sub(replacement, "")
    except (re.error, IndexError) as exc:
        raise ValueError(f"the replacement {replacement!r} is not valid: {exc}") from None
    return compiled, replacement


@dataclass(frozen=True, slots=True)
class RenameRules:
    """An ordered list of rename rules; calling it renames one name.

    Cost: one full-match attempt per rule per *distinct* name (the engine resolves each name
    once and keeps the answer).
    """

    rules: tuple[tuple[re.Pattern[str], str], ...] = ()

    @classmethod
    def parse(cls, texts: Iterable[str]) -> RenameRules:
        """Rules from their ``PATTERN => REPLACEMENT`` texts (see :func:`parse_rule`)."""
        return cls(tuple(parse_rule(t) for t in texts))

    def __bool__(self) -> bool:
        return bool(self.rules)

    def __call__(self, name: str) -> str:
        for pattern, replacement in self.rules:
            match = pattern.fullmatch(name)
            if match is not None:
                renamed = match.expand(replacement)
                return renamed if renamed else name  # never rename to nothing
        return name
