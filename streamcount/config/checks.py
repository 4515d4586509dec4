"""The rules a configuration must keep: the one place where settings are validated.

* :data:`KEY_RULES`: per dotted key, the rules its value must keep (a predicate and the rule's
  text, written as advice), with :data:`NORMALISE` and :func:`parse_listen`; they live in
  :mod:`streamcount.config.keyrules` and are re-exported here;
* :func:`cross_checks`: rules tying two keys together, each message naming both (with
  :func:`window_panes`, the panes in a full window);
* :data:`RETIRED_KEYS`: keys that existed once, with what replaced them.

Components built from a :class:`~streamcount.config.settings.Config` (decoders, sources, sinks,
the server) do not check their settings again: a config reaches them through
:func:`streamcount.config.load.config_from_mapping`, which applies these rules. A name that a
registry defines (formats, sources, significance tests) is read from that registry.
"""

from __future__ import annotations

import ipaddress
import typing

from streamcount.config.keyrules import KEY_RULES, NORMALISE, parse_listen
from streamcount.config.settings import Config
from streamcount.errors import ConfigError

__all__ = [
    "KEY_RULES",
    "NORMALISE",
    "RETIRED_KEYS",
    "cross_checks",
    "parse_listen",
    "window_panes",
]


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


def _rename_problem(rules: tuple[str, ...]) -> str | None:
    from streamcount.catalogue.rename import parse_rule  # the catalogue imports the settings

    for i, text in enumerate(rules):
        try:
            parse_rule(text)
        except ValueError as exc:
            return f"rule {i} ({text!r}): {exc}"
    return None


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
