"""Load and validate configuration into the frozen dataclasses of :mod:`streamcount.config`.

A YAML file (or any mapping) is validated once into a :class:`~streamcount.config.Config`. The
walk is generic: every dataclass field is a key, its type annotation says what the value may be
(an ``int`` is accepted where a ``float`` is expected, a ``bool`` never counts as a number, and
``null`` only where the annotation allows ``None``), and a table of per-key rules plus a few
cross-field checks say which values make sense. Anything wrong raises
:class:`~streamcount.errors.ConfigError` naming the dotted key (``rules.min_confidence``), the
value and the rule; an unknown key comes with the closest known key as a suggestion.

Examples
--------
>>> cfg = config_from_mapping({"engine": {"epsilon": 0.01}, "rules": {"min_support": 0.05}})
>>> cfg.engine.epsilon, cfg.rules.min_support
(0.01, 0.05)
>>> config_from_mapping({"rules": {"min_confidence": 1.5}})
Traceback (most recent call last):
...
streamcount.errors.ConfigError: rules.min_confidence = 1.5: must be in [0, 1]
>>> apply_overrides(cfg, {"engine.window_size": 20000}).engine.window_size
20000
"""

from __future__ import annotations

import codecs
import dataclasses
import difflib
import hashlib
import json
import math
import os
import re
import sys
import types
import typing
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import yaml

from streamcount.config.settings import DEFAULT_LISTEN, DEFAULT_PORT, Config
from streamcount.errors import ConfigError

__all__ = [
    "FINGERPRINT_KEYS",
    "RETIRED_KEYS",
    "apply_overrides",
    "check_config_main",
    "config_from_mapping",
    "config_to_mapping",
    "describe",
    "fingerprint",
    "fingerprint_settings",
    "load_config",
    "parse_listen",
]

#: The settings that shape counting state; a checkpoint is only valid under the same values.
FINGERPRINT_KEYS: tuple[str, ...] = (
    "engine.epsilon",
    "engine.max_itemset_size",
    "engine.window_size",
    "engine.pane_size",
    "engine.window_seconds",
    "engine.pane_seconds",
    "input.format",
)

_LOG_LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL")
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
#: per-rule gauges add three series each; keep the label cardinality of a scrape bounded
_MAX_TOP_RULES = 1000


# ---------------------------------------------------------------------------------------------
# Per-key rules: each is (predicate, rule text). A predicate sees the already type-checked value
# (never None: null is accepted or refused by the type annotation alone).
# ---------------------------------------------------------------------------------------------

_Check = tuple[Callable[[Any], bool], str]


def _at_least(low: float) -> _Check:
    return (lambda v: v >= low, f"must be >= {low:g}")


def _above(low: float) -> _Check:
    return (lambda v: v > low, f"must be > {low:g}")


def _one_of(*choices: str) -> _Check:
    return (lambda v: v in choices, "must be one of " + ", ".join(repr(c) for c in choices))


def _codec_known(name: str) -> bool:
    try:
        codecs.lookup(name)
    except LookupError:
        return False
    return True


def _http_url(url: str) -> bool:
    parts = urlsplit(url)
    return parts.scheme in ("http", "https") and bool(parts.hostname)


def parse_listen(listen: str) -> tuple[str, int]:
    """Split ``host:port`` (``[v6addr]:port`` for IPv6) into its parts.

    Raises
    ------
    ValueError
        When the text is not ``host:port`` with a port in 0..65535 (0: any free port).

    Examples
    --------
    >>> parse_listen(DEFAULT_LISTEN) == ("127.0.0.1", DEFAULT_PORT)
    True
    >>> parse_listen("[::1]:0")
    ('::1', 0)
    """
    host, sep, port = listen.rpartition(":")
    if not sep or not host or not port.isdigit():
        raise ValueError(f"expected host:port, got {listen!r}")
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    elif ":" in host:
        raise ValueError(
            f"write an IPv6 address in brackets, e.g. [::1]:{DEFAULT_PORT}, got {listen!r}"
        )
    number = int(port)
    if not host or number > 65535:
        raise ValueError(f"expected host:port with port 0..65535, got {listen!r}")
    return host, number


