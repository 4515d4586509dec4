"""Settings: frozen dataclasses (:mod:`.settings`) loaded from YAML (:mod:`.load`), validated by
one table of rules (:mod:`.checks`), fingerprinted and described (:mod:`.describe`)."""

from __future__ import annotations

__all__: list[str] = []
