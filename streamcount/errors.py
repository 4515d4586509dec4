"""The exceptions streamcount raises.

One root, so a caller can catch everything streamcount raises with one clause::

    StreamcountError
     ├── ConfigError (also ValueError)      a config key or command-line value breaks a rule
     ├── InputError (also ValueError)       a record or file cannot be read as transactions
     │    ├── ParseError                    one record, with its source offset, raw bytes and reason
     │    └── CatalogueError                the catalogue file (items.catalogue) cannot be used;
     │                                      names the file, line and column
     ├── CheckpointError                    a checkpoint is corrupt, of another version or settings
     └── SinkError                          an alert sink failed (counted, never fatal to counting)

Messages name what was wrong (the dotted key, argument or record position), show the value with
``repr``, state the rule that was broken and, where there is one, the fix.
"""

from __future__ import annotations

import errno
import os

__all__ = [
    "REASONS",
    "CatalogueError",
    "CheckpointError",
    "ConfigError",
    "InputError",
    "ParseError",
    "SinkError",
    "StreamcountError",
    "describe_os_error",
]


#: Every reason a record or transaction is set aside, with what it means: the one list read by
#: the decoders, the engine, the dead-letter file, the metric's ``reason`` label and the docs.
REASONS: dict[str, str] = {
    "malformed": "not valid JSON or CSV",
    "bad_encoding": "bytes that are not valid text in input.encoding",
    "too_long": "a record longer than input.max_record_bytes",
    "too_many_items": "more distinct items than engine.max_basket_items",
    "missing_field": "a required field or column is missing",
    "wrong_type": "a field of the wrong type (items not a list, a bad timestamp...)",
    "empty": "a transaction with no items (a blank basket line is not a record)",
    "too_late": "an event time whose pane has already closed",
    "too_early": "an event time more than input.max_future_seconds ahead of the clock",
    "bad_summary": (
        "a pane summary (cluster merger) that is damaged, incomplete or inconsistent with its "
        "own header"
    ),
    "foreign_summary": (
        "a pane summary made with other counting settings (its fingerprint differs from the "
        "merger's) or by a worker not in cluster.workers"
    ),
    "late_summary": (
        "a pane summary that arrived after the merger closed its pane without it "
        "(cluster.pane_timeout_seconds); never added"
    ),
    "control_chars": (
        "an item name or order id holding a control character (C0 except tab, DEL, C1), a "
        "line or paragraph separator (U+2028, U+2029) or a bidirectional mark, embedding, "
        "override or isolate (U+061C, U+200E, U+200F, U+202A-U+202E, U+2066-U+2069), which "
        "could disguise a name where it is shown"
    ),
    "emptied_by_filter": "a transaction left with no items once items.ignore / items.allow "
    "removed the ignored ones (e.g. an order holding only a delivery fee)",
}


class StreamcountError(Exception):
    """Root of every exception raised by streamcount."""


class ConfigError(StreamcountError, ValueError):
    """A configuration key or command-line value is invalid.

    Parameters
    ----------
    key:
        Dotted path of the offending key, e.g. ``"engine.epsilon"``.
    value:
        The value found.
    rule:
        The rule it breaks, written as advice, e.g. ``"must be in [0, 1)"``.

    Attributes
    ----------
    source:
        Where the settings came from (a file path, ``"<overrides>"``...), set by the loader;
        ``None`` when unknown.
    """

    def __init__(self, key: str, value: object, rule: str) -> None:
        self.key = key
        self.value = value
        self.rule = rule
        self.source: str | None = None
        super().__init__(f"{key} = {value!r}: {rule}")


class InputError(StreamcountError, ValueError):
    """Input that cannot be read as transactions (a missing file, an unknown format...)."""


class ParseError(InputError):
    """One record that cannot be turned into a transaction.

    Attributes
    ----------
    reason:
        A short machine-readable reason, used as the ``reason`` label of
        ``streamcount_records_rejected_total``: one of :data:`REASONS`.
    offset:
        Where the record starts in its source (byte offset for files, line number for others),
        or ``None`` when unknown.
    raw:
        The raw record as received.
    """

    def __init__(
        self, reason: str, detail: str, *, offset: int | None = None, raw: bytes | str = b""
    ) -> None:
        if reason not in REASONS:
            raise ValueError(f"ParseError reason {reason!r} is not one of {sorted(REASONS)}")
        self.reason = reason
        self.detail = detail
        self.offset = offset
        self.raw = raw
        where = f" at offset {offset}" if offset is not None else ""
        super().__init__(f"{reason}{where}: {detail}")