def _nats_url(url: str) -> bool:
    parts = urlsplit(url if "://" in url else f"nats://{url}")
    try:
        parts.port  # noqa: B018 - raises on a port that is not a number
    except ValueError:
        return False
    return parts.scheme in ("nats", "tls") and bool(parts.hostname)


#: a JetStream stream or consumer name: no whitespace, dots, wildcards or path separators
_NATS_NAME = re.compile(r"[^\s.*>/\\]+\Z")
#: a subject: dot-separated tokens, no whitespace, ``*`` a whole token, ``>`` the last one
_NATS_SUBJECT = re.compile(r"([^\s.*>]+|\*)(\.([^\s.*>]+|\*))*(\.>)?\Z|>\Z")


def _listen_ok(listen: str) -> bool:
    try:
        parse_listen(listen)
    except ValueError:
        return False
    return True


def _source_names() -> tuple[str, ...]:
    from streamcount.intake.sources import SOURCES  # the registry imports the settings

    return tuple(SOURCES)


def _format_names() -> tuple[str, ...]:
    from streamcount.intake.formats import FORMATS

    return tuple(FORMATS)


_NON_EMPTY: _Check = (lambda v: v != "", "must not be empty")

_RULES: dict[str, tuple[_Check, ...]] = {
    "input.source": (
        (
            lambda v: all(name in _source_names() for name in v),
            "each must be one of " + ", ".join(repr(n) for n in _source_names()),
        ),
    ),
    "input.path": (
        _NON_EMPTY,
        (
            lambda v: v != "-",
            "standard input is a source of its own: set input.source: stdin (--source stdin)",
        ),
    ),
    "input.format": (_one_of(*_format_names()),),
    "input.start_at": (_one_of("beginning", "end"),),
    "input.poll_interval_seconds": (_above(0),),
    "input.max_record_bytes": (_at_least(1),),
    "input.encoding": ((_codec_known, "must be a text encoding Python knows, e.g. 'utf-8'"),),
    "input.max_body_bytes": (_at_least(1),),
    "input.max_future_seconds": (_at_least(0),),
    "input.dead_letter_path": (_NON_EMPTY,),
    "input.jsonl.id_field": (_NON_EMPTY,),
    "input.jsonl.ts_field": (_NON_EMPTY,),
    "input.jsonl.items_field": (_NON_EMPTY,),
    "input.jsonl.item_name_field": (_NON_EMPTY,),
    "input.csv.order_field": (_NON_EMPTY,),
    "input.csv.item_field": (_NON_EMPTY,),
    "input.csv.ts_field": (_NON_EMPTY,),
    "input.csv.quantity_field": (_NON_EMPTY,),
    "input.csv.delimiter": (
        (
            lambda v: len(v) == 1 and v not in '"\r\n',
            "must be a single character other than a quote or a line break",
        ),
    ),
    "input.csv.order_close_seconds": (_at_least(0),),
    "input.nats.servers": (
        (
            lambda v: all(_nats_url(u) for u in v),
            "each must be a server URL nats://HOST:PORT or tls://HOST:PORT",
        ),
    ),
    "input.nats.stream": (
        (
            lambda v: bool(_NATS_NAME.match(v)),
            "must be a stream name: no spaces, dots, '*', '>' or slashes",
        ),
    ),
    "input.nats.subject": (
        (
            lambda v: bool(_NATS_SUBJECT.match(v)),
            "must be a subject such as orders.3 or orders.* (tokens separated by dots, '*' "
            "for one whole token, '>' only as the last)",
        ),
    ),
    "input.nats.durable": (
        (
            lambda v: bool(_NATS_NAME.match(v)),
            "must be a consumer name: no spaces, dots, '*', '>' or slashes",
        ),
    ),
    "input.nats.creds_file": (_NON_EMPTY,),
    "input.nats.token_env": (
        (
            lambda v: bool(_ENV_NAME.match(v)),
            "must be the name of an environment variable (letters, digits, _), "
            "not the token itself",
        ),
    ),
    "input.nats.ack_wait_seconds": (_above(0),),
    "input.nats.max_ack_pending": (_at_least(1),),
    "input.nats.pull_batch": (_at_least(1),),
    "input.nats.max_buffered_messages": (_at_least(1),),
    "input.nats.connect_timeout_seconds": (_above(0),),
    "input.nats.reconnect_wait_seconds": (_above(0),),
    "input.nats.max_reconnect_wait_seconds": (_above(0),),
    "engine.epsilon": ((lambda v: 0 <= v < 1, "must be in [0, 1) (0 counts exactly)"),),
    "engine.max_itemset_size": ((lambda v: 1 <= v <= 8, "must be between 1 and 8"),),
    "engine.max_basket_items": (_at_least(1),),
    "engine.window_size": (_at_least(1),),
    "engine.pane_size": (_at_least(1),),
    "engine.window_seconds": (_above(0),),
    "engine.pane_seconds": (_above(0),),
    "engine.allowed_lateness_seconds": (_at_least(0),),
    "engine.batch_size": (_at_least(1),),
    "rules.min_support": ((lambda v: 0 < v <= 1, "must be in (0, 1] (a fraction of the window)"),),
    "rules.min_confidence": ((lambda v: 0 <= v <= 1, "must be in [0, 1]"),),
    "rules.min_lift": (_at_least(0),),
    "rules.min_count": (_at_least(1),),
    "rules.max_consequent_size": (_at_least(1),),
    "rules.significance": (_one_of("fisher", "chi2"),),
    "rules.max_p_value": ((lambda v: 0 < v <= 1, "must be in (0, 1] (null turns the test off)"),),
    "rules.exit_ratio": ((lambda v: 0 < v <= 1, "must be in (0, 1]"),),
    "rules.confirm_evaluations": (_at_least(1),),
    "rules.cooldown_evaluations": (_at_least(0),),
    "rules.max_rules": (_at_least(1),),
    "alerts.growth_rate": (_above(1),),
    "alerts.recent_panes": (_at_least(1),),
    "alerts.surge_max_p_value": ((lambda v: 0 < v <= 1, "must be in (0, 1]"),),
    "alerts.surge_min_count": (_at_least(1),),
    "alerts.family_lift_tolerance": (_at_least(0),),
    "alerts.history": (_at_least(1),),
    "sinks.file": (_NON_EMPTY,),
    "sinks.webhook.url": ((_http_url, "must be an http:// or https:// URL with a host"),),
    "sinks.webhook.timeout_seconds": (_above(0),),
    "sinks.webhook.max_retries": (_at_least(0),),
    "sinks.webhook.backoff_seconds": (_at_least(0),),
    "sinks.webhook.max_backoff_seconds": (_at_least(0),),
    "sinks.webhook.queue_size": (_at_least(1),),
    "server.listen": (
        (_listen_ok, f"must be host:port with port 0..65535, e.g. {DEFAULT_LISTEN!r}"),
    ),
    "server.token_env": (
        (
            lambda v: bool(_ENV_NAME.match(v)),
            "must be the name of an environment variable (letters, digits, _), "
            "not the token itself",
        ),
    ),
    "server.max_request_bytes": (_at_least(1),),
    "server.request_timeout_seconds": (_above(0),),
    "metrics.top_rules": (
        (
            lambda v: 0 <= v <= _MAX_TOP_RULES,
            f"must be between 0 and {_MAX_TOP_RULES} (each rule adds three series)",
        ),
    ),
    "checkpoint.checkpoint_dir": (_NON_EMPTY,),
    "checkpoint.checkpoint_interval_seconds": (_above(0),),
    "logging.level": (_one_of(*_LOG_LEVELS),),
    "logging.format": (_one_of("text", "json"),),
}

