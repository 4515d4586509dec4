"""The catalogue in force, its reloads, and which transactions were counted under which version.

:class:`CatalogueState` builds the :class:`~streamcount.catalogue.levels.ItemCatalogue` from the
``items`` settings at start-up (a bad file stops start-up with the file, line and column) and
reloads the file on request (SIGHUP) or when it changed on disk (looked at every
``items.reload_seconds``). A reload never loses counting state: the new mapping applies from the
next transaction on, and what was counted stays as counted. A file that fails its checks at a
reload leaves the previous catalogue in force; the reason is logged, counted and shown in
``/v1/status``.

The *history* records every version that came into force with the sequence number of the
first transaction mapped under it, so each pane's transactions ``first_seq..last_seq`` can be
told apart by version (:meth:`CatalogueState.status`). The history, the version in force and the
levels counted go into every checkpoint; a restart with another catalogue (a newer file) adds a
``restart`` entry and logs which live panes were counted under the old one. A restart with other
``items.levels`` is refused: the saved counts are of other itemsets.

Versions are SHA-256 hashes over the file's bytes and every setting that changes the mapping
(filters, renames, levels, columns), shown shortened to 12 hex digits.
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from streamcount.catalogue.filters import ItemFilter
from streamcount.catalogue.levels import ItemCatalogue
from streamcount.catalogue.rename import RenameRules
from streamcount.catalogue.table import CatalogueTable, load_catalogue
from streamcount.config.settings import ItemsConfig
from streamcount.errors import CatalogueError, CheckpointError

__all__ = [
    "HISTORY_LIMIT",
    "VERSION_SHORT",
    "CatalogueState",
    "ReloadOutcome",
    "catalogue_configured",
    "check_saved_levels",
]

logger = logging.getLogger(__name__)

#: versions kept in the history (the oldest are dropped; panes that old left the window long ago)
HISTORY_LIMIT = 50
_SHORT = 12
#: characters of a catalogue version shown in logs, the history and cluster summaries
VERSION_SHORT = _SHORT
#: the history entry of transactions counted before any catalogue was configured
_NO_CATALOGUE: dict[str, Any] = {
    "version": "none",
    "file_sha256": None,
    "rows": None,
    "from_seq": 1,
    "at": None,
    "reason": "no catalogue",
}


def catalogue_configured(config: ItemsConfig) -> bool:
    """Whether the ``items`` settings ask for anything beyond counting items as read."""
    return bool(
        config.ignore
        or config.allow is not None
        or config.rename
        or config.catalogue
        or tuple(config.levels) != (config.level_columns[0],)
    )


def check_saved_levels(meta: Mapping[str, Any] | None, config: ItemsConfig) -> None:
    """Refuse a checkpoint whose counts are of other levels than ``items.levels`` asks for (a
    checkpoint without catalogue state counted the items as read, i.e. the first level).

    Raises
    ------
    CheckpointError
        Naming both level lists and the way out.
    """
    saved = list((meta or {}).get("levels") or [config.level_columns[0]])
    if saved != list(config.levels):
        raise CheckpointError(
            f"the checkpoint counted items.levels = {saved} but the settings say "
            f"{list(config.levels)}; its counts are of other itemsets. Start with --fresh to "
            "count the new levels, or keep the old setting"
        )


@dataclass(frozen=True, slots=True)
class ReloadOutcome:
    """What a reload did: ``changed`` (a new version is in force), or ``error`` (the file was
    refused and the previous version stays), or neither (the same version)."""

    changed: bool
    error: str | None = None
    version: str = ""


def _stat_signature(path: str) -> tuple[int, int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_ino, st.st_size, st.st_mtime_ns


class CatalogueState:
    """The catalogue in force with its history.

    Parameters
    ----------
    config:
        The ``items`` settings.
    nfc:
        Put catalogue names in Unicode normal form C, as the decoders do with the feed's
        names (``input.normalize: nfc``).
    clock:
        Wall time for the history's timestamps.

    Raises
    ------
    CatalogueError
        At start-up, when the file cannot be read or breaks a rule (file, line and column).
    """

    def __init__(
        self, config: ItemsConfig, *, nfc: bool = True, clock: Callable[[], float] = time.time
    ) -> None:
        self.config = config
        self.nfc = nfc
        self.clock = clock
        self.filters = ItemFilter.from_config(config.ignore, config.allow)
        self.rename = RenameRules.parse(config.rename)
        self.path = config.catalogue
        self._signature = _stat_signature(self.path) if self.path else None
        self.catalogue = self._build(self._read())
        self.history: list[dict[str, Any]] = [self._entry("start", 1)]
        self.reloads = {"ok": 0, "failed": 0}
        self.last_error: str | None = None
        self._last_look = time.monotonic()
        #: set by a SIGHUP handler; the next :meth:`poll` reloads
        self.requested = False

    # -- building ------------------------------------------------------------------------------

    def _read(self) -> CatalogueTable | None:
        if not self.path:
            return None
        return load_catalogue(
            self.path, self.config.level_columns, self.config.display_name_suffix, nfc=self.nfc
        )

    def _build(self, table: CatalogueTable | None) -> ItemCatalogue:
        cfg = self.config
        settings = {
            "ignore": list(cfg.ignore),
            "allow": None if cfg.allow is None else list(cfg.allow),
            "rename": list(cfg.rename),
            "levels": list(cfg.levels),
            "level_columns": list(cfg.level_columns),
            "display_name_suffix": cfg.display_name_suffix,
            "nfc": self.nfc,
        }
        return ItemCatalogue.build(table, cfg.levels, self.filters, self.rename, settings=settings)

    def _entry(self, reason: str, from_seq: int) -> dict[str, Any]:
        table = self.catalogue.table
        return {
            "version": self.catalogue.version,
            "file_sha256": None if table is None else table.sha256,
            "rows": None if table is None else table.rows,
            "from_seq": int(from_seq),
            "at": float(self.clock()),
            "reason": reason,
        }

    @property
    def version(self) -> str:
        return self.catalogue.version

    # -- reloading -----------------------------------------------------------------------------

    def poll(self, next_seq: int, *, now: float | None = None) -> ReloadOutcome | None:
        """Reload when asked (:attr:`requested`, set on SIGHUP) or when the file changed on
        disk (looked at every ``items.reload_seconds``). ``next_seq`` is the sequence number
        the next transaction will get. Returns ``None`` when nothing was tried."""
        if not self.path:
            self.requested = False
            return None
        if self.requested:
            self.requested = False
            self._signature = _stat_signature(self.path)
            return self.reload(next_seq, reason="signal")
        interval = self.config.reload_seconds
        now = time.monotonic() if now is None else now
        if interval is None or now - self._last_look < interval:
            return None
        self._last_look = now
        signature = _stat_signature(self.path)
        if signature == self._signature:
            return None
        self._signature = signature
        return self.reload(next_seq, reason="file changed")

    def reload(self, next_seq: int, *, reason: str = "reload") -> ReloadOutcome:
        """Read the file again; a new version applies from transaction ``next_seq`` on. A file
        that breaks a rule leaves the version in force (the outcome says why)."""
        try:
            catalogue = self._build(self._read())
        except CatalogueError as exc:
            self.reloads["failed"] += 1
            self.last_error = str(exc)
            logger.warning(
                "catalogue reload refused, keeping version %s: %s",
                self.version[:_SHORT],
                exc,
            )
            return ReloadOutcome(False, str(exc), self.version)
        self.reloads["ok"] += 1
        self.last_error = None
        if catalogue.version == self.version:
            logger.info(
                "catalogue reloaded (%s): unchanged, version %s", reason, self.version[:_SHORT]
            )
            return ReloadOutcome(False, None, self.version)
        before = self.version
        self.catalogue = catalogue
        self._remember(self._entry(reason, next_seq))
        logger.info(
            "catalogue reloaded (%s): version %s replaces %s from transaction %d on",
            reason,
            self.version[:_SHORT],
            before[:_SHORT],
            next_seq,
        )
        return ReloadOutcome(True, None, self.version)

    def _remember(self, entry: Mapping[str, Any]) -> None:
        self.history.append(dict(entry))
        del self.history[:-HISTORY_LIMIT]

    # -- which transactions were counted under which version ----------------------------------

    def versions_of(self, first_seq: int, last_seq: int) -> list[str]:
        """The versions (shortened) under which transactions ``first_seq..last_seq`` were
        mapped, oldest first."""
        out = []
        for i, entry in enumerate(self.history):
            start = int(entry["from_seq"])
            stop = int(self.history[i + 1]["from_seq"]) if i + 1 < len(self.history) else None
            if last_seq >= start and (stop is None or first_seq < stop):
                out.append(str(entry["version"])[:_SHORT])
        return out

    def panes_by_version(self, panes: Iterable[tuple[int, int, int]]) -> list[dict[str, Any]]:
        """For each pane ``(index, first_seq, last_seq)`` with counted transactions: the
        versions its transactions were mapped under."""
        return [
            {
                "pane": index,
                "first_seq": first,
                "last_seq": last,
                "versions": self.versions_of(first, last),
            }
            for index, first, last in panes
            if first > 0
        ]

    def status(self, panes: Iterable[tuple[int, int, int]] = ()) -> dict[str, Any]:
        """The ``catalogue`` object of ``/v1/status``."""
        table = self.catalogue.table
        listed = self.panes_by_version(panes)
        return {
            "path": self.path,
            "version": self.version[:_SHORT],
            "file_sha256": None if table is None else table.sha256,
            "levels": list(self.config.levels),
            "level_names": list(self.catalogue.level_names),
            "rows": None if table is None else table.rows,
            "items": None if table is None else len(table.level),
            "reloads": dict(self.reloads),
            "last_error": self.last_error,
            "history": [
                {**entry, "version": str(entry["version"])[:_SHORT]} for entry in self.history
            ],
            "panes": listed,
            "panes_under_older_versions": [
                p["pane"] for p in listed if p["versions"] != [self.version[:_SHORT]]
            ],
        }

    # -- checkpoints ---------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """What a checkpoint keeps: the levels counted, the version in force, the history."""
        return {
            "levels": list(self.config.levels),
            "version": self.version,
            "history": [dict(e) for e in self.history],
        }

    def load_state(
        self,
        meta: Mapping[str, Any] | None,
        next_seq: int,
        panes: Iterable[tuple[int, int, int]] = (),
    ) -> None:
        """Take the history of a checkpoint. A different version in force now is recorded as
        a ``restart`` entry from ``next_seq`` on, and the live panes counted under the saved
        one are logged.

        Raises
        ------
        CheckpointError
            When the checkpoint counted other levels.
        """
        check_saved_levels(meta, self.config)
        if meta is None:  # counted before any catalogue was configured
            meta = {"version": None, "history": [_NO_CATALOGUE]}
        history = [dict(e) for e in meta.get("history") or []]
        saved = meta.get("version")
        if history:
            self.history = history[-HISTORY_LIMIT:]
        if saved == self.version:
            return
        self._remember(self._entry("restart", next_seq))
        older = [
            p["pane"]
            for p in self.panes_by_version(panes)
            if p["versions"] != [self.version[:_SHORT]]
        ]
        logger.warning(
            "the catalogue in force (version %s) differs from the checkpoint's (%s); it applies "
            "from transaction %d on. Live panes counted under an older version: %s",
            self.version[:_SHORT],
            "none" if saved is None else str(saved)[:_SHORT],
            next_seq,
            older or "none",
        )