class CatalogueError(InputError):
    """A catalogue file (``items.catalogue``) that cannot be used: unreadable, not CSV, a
    missing column, or a row that breaks a rule.

    Attributes
    ----------
    path:
        The file.
    line, column:
        1-based line of the file and 1-based field (column) of the row, or ``None`` when the
        problem is the whole file (or the whole row).
    problem:
        What is wrong, as advice.
    """

    def __init__(
        self, path: str, problem: str, *, line: int | None = None, column: int | None = None
    ) -> None:
        self.path = path
        self.line = line
        self.column = column
        self.problem = problem
        where = path
        if line is not None:
            where += f", line {line}"
        if column is not None:
            where += f", column {column}"
        super().__init__(f"catalogue {where}: {problem}")


class CheckpointError(StreamcountError):
    """A checkpoint cannot be used: corrupt, of another format version, or other settings."""


class SinkError(StreamcountError):
    """An alert sink could not deliver a record."""


#: what each role's path is set by, so a message can say where to point it instead
_ROLE_KEYS: dict[str, str] = {
    "checkpoint": "checkpoint.checkpoint_dir",
    "dead-letter": "input.dead_letter_path",
    "sink": "sinks.file",
    "token": "server.token_file",
    "TLS certificate": "server.tls_certificate",
    "TLS key": "server.tls_key",
}


def describe_os_error(role: str, path: str | os.PathLike[str] | None, exc: OSError) -> str:
    """One line for an operating-system error on a file streamcount writes or reads.

    Names the role (``checkpoint``, ``dead-letter``, ``sink``...), the path and the way out,
    instead of a bare ``[Errno 13] Permission denied: <path>``.

    Parameters
    ----------
    role:
        What the file is for; one of ``checkpoint``, ``dead-letter``, ``sink``, ``token``,
        ``TLS certificate``, ``TLS key`` names the config key to change as well (any other
        text is used as it is).
    path:
        The file or directory concerned (``exc.filename`` when ``None``).
    exc:
        The error raised.

    Examples
    --------
    >>> import errno
    >>> err = PermissionError(errno.EACCES, "Permission denied", "/srv/ckpt/state.tmp")
    >>> print(describe_os_error("checkpoint", "/srv/ckpt", err))  # doctest: +ELLIPSIS
    checkpoint /srv/ckpt: permission denied (...); give the user running streamcount ...
    >>> full = OSError(errno.ENOSPC, "No space left on device")
    >>> print(describe_os_error("dead-letter", "dead.jsonl", full))  # doctest: +ELLIPSIS
    dead-letter dead.jsonl: no space left on the device (ENOSPC); free space there or set ...
    """
    where = os.fspath(path) if path is not None else (exc.filename or "?")
    key = _ROLE_KEYS.get(role)
    move = f"set {key} to" if key else "use"
    code = exc.errno
    name = errno.errorcode.get(code, "no errno") if code is not None else "no errno"
    if code in (errno.EACCES, errno.EPERM):
        uid = os.getuid() if hasattr(os, "getuid") else "?"
        fix = (
            f"permission denied ({name}); give the user running streamcount (uid {uid}) access "
            f"to it and its directory, or {move} a path it may write"
        )
    elif code in (errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)):
        fix = f"no space left on the device ({name}); free space there or {move} another disk"
    elif code == errno.EROFS:
        fix = f"the file system is read-only ({name}); remount it read-write or {move} another disk"
    elif code == errno.ENOENT:
        fix = f"no such file or directory ({name}); create the directory or {move} another path"
    elif code in (errno.EISDIR, errno.ENOTDIR):
        fix = f"{(exc.strerror or str(exc)).lower()} ({name}); {move} a file path"
    elif code == errno.EIO:
        fix = f"input/output error ({name}); the disk may be failing, check the system log"
    else:
        fix = f"{exc.strerror or exc} ({name}); check the path and the disk"
    return f"{role} {where}: {fix}"