#: values normalised before the rules run (written back into the Config)
_NORMALISE: dict[str, Callable[[Any], Any]] = {"logging.level": str.upper}


# ---------------------------------------------------------------------------------------------
# Generic walk over the dataclasses
# ---------------------------------------------------------------------------------------------


def _type_name(tp: Any) -> str:
    if typing.get_origin(tp) is tuple:
        return "a list of names"
    return "null" if tp is type(None) else getattr(tp, "__name__", str(tp))


def _check_type(key: str, value: Any, hint: Any) -> Any:
    """Return ``value`` as the annotated type (int -> float) or raise ConfigError."""
    if typing.get_origin(hint) in (typing.Union, types.UnionType):
        options = typing.get_args(hint)
    else:
        options = (hint,)
    wanted = " or ".join(_type_name(t) for t in options)
    if value is None:
        if type(None) in options:
            return None
        return _fail(key, value, f"must not be null (expected {wanted})")
    for tp in options:
        if typing.get_origin(tp) is tuple:
            # a list of names; one name alone stands for a list of one
            items = [value] if isinstance(value, str) else value
            if not isinstance(items, list | tuple) or not all(isinstance(v, str) for v in items):
                return _fail(key, value, "must be a name or a list of names")
            if not items:
                return _fail(key, value, "must name at least one")
            if len(set(items)) != len(items):
                return _fail(key, value, "names each one once")
            return tuple(items)
        if tp is bool and isinstance(value, bool):
            return value
        if tp is int and isinstance(value, int) and not isinstance(value, bool):
            return value
        if tp is float and isinstance(value, int | float) and not isinstance(value, bool):
            if not math.isfinite(value):
                return _fail(key, value, "must be a finite number")
            return float(value)
        if tp is str and isinstance(value, str):
            return value
    rule = f"must be {wanted}, not {type(value).__name__}"
    if float in options and isinstance(value, str) and _looks_numeric(value):
        # YAML 1.1 reads 1e-3 (no dot) as text
        rule += f"; write it with a dot, e.g. {float(value)!r}"
    return _fail(key, value, rule)


