"""The catalogue: which feed items are counted, and as what.

* :mod:`.filters` removes lines that are not products (``items.ignore``, ``items.allow``);
* :mod:`.rename` rewrites names (``items.rename``, e.g. strip a size suffix);
* :mod:`.table` reads the catalogue file (SKU -> product -> category ...) with its checks;
* :mod:`.levels` puts them together: what each feed item counts as at the levels counted
  (``items.levels``), the engine's :class:`~streamcount.engine.taxonomy.ItemResolver`;
* :mod:`.state` keeps the version in force, reloads it (SIGHUP, file change) and remembers
  which transactions were counted under which version;
* :mod:`.text` checks untrusted catalogue text (display names);
* :mod:`.view` gives readers (API, alerts, the page) each item's level and display name.
"""

from __future__ import annotations

__all__: list[str] = []
