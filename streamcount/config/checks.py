"""The rules a configuration must keep: the one place where settings are validated.

* :data:`KEY_RULES`: per dotted key, the rules its value must keep (a predicate and the rule's
  text, written as advice); a predicate sees the value after the type check of
  :mod:`streamcount.config.load` (never ``None``: ``null`` is accepted or refused by the type
  annotation alone);
* :func:`cross_checks`: rules tying two keys together, each message naming both;
* :data:`RETIRED_KEYS`: keys that existed once, with what replaced them.

Components built from a :class:`~streamcount.config.settings.Config` (decoders, sources, sinks,
the server) do not check their settings again: a config reaches them through
:func:`streamcount.config.load.config_from_mapping`, which applies these rules. A name that a
registry defines (formats, sources, significance tests) is read from that registry.
"""

from __future__ import annotations

import codecs
import ipaddress
import re
import typing
from collections.abc import Callable
from typing import Any
from urllib.parse import urlsplit

from streamcount.config.settings import DEFAULT_LISTEN, DEFAULT_PORT, Config
from streamcount.errors import ConfigError

__all__ = [
    "KEY_RULES",
    "NORMALISE",
    "RETIRED_KEYS",
    "cross_checks",
    "parse_listen",
    "window_panes",
]

_LOG_LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL")
_ENV_NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")
#: per-rule gauges add three series each; keep the label cardinality of a scrape bounded
_MAX_TOP_RULES = 1000


# ---------------------------------------------------------------------------------------------
# Per-key rules: each is (predicate, rule text), checked in order. A predicate sees the already
# type-checked value (never None: null is accepted or refused by the type annotation alone).
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


def _ascii_compatible(name: str) -> bool:
    """Newline, comma and space are their ASCII bytes (records are split on newline bytes)."""
    return "\n, ".encode(name) == b"\n, "


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


def _significance_names() -> tuple[str, ...]:
    from streamcount.rules.derive import SIGNIFICANCE_TESTS

    return SIGNIFICANCE_TESTS


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


_NON_EMPTY: _Check = (lambda v: v != "", "must not be empty")
_NO_EMPTY_NAME: _Check = (lambda v: all(name.strip() for name in v), "must not hold an empty name")


def _rename_problem(rules: tuple[str, ...]) -> str | None:
    from streamcount.catalogue.rename import parse_rule  # the catalogue imports the settings

    for i, text in enumerate(rules):
        try:
            parse_rule(text)
        except ValueError as exc:
            return f"rule {i} ({text!r}): {exc}"
    return None


#: a worker's name: one subject token, and part of each summary message's id
_WORKER_NAME = re.compile(r"[A-Za-z0-9_-]{1,64}\Z")