def _looks_numeric(text: str) -> bool:
    try:
        return math.isfinite(float(text))
    except ValueError:
        return False


def _fail(key: str, value: object, rule: str) -> typing.NoReturn:
    raise ConfigError(key, value, rule)


def _all_keys(cls: type, prefix: str = "") -> list[str]:
    """Dotted paths of every leaf key under a config dataclass, in declaration order."""
    keys: list[str] = []
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        path = f"{prefix}{f.name}"
        if dataclasses.is_dataclass(hints[f.name]):
            keys.extend(_all_keys(hints[f.name], path + "."))
        else:
            keys.append(path)
    return keys


def _unknown_key_rule(path: str, known: list[str]) -> str:
    leaf = path.rpartition(".")[2]
    close = difflib.get_close_matches(leaf, known, n=1, cutoff=0.6)
    if close:
        return f"unknown key; did you mean {close[0]!r}?"
    # a key put in the wrong section: name the section it belongs to
    elsewhere = [k for k in _all_keys(Config) if k.rpartition(".")[2] == leaf]
    if elsewhere:
        return f"unknown key here; it belongs at {elsewhere[0]!r}"
    return "unknown key; known keys here: " + ", ".join(known)


#: Keys that existed once, with what replaced them: an old config gets a message naming the
#: new key instead of "unknown key". Every entry is also listed in CHANGELOG.md.
RETIRED_KEYS: dict[str, str] = {
    "input.http_ingest": "was replaced by input.source: add 'http' to it, e.g. "
    "input.source: [file, http] (or input.source: http for HTTP ingest alone)",
}


def _build(cls: type, data: object, prefix: str) -> Any:
    section = prefix.rstrip(".") or "<top level>"
    if data is None:
        data = {}
    if not isinstance(data, Mapping):
        _fail(section, data, f"must be a mapping of keys to values ({cls.__name__})")
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    for key in data:
        if not isinstance(key, str) or key not in names:
            path = f"{prefix}{key}"
            if path in RETIRED_KEYS:
                _fail(path, data[key], RETIRED_KEYS[path])
            _fail(path, data[key], _unknown_key_rule(path, names))
    values: dict[str, Any] = {}
    for name in names:
        if name not in data:
            continue
        path = f"{prefix}{name}"
        hint = hints[name]
        if dataclasses.is_dataclass(hint):
            values[name] = _build(hint, data[name], path + ".")
            continue
        value = _check_type(path, data[name], hint)
        if value is not None:
            if path in _NORMALISE:
                value = _NORMALISE[path](value)
            for predicate, rule in _RULES.get(path, ()):
                if not predicate(value):
                    _fail(path, data[name], rule)
        values[name] = value
    return cls(**values)


