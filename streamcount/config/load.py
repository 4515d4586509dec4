"""Load and validate configuration into the frozen dataclasses of :mod:`.settings`.

A YAML file (or any mapping, or command-line overrides) is validated once into a
:class:`~streamcount.config.settings.Config`. The walk is generic: every dataclass field is a
key, its type annotation says what the value may be (an ``int`` is accepted where a ``float``
is expected, a ``bool`` never counts as a number, and ``null`` only where the annotation allows
``None``), and the rules of :mod:`streamcount.config.checks` (a table of per-key rules plus a
few cross-field checks) say which values make sense. Anything wrong raises
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

import dataclasses
import difflib
import math
import os
import sys
import types
import typing
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import yaml

# FINGERPRINT_KEYS, RETIRED_KEYS, describe, fingerprint, fingerprint_settings and parse_listen
# live in .checks, .keyrules and .describe; they are re-exported here for the modules that
# import them from this one
from streamcount.config.checks import RETIRED_KEYS, cross_checks
from streamcount.config.describe import (
    FINGERPRINT_KEYS,
    describe,
    fingerprint,
    fingerprint_settings,
)
from streamcount.config.keyrules import KEY_RULES, NORMALISE, parse_listen
from streamcount.config.settings import Config
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

# ---------------------------------------------------------------------------------------------
# Generic walk over the dataclasses
# ---------------------------------------------------------------------------------------------


def _type_name(tp: Any) -> str:
    if typing.get_origin(tp) is tuple:
        return "a list of names"
    return "null" if tp is type(None) else getattr(tp, "__name__", str(tp))


def _check_type(key: str, value: Any, hint: Any, *, allow_empty: bool = False) -> Any:
    """Return ``value`` as the annotated type (int -> float) or raise ConfigError.

    ``allow_empty``: an empty list is a valid list of names (for keys whose default is one)."""
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
            if not items and not allow_empty:
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


def _build(cls: type, data: object, prefix: str) -> Any:
    section = prefix.rstrip(".") or "<top level>"
    if data is None:
        data = {}
    if not isinstance(data, Mapping):
        _fail(section, data, f"must be a mapping of keys to values ({cls.__name__})")
    hints = typing.get_type_hints(cls)
    names = [f.name for f in dataclasses.fields(cls)]
    empty_ok = {f.name for f in dataclasses.fields(cls) if f.default == ()}
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
        if isinstance(hint, type) and dataclasses.is_dataclass(hint):
            values[name] = _build(hint, data[name], path + ".")
            continue
        value = _check_type(path, data[name], hint, allow_empty=name in empty_ok)
        if value is not None:
            if path in NORMALISE:
                value = NORMALISE[path](value)
            for predicate, rule in KEY_RULES.get(path, ()):
                if not predicate(value):
                    _fail(path, data[name], rule)
        values[name] = value
    return cls(**values)


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
        cross_checks(cfg)
    except ConfigError as err:
        err.source = source
        raise
    return cfg


class _UniqueKeyLoader(yaml.SafeLoader):
    """``yaml.SafeLoader`` that refuses a key given twice in one mapping (YAML keeps the last)."""


def _construct_unique_mapping(loader: _UniqueKeyLoader, node: yaml.MappingNode) -> dict[Any, Any]:
    seen: set[Any] = set()
    for key_node, _ in node.value:
        key = loader.construct_object(key_node)
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
    _construct_unique_mapping,
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
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError("--config", str(path), "no such file") from None
    except IsADirectoryError:
        raise ConfigError("--config", str(path), "is a directory, not a YAML file") from None
    except PermissionError:
        raise ConfigError(
            "--config", str(path), "permission denied: make the file readable by this user"
        ) from None
    except OSError as exc:
        raise ConfigError("--config", str(path), f"cannot be read ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(
            "--config",
            str(path),
            f"is not UTF-8 text (byte {exc.start} is {raw[exc.start : exc.start + 1]!r}); "
            "save the file as UTF-8",
        ) from None
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


def check_config_main(path: str | Path) -> int:
    """``streamcount check-config FILE``: print ``OK: <summary>`` (0) or the error (2)."""
    try:
        cfg = load_config(path)
    except ConfigError as err:
        # the message names the file (a key of it, or the file itself), once
        where = "" if str(path) in str(err) else f"{path}: "
        print(f"error: {where}{err}", file=sys.stderr)
        return 2
    print(f"OK: {describe(cfg)}")
    token_env = cfg.server.token_env
    if token_env and not os.environ.get(token_env):
        print(
            f"warning: server.token_env = {token_env!r}: that environment variable is not set "
            "here; `streamcount run` will refuse to start without it",
            file=sys.stderr,
        )
    for key, file in (
        ("server.token_file", cfg.server.token_file),
        ("server.tls_certificate", cfg.server.tls_certificate),
        ("server.tls_key", cfg.server.tls_key),
    ):
        if file and not os.access(file, os.R_OK):
            print(
                f"warning: {key} = {file!r}: cannot be read here; `streamcount run` will "
                "refuse to start without it",
                file=sys.stderr,
            )
    return 0
