"""Checks of untrusted catalogue text (names and display names).

Catalogue cells are shown to people (API, alerts, the page) beside item names, so they follow
the rules item names follow in the feed: no control characters (C0 but tab, DEL, C1), no line
or paragraph separators, and no bidirectional marks, embeddings, overrides or isolates
(Unicode UAX #9), which can make one name look like another where it is shown. Escaping is the
output's business (JSON encoding, HTML escaping on the page), as for item names.

The character set is the one the feed decoders refuse under the reason ``control_chars``
(:data:`streamcount.intake.formats.text.CONTROL_CHARS`, shared), and names are put in the
Unicode normal form the decoders use (``input.normalize``), so a catalogue name matches the
same name read from the feed.
"""

from __future__ import annotations

import unicodedata

from streamcount.intake.formats.text import CONTROL_CHARS, normalize_name

__all__ = ["CONTROL_CHARS", "normalize_name", "text_problem"]


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