def _cross_checks(cfg: Config) -> None:
    """Rules that tie two keys together; each message names both."""
    eng = cfg.engine
    if eng.pane_size > eng.window_size:
        _fail(
            "engine.pane_size",
            eng.pane_size,
            f"must be <= engine.window_size ({eng.window_size})",
        )
    if eng.window_size % eng.pane_size:
        _fail(
            "engine.window_size",
            eng.window_size,
            f"must be a multiple of engine.pane_size ({eng.pane_size})",
        )
    if (eng.window_seconds is None) != (eng.pane_seconds is None):
        key, other = (
            ("engine.window_seconds", "engine.pane_seconds")
            if eng.window_seconds is not None
            else ("engine.pane_seconds", "engine.window_seconds")
        )
        _fail(key, getattr(eng, key.split(".")[1]), f"needs {other} set too (or both null)")
    if eng.window_seconds is not None and eng.pane_seconds is not None:
        ratio = eng.window_seconds / eng.pane_seconds
        if ratio < 1 - 1e-9 or abs(ratio - round(ratio)) > 1e-9 * ratio:
            _fail(
                "engine.window_seconds",
                eng.window_seconds,
                f"must be a whole multiple of engine.pane_seconds ({eng.pane_seconds:g})",
            )
        if eng.allowed_lateness_seconds >= eng.window_seconds:
            _fail(
                "engine.allowed_lateness_seconds",
                eng.allowed_lateness_seconds,
                f"must be < engine.window_seconds ({eng.window_seconds:g})",
            )
    window_panes = _window_panes(cfg)
    # a one-pane window (e.g. a whole file counted as one window) has no baseline: surges are
    # simply never raised there, which is no configuration mistake
    if cfg.alerts.surge and window_panes > 1 and cfg.alerts.recent_panes >= window_panes:
        _fail(
            "alerts.recent_panes",
            cfg.alerts.recent_panes,
            f"must be < the window's panes ({window_panes}, from engine.window_size/pane_size "
            "or window_seconds/pane_seconds) so a baseline remains; or set alerts.surge: false",
        )
    if eng.max_itemset_size >= 2 and cfg.rules.max_consequent_size >= eng.max_itemset_size:
        _fail(
            "rules.max_consequent_size",
            cfg.rules.max_consequent_size,
            f"must be < engine.max_itemset_size ({eng.max_itemset_size}) "
            "so every rule keeps an antecedent",
        )
    hook = cfg.sinks.webhook
    if hook.max_backoff_seconds < hook.backoff_seconds:
        _fail(
            "sinks.webhook.max_backoff_seconds",
            hook.max_backoff_seconds,
            f"must be >= sinks.webhook.backoff_seconds ({hook.backoff_seconds:g})",
        )
    _nats_cross_checks(cfg)
    if "http" in cfg.input.source and cfg.server.listen is None:
        _fail(
            "input.source",
            list(cfg.input.source),
            "'http' needs server.listen set (HTTP ingest is served by the listener)",
        )


def _nats_cross_checks(cfg: Config) -> None:
    nats = cfg.input.nats
    interval = cfg.checkpoint.checkpoint_interval_seconds
    if nats.ack_wait_seconds is not None and nats.ack_wait_seconds <= interval:
        _fail(
            "input.nats.ack_wait_seconds",
            nats.ack_wait_seconds,
            f"must be > checkpoint.checkpoint_interval_seconds ({interval:g}): messages are "
            "acknowledged at checkpoints, so a shorter wait redelivers every message (null "
            "derives it: twice the interval plus 60)",
        )
    if nats.pull_batch > nats.max_buffered_messages:
        _fail(
            "input.nats.pull_batch",
            nats.pull_batch,
            f"must be <= input.nats.max_buffered_messages ({nats.max_buffered_messages})",
        )
    if nats.max_reconnect_wait_seconds < nats.reconnect_wait_seconds:
        _fail(
            "input.nats.max_reconnect_wait_seconds",
            nats.max_reconnect_wait_seconds,
            f"must be >= input.nats.reconnect_wait_seconds ({nats.reconnect_wait_seconds:g})",
        )
    if "nats" in cfg.input.source and cfg.input.format == "csv" and cfg.input.csv.header:
        _fail(
            "input.csv.header",
            True,
            "must be false with input.source nats: messages on a bus carry no header row, so "
            "columns are named by 0-based number (input.csv.order_field: '0'...)",
        )
    if nats.creds_file is not None and nats.token_env is not None:
        _fail(
            "input.nats.token_env",
            nats.token_env,
            "set either input.nats.creds_file or input.nats.token_env, not both",
        )