KEY_RULES: dict[str, tuple[_Check, ...]] = {
    "input.source": (
        (
            lambda v: all(name in _source_names() for name in v),
            "each must be one of " + ", ".join(repr(n) for n in _source_names()),
        ),
    ),
    "input.normalize": (_one_of("nfc", "none"),),
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
    "input.idle_seconds": (_above(0),),
    "input.max_record_bytes": (_at_least(1),),
    "input.encoding": (
        (_codec_known, "must be a text encoding Python knows, e.g. 'utf-8'"),
        (
            _ascii_compatible,
            "records are split on newline bytes, so the encoding must be ASCII-compatible "
            "(utf-8, latin-1, cp1252...); re-encode the feed as UTF-8",
        ),
    ),
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
    "items.ignore": (_NO_EMPTY_NAME,),
    "items.allow": (_NO_EMPTY_NAME,),
    "items.rename": (
        (
            lambda v: all(" => " in rule for rule in v),
            "each rule must read PATTERN => REPLACEMENT (spaces around =>), e.g. "
            "'(.+)-(S|M|L) => \\1'",
        ),
    ),
    "items.catalogue": (_NON_EMPTY,),
    "items.level_columns": (_NO_EMPTY_NAME,),
    "items.levels": (_NO_EMPTY_NAME,),
    "items.display_name_suffix": (_NON_EMPTY,),
    "items.reload_seconds": (_above(0),),
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
    "rules.significance": (_one_of(*_significance_names()),),
    "rules.max_p_value": ((lambda v: 0 < v <= 1, "must be in (0, 1] (null turns the test off)"),),
    "rules.exit_ratio": ((lambda v: 0 < v <= 1, "must be in (0, 1]"),),
    "rules.max_rules": (_at_least(1),),
    "rules.min_interest": (
        _at_least(1),
        (
            lambda v: v <= 100,
            "must be at most 100 (R of the R-interest measure; 1.1 is a usual value)",
        ),
    ),
    "alerts.false_alerts_per_million": (
        (
            lambda v: 0 < v <= 1e6,
            "must be in (0, 1000000] (expected false alerts per million transactions)",
        ),
    ),
    "alerts.baseline_panes": (_at_least(2),),
    "alerts.recent_panes": (_at_least(1),),
    "alerts.surge_min_count": (_at_least(1),),
    "alerts.surge_min_lift": (_at_least(0),),
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
    "server.token_file": (_NON_EMPTY,),
    "server.tls_certificate": (_NON_EMPTY,),
    "server.tls_key": (_NON_EMPTY,),
    "server.max_request_bytes": (_at_least(1),),
    "server.request_timeout_seconds": (_above(0),),
    "server.keepalive_timeout_seconds": (_above(0),),
    "server.max_connections": (_at_least(1),),
    "server.max_connections_per_client": (_at_least(0),),
    "server.backlog": (_at_least(1),),
    "server.workers": (_at_least(1),),
    "server.auth_failures_per_minute": (_at_least(1),),
    "metrics.top_rules": (
        (
            lambda v: 0 <= v <= _MAX_TOP_RULES,
            f"must be between 0 and {_MAX_TOP_RULES} (each rule adds three series)",
        ),
    ),
    "cluster.role": (_one_of("worker", "merger"),),
    "cluster.worker": (
        (
            lambda v: bool(_WORKER_NAME.match(v)),
            "must be a worker name of 1 to 64 letters, digits, '_' or '-' (it is a subject token)",
        ),
    ),
    "cluster.workers": (
        (
            lambda v: all(_WORKER_NAME.match(name) for name in v),
            "each must be a worker name of 1 to 64 letters, digits, '_' or '-'",
        ),
    ),
    "cluster.stream": (
        (
            lambda v: bool(_NATS_NAME.match(v)),
            "must be a stream name: no spaces, dots, '*', '>' or slashes",
        ),
    ),
    "cluster.subject": (
        (
            lambda v: bool(_NATS_SUBJECT.match(v)) and "*" not in v and ">" not in v,
            "must be a subject to publish to, such as panes.{worker} (tokens separated by dots, "
            "no wildcards; {worker} is replaced by the worker's name)",
        ),
    ),
    "cluster.durable": (
        (
            lambda v: bool(_NATS_NAME.match(v)),
            "must be a consumer name: no spaces, dots, '*', '>' or slashes",
        ),
    ),
    "cluster.pane_timeout_seconds": (_above(0),),
    "cluster.publish_timeout_seconds": (_above(0),),
    "cluster.max_message_bytes": (_at_least(4096),),
    "checkpoint.checkpoint_dir": (_NON_EMPTY,),
    "checkpoint.checkpoint_interval_seconds": (_above(0),),
    "logging.level": (_one_of(*_LOG_LEVELS),),
    "logging.format": (_one_of("text", "json"),),
    "history.max_points": (_at_least(1),),
    "history.alerted_closes": (_at_least(0),),
    "page.refresh_seconds": ((lambda v: 0.5 <= v <= 3600, "must be between 0.5 and 3600 seconds"),),
}

#: values normalised before the rules run (written back into the Config)
NORMALISE: dict[str, Callable[[Any], Any]] = {"logging.level": str.upper}


#: Keys that existed once, with what replaced them: an old config gets a message naming the
#: new key instead of "unknown key". Every entry is also listed in CHANGELOG.md.
RETIRED_KEYS: dict[str, str] = {
    "input.http_ingest": "was replaced by input.source: add 'http' to it, e.g. "
    "input.source: [file, http] (or input.source: http for HTTP ingest alone)",
    "rules.confirm_evaluations": "was retired: alerts come from change tests that gather "
    "their own evidence pane by pane; set alerts.false_alerts_per_million to trade "
    "speed for fewer false alerts",
    "rules.cooldown_evaluations": "was retired: after an alert the change test restarts "
    "from the new rate, so a second alert needs new evidence; remove the key",
    "alerts.surge_max_p_value": "was retired: surges are judged under the one false-alert "
    "budget, alerts.false_alerts_per_million",
    "alerts.growth_rate": "was retired: the change tests' alternatives are fixed multiples "
    "(1.5, 2 and 4) of each itemset's own reference rate; remove the key",
}


def _fail(key: str, value: object, rule: str) -> typing.NoReturn:
    raise ConfigError(key, value, rule)


