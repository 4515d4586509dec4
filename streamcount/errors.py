"""The exceptions streamcount raises.

One root, so a caller can catch everything streamcount raises with one clause::

    StreamcountError
     ├── ConfigError (also ValueError)      a config key or command-line value breaks a rule
     ├── InputError (also ValueError)       a record or file cannot be read as transactions
     │    └── ParseError                    one record, with its source offset, raw bytes and reason
     ├── CheckpointError                    a checkpoint is corrupt, of another version or settings
     └── SinkError                          an alert sink failed (counted, never fatal to counting)

Messages name what was wrong (the dotted key, argument or record position), show the value with
``repr``, state the rule that was broken and, where there is one, the fix.
"""

from __future__ import annotations

__all__ = [
    "CheckpointError",
    "ConfigError",
    "InputError",
    "ParseError",
    "SinkError",
    "StreamcountError",
]


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
    """

    def __init__(self, key: str, value: object, rule: str) -> None:
        self.key = key
        self.value = value
        self.rule = rule
        super().__init__(f"{key} = {value!r}: {rule}")


class InputError(StreamcountError, ValueError):
    """Input that cannot be read as transactions (a missing file, an unknown format...)."""


class ParseError(InputError):
    """One record that cannot be turned into a transaction.

    Attributes
    ----------
    reason:
        A short machine-readable reason, used as the ``reason`` label of
        ``streamcount_records_rejected_total`` (``malformed``, ``bad_encoding``, ``too_long``,
        ``too_many_items``, ``missing_field``, ``wrong_type``, ``too_late``, ``too_early``,
        ``empty``).
    offset:
        Where the record starts in its source (byte offset for files, line number for others),
        or ``None`` when unknown.
    raw:
        The raw record as received.
    """

    def __init__(
        self, reason: str, detail: str, *, offset: int | None = None, raw: bytes | str = b""
    ) -> None:
        self.reason = reason
        self.detail = detail
        self.offset = offset
        self.raw = raw
        where = f" at offset {offset}" if offset is not None else ""
        super().__init__(f"{reason}{where}: {detail}")


class CheckpointError(StreamcountError):
    """A checkpoint cannot be used: corrupt, of another format version, or other settings."""


class SinkError(StreamcountError):
    """An alert sink could not deliver a record."""