def _window_panes(cfg: Config) -> int:
    eng = cfg.engine
    if eng.window_seconds is not None and eng.pane_seconds is not None:
        return round(eng.window_seconds / eng.pane_seconds)
    return eng.window_size // eng.pane_size


# ---------------------------------------------------------------------------------------------
# Public API
# ---------------------------------------------------------------------------------------------


def config_from_mapping(data: Mapping[str, Any] | None, *, source: str = "<mapping>") -> Config:
    """Validate a mapping (sections of keys) into a :class:`Config`.

    Parameters
    ----------
    data:
        Sections as in ``config/default.yaml``; missing keys take their defaults; ``None`` gives
        the defaults.
    source:
        Where the data came from; stored as ``source`` on a raised error for messages.

    Raises
    ------
    ConfigError
        Naming the dotted key, the value and the rule it breaks.
    """
    try:
        cfg: Config = _build(Config, data, "")
        _cross_checks(cfg)
    except ConfigError as err:
        err.source = source  # type: ignore[attr-defined]
        raise
    return cfg


class _UniqueKeyLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key given twice in one mapping (YAML keeps the last)."""


def _construct_unique_mapping(loader: _UniqueKeyLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node)  # type: ignore[no-untyped-call]
        if key in seen:
            mark = key_node.start_mark
            raise ConfigError(
                str(key),
                key,
                f"is given twice in one section (line {mark.line + 1}); keep one",
            )
        seen.add(key)
    return loader.construct_mapping(node)


_UniqueKeyLoader.add_constructor(
    yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG,
    _construct_unique_mapping,  # type: ignore[arg-type]
)


def load_config(path: str | Path) -> Config:
    """Read a YAML file and validate it (an empty file gives the defaults).

    Raises
    ------
    ConfigError
        The file is missing or unreadable, is not valid YAML (the message gives line and
        column), its top level is not a mapping, or a key or value breaks a rule.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(str(path), str(path), f"cannot be read as a UTF-8 file: {exc}") from exc
    try:
        data = yaml.load(text, Loader=_UniqueKeyLoader)  # a SafeLoader subclass
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        lines = text.splitlines()
        if mark is not None:
            where = f"{path}, line {mark.line + 1}, column {mark.column + 1}"
            shown = lines[mark.line].strip() if mark.line < len(lines) else ""
        else:
            where, shown = str(path), ""
        raise ConfigError(
            where,
            shown,
            f"is not valid YAML ({exc.problem or exc.context}); check the indentation and "
            "that every ':' is followed by a space",
        ) from exc
    except yaml.YAMLError as exc:
        raise ConfigError(str(path), "", f"is not valid YAML ({exc})") from exc
    if data is not None and not isinstance(data, Mapping):
        raise ConfigError(
            str(path),
            data,
            "the top level must be a mapping of sections ("
            + ", ".join(f.name for f in dataclasses.fields(Config))
            + ")",
        )
    return config_from_mapping(data, source=str(path))


def config_to_mapping(config: Config) -> dict[str, Any]:
    """The configuration as nested plain dicts (``config_from_mapping`` gives it back)."""
    return dataclasses.asdict(config)


def _coerce_override(path: str, value: object) -> object:
    """Parse a command-line string as YAML when the key does not take text (``"0.01"`` -> 0.01)."""
    if not isinstance(value, str):
        return value
    cls: Any = Config
    parts = path.split(".")
    for part in parts[:-1]:
        cls = typing.get_type_hints(cls)[part]
    hint = typing.get_type_hints(cls)[parts[-1]]
    options = typing.get_args(hint) or (hint,)
    if str in options:
        return value
    try:
        return yaml.safe_load(value)
    except yaml.YAMLError:
        return value  # the type check names the key and the expected type


