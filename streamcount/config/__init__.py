"""Settings: frozen dataclasses (:mod:`.settings`) validated from YAML by one rules table
(:mod:`.load`)."""

from __future__ import annotations

__all__: list[str] = []