def cross_checks(cfg: Config) -> None:
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
    panes = window_panes(cfg)
    # a one-pane window (e.g. a whole file counted as one window) has no baseline: surges are
    # simply never raised there, which is no configuration mistake
    if cfg.alerts.surge and panes > 1 and cfg.alerts.recent_panes >= panes:
        _fail(
            "alerts.recent_panes",
            cfg.alerts.recent_panes,
            f"must be < the window's panes ({panes}, from engine.window_size/pane_size "
            "or window_seconds/pane_seconds) so a baseline remains; or set alerts.surge: false",
        )
    if eng.max_itemset_size >= 2 and cfg.rules.max_consequent_size >= eng.max_itemset_size:
        _fail(
            "rules.max_consequent_size",
            cfg.rules.max_consequent_size,
            f"must be < engine.max_itemset_size ({eng.max_itemset_size}) "
            "so every rule keeps an antecedent",
        )
    items = cfg.items
    problem = _rename_problem(items.rename)
    if problem is not None:
        _fail("items.rename", list(items.rename), problem)
    unknown = [lv for lv in items.levels if lv not in items.level_columns]
    if unknown:
        _fail(
            "items.levels",
            list(items.levels),
            f"{unknown} is not a catalogue column; choose from items.level_columns "
            f"({list(items.level_columns)})",
        )
    order = [items.level_columns.index(lv) for lv in items.levels]
    if order != sorted(order):
        _fail(
            "items.levels",
            list(items.levels),
            "list the levels most specific first, in the order of items.level_columns "
            f"({list(items.level_columns)})",
        )
    if tuple(items.levels) != (items.level_columns[0],) and items.catalogue is None:
        _fail(
            "items.levels",
            list(items.levels),
            "counting levels other than "
            f"{items.level_columns[0]!r} needs items.catalogue (the file that maps each "
            f"{items.level_columns[0]} to its ancestors)",
        )
    hook = cfg.sinks.webhook
    if hook.max_backoff_seconds < hook.backoff_seconds:
        _fail(
            "sinks.webhook.max_backoff_seconds",
            hook.max_backoff_seconds,
            f"must be >= sinks.webhook.backoff_seconds ({hook.backoff_seconds:g})",
        )
    _server_checks(cfg)
    _nats_cross_checks(cfg)
    _cluster_checks(cfg)
    if "http" in cfg.input.source and cfg.server.listen is None:
        _fail(
            "input.source",
            list(cfg.input.source),
            "'http' needs server.listen set (HTTP ingest is served by the listener)",
        )
    csv = cfg.input.csv
    if cfg.input.format == "csv" and not csv.header:
        for key in ("order_field", "item_field", "ts_field", "quantity_field"):
            name = getattr(csv, key)
            if name is not None and not name.isdigit():
                _fail(
                    f"input.csv.{key}",
                    name,
                    "with input.csv.header = false, columns are named by 0-based number; "
                    "write e.g. '0', or set header: true",
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


def _cluster_checks(cfg: Config) -> None:
    cluster = cfg.cluster
    if cluster.role is None:
        return
    if cfg.engine.window_seconds is None:
        _fail(
            "cluster.role",
            cluster.role,
            "needs a time-based window (engine.window_seconds and engine.pane_seconds), so "
            "the panes of every worker line up on the orders' own timestamps",
        )
    if cluster.role == "worker" and cluster.worker is None:
        _fail("cluster.worker", None, "must name this worker (cluster.role is worker)")
    if cluster.role == "merger" and not cluster.workers:
        _fail(
            "cluster.workers",
            None,
            "must list the workers whose summaries the merger expects (cluster.role is merger)",
        )


def _loopback(host: str) -> bool:
    """Whether ``host`` (from server.listen) only accepts connections from this machine."""
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # a host name may resolve to anything


def _server_checks(cfg: Config) -> None:
    srv = cfg.server
    if srv.token_env is not None and srv.token_file is not None:
        _fail(
            "server.token_file",
            srv.token_file,
            f"cannot be set together with server.token_env ({srv.token_env!r}); keep one "
            "(a file can be rotated without a restart)",
        )
    if (srv.tls_certificate is None) != (srv.tls_key is None):
        key, other = (
            ("server.tls_certificate", "server.tls_key")
            if srv.tls_certificate is not None
            else ("server.tls_key", "server.tls_certificate")
        )
        _fail(key, getattr(srv, key.split(".")[1]), f"needs {other} set too (or both null)")
    if srv.listen is not None and srv.tls_certificate is None and not srv.behind_proxy:
        host, _ = parse_listen(srv.listen)
        if not _loopback(host):
            _fail(
                "server.listen",
                srv.listen,
                "listens beyond this machine without TLS: set server.tls_certificate and "
                "server.tls_key, or server.behind_proxy: true when a TLS-terminating reverse "
                "proxy is in front (README, 'Exposing the service')",
            )
    if srv.max_connections_per_client > srv.max_connections:
        _fail(
            "server.max_connections_per_client",
            srv.max_connections_per_client,
            f"must be <= server.max_connections ({srv.max_connections})",
        )


def window_panes(cfg: Config) -> int:
    """Panes in a full window (count-based or time-based)."""
    eng = cfg.engine
    if eng.window_seconds is not None and eng.pane_seconds is not None:
        return round(eng.window_seconds / eng.pane_seconds)
    return eng.window_size // eng.pane_size