def apply_overrides(config: Config, overrides: Mapping[str, object]) -> Config:
    """A copy of ``config`` with dotted keys replaced, validated like a file.

    Strings given for keys that do not take text are read as YAML scalars, so command-line text
    such as ``"0.01"``, ``"true"`` or ``"null"`` works.

    Raises
    ------
    ConfigError
        For an unknown dotted key (with the closest known one) or a value breaking a rule.
    """
    data = config_to_mapping(config)
    known = _all_keys(Config)
    for path, value in overrides.items():
        if path in RETIRED_KEYS:
            raise ConfigError(path, value, RETIRED_KEYS[path])
        if path not in known:
            close = difflib.get_close_matches(path, known, n=1, cutoff=0.6)
            hint = f"did you mean {close[0]!r}?" if close else "see config/default.yaml"
            raise ConfigError(path, value, f"unknown key; {hint}")
        node = data
        *parents, leaf = path.split(".")
        for part in parents:
            node = node[part]
        node[leaf] = _coerce_override(path, value)
    return config_from_mapping(data, source="<overrides>")


def fingerprint_settings(config: Config) -> dict[str, object]:
    """The settings named in :data:`FINGERPRINT_KEYS` with their values."""
    data = config_to_mapping(config)
    out: dict[str, object] = {}
    for path in FINGERPRINT_KEYS:
        node: Any = data
        for part in path.split("."):
            node = node[part]
        out[path] = node
    return out


def fingerprint(config: Config) -> str:
    """SHA-256 (hex) over the settings that shape counting state (:data:`FINGERPRINT_KEYS`).

    Two configurations with the same fingerprint can share a checkpoint; thresholds, sinks and
    the server do not take part.
    """
    text = json.dumps(fingerprint_settings(config), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def describe(config: Config) -> str:
    """One line for the start-up log: source, window, derived error bound, thresholds, outputs."""
    inp, eng, rules = config.input, config.engine, config.rules
    source = " + ".join(f"file {inp.path}" if name == "file" else name for name in inp.source)
    if eng.window_seconds is not None and eng.pane_seconds is not None:
        window = (
            f"window {eng.window_seconds:g}s in {_window_panes(config)} panes "
            f"of {eng.pane_seconds:g}s"
        )
    else:
        window = (
            f"window {eng.window_size} transactions in {_window_panes(config)} panes "
            f"of {eng.pane_size}"
        )
    if eng.epsilon == 0:
        error = "exact counts"
    else:
        width = math.ceil(1 / eng.epsilon)
        error = f"epsilon {eng.epsilon:g} (bucket width {width})"
        if eng.window_seconds is None:
            # Manku & Motwani bound summed over panes: sum of ceil(n_j / w)
            bound = _window_panes(config) * math.ceil(eng.pane_size / width)
            error += f", max undercount {bound} per full window"
    sinks = [name for name in ("stdout", "log") if getattr(config.sinks, name)]
    if config.sinks.file:
        sinks.append(f"file {config.sinks.file}")
    if config.sinks.webhook.url:
        sinks.append("webhook")
    checkpoints = config.checkpoint.checkpoint_dir or "off"
    return (
        f"input {source} ({inp.format}); {window}; {error}; itemsets up to "
        f"{eng.max_itemset_size}; rules support>={rules.min_support:g} "
        f"confidence>={rules.min_confidence:g} lift>={rules.min_lift:g}; "
        f"sinks {', '.join(sinks) or 'none'}; server {config.server.listen or 'off'}; "
        f"checkpoints {checkpoints}"
    )


def check_config_main(path: str | Path) -> int:
    """``streamcount check-config FILE``: print ``OK: <summary>`` (0) or the error (2)."""
    try:
        cfg = load_config(path)
    except ConfigError as err:
        print(f"error: {path}: {err}", file=sys.stderr)
        return 2
    print(f"OK: {describe(cfg)}")
    token_env = cfg.server.token_env
    if token_env and not os.environ.get(token_env):
        print(
            f"warning: server.token_env = {token_env!r}: that environment variable is not set "
            "here; `streamcount run` will refuse to start without it",
            file=sys.stderr,
        )
    return 0
