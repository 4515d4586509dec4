"""The per-key rules of the configuration: :data:`KEY_RULES` and :data:`NORMALISE`.

:data:`KEY_RULES` maps each dotted key to the rules its value must keep, in order: a predicate
and the rule's text, written as advice. A predicate sees the value after the type check of
:mod:`streamcount.config.load` (never ``None``: ``null`` is accepted or refused by the type
annotation alone). A name that a registry defines (formats, sources, significance tests) is
read from that registry. :func:`parse_listen`, the rule of ``server.listen``, is here too.

Rules that tie two keys together, and the retired keys, are in :mod:`streamcount.config.checks`
(which re-exports these names).

Examples
--------
>>> [rule for _, rule in KEY_RULES["engine.epsilon"]]
['must be in [0, 1) (0 counts exactly)']
>>> all(check(0.01) for check, _ in KEY_RULES["engine.epsilon"])
True
>>> NORMALISE["logging.level"]("debug")
'DEBUG'
"""

from __future__ import annotations

import codecs
import re
from collections.abc import Callable
from typing import Any
from urllib.parse import urlsplit

from streamcount.config.settings import DEFAULT_LISTEN, DEFAULT_PORT

__all__ = [
    "KEY_RULES",
    "NORMALISE",
    "parse_listen",
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
