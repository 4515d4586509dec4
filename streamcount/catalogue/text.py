"""Checks of untrusted catalogue text (names and display names).

Catalogue cells are shown to people (API, alerts, the page) beside item names, so they follow
the rules item names follow in the feed: no control characters (C0 but tab, DEL, C1), no line
or paragraph separators, and no bidirectional marks, embeddings, overrides or isolates
(Unicode UAX #9), which can make one name look like another where it is shown. Escaping is the
output's business (JSON encoding, HTML escaping on the page), as for item names.

The character set is the one the feed decoders refuse under the reason ``control_chars``; once
those decoders share theirs (``CONTROL_CHARS`` in ``intake/formats/text.py``), this module
should import it instead of keeping its own copy.
"""

from __future__ import annotations

import re
import unicodedata

__all__ = ["CONTROL_CHARS", "text_problem"]

#: characters refused in catalogue names and display names (see the module docstring)
CONTROL_CHARS = re.compile(
    r"[\x00-\x08\x0a-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069]"
)


def text_problem(text: str) -> str | None:
    """What is wrong with ``text`` as a name people read, or ``None`` when nothing is.

    >>> text_problem("Wool throw, ochre") is None
    True
    >>> print(text_problem("tea\\u202emal"))
    'tea\\u202emal' holds U+202E (RIGHT-TO-LEFT OVERRIDE) at position 3
    """
    found = CONTROL_CHARS.search(text)
    if found is None:
        return None
    char = found.group()
    label = unicodedata.name(char, "a control character")
    return f"{text!r} holds U+{ord(char):04X} ({label}) at position {found.start()}"
