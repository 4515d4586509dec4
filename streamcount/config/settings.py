"""Typed, frozen configuration.

Every section of the YAML file maps to one frozen dataclass below; the field names are the
config keys, the command-line options (``--min-support`` is ``min_support``) and the names
used in JSON output and metrics. ``config/default.yaml`` documents every key.

Loading (``load_config``, ``config_from_mapping``) lives in :mod:`streamcount.config.load`
and every rule a value must keep in :mod:`streamcount.config.checks`: a YAML mapping is
validated once into a :class:`Config`; an unknown key or a bad value raises
:class:`~streamcount.errors.ConfigError` naming the dotted key, the value and the rule.
"""

from __future__ import annotations

from dataclasses import dataclass, field

__all__ = [
    "DEFAULT_LISTEN",
    "DEFAULT_PORT",
    "MAX_TIMESTAMP",
    "AlertsConfig",
    "CheckpointConfig",
    "ClusterConfig",
    "Config",
    "CsvConfig",
    "EngineConfig",
    "HistoryConfig",
    "InputConfig",
    "ItemsConfig",
    "JsonlConfig",
    "LoggingConfig",
    "MetricsConfig",
    "NatsConfig",
    "PageConfig",
    "RulesConfig",
    "ServerConfig",
    "SinksConfig",
    "WebhookConfig",
]


#: event timestamps are epoch seconds; one this large is in another unit (ms, us, ns) or garbage
MAX_TIMESTAMP = 1e11

#: streamcount's own default TCP port for /metrics and the JSON API. Unassigned in the IANA
#: registry (10632-10799), absent from nmap's port-frequency list, outside the Prometheus
#: exporter range 9100-9999 (fully allocated) and below the ephemeral ranges; the reasons are
#: in CHANGELOG.md. Every config, example and doc quotes this value (tests/test_default_port.py).
DEFAULT_PORT = 10697
#: the default ``server.listen``: loopback only, so nothing is exposed until configured
DEFAULT_LISTEN = f"127.0.0.1:{DEFAULT_PORT}"


@dataclass(frozen=True, slots=True)
class JsonlConfig:
    """Field names of a JSON lines record; dotted paths reach into nested objects."""

    id_field: str = "id"
    ts_field: str = "ts"
    items_field: str = "items"
    #: inside each element of the items list, the key holding the item name (``null``: the
    #: elements are the names themselves), e.g. ``sku`` for ``"items": [{"sku": "tea"}]``.
    item_name_field: str | None = None


@dataclass(frozen=True, slots=True)
class CsvConfig:
    """CSV order lines: one row per line item, rows of one order grouped into a transaction."""

    order_field: str = "order_id"
    item_field: str = "item"
    ts_field: str = "ts"
    quantity_field: str | None = None
    delimiter: str = ","
    header: bool = True
    #: an order still open this long (event time) after its last row is closed
    order_close_seconds: float = 30.0


@dataclass(frozen=True, slots=True)
class NatsConfig:
    """The ``nats`` source: a durable pull consumer on a NATS JetStream stream.

    Credentials never go here: ``creds_file`` names a file and ``token_env`` an environment
    variable. The stream must exist (file storage, limits retention); the consumer is
    streamcount's own and is re-created at the checkpointed sequence on every start.
    """

    #: server URLs (nats://host:port or tls://host:port); one or several of a cluster
    servers: tuple[str, ...] = ("nats://127.0.0.1:4222",)
    #: the JetStream stream to read
    stream: str = "ORDERS"
    #: subject filter within the stream (wildcards allowed); null: every subject
    subject: str | None = None
    #: name of the durable pull consumer (one streamcount process per name)
    durable: str = "streamcount"
    #: a NATS credentials file (user JWT and seed); null: none
    creds_file: str | None = None
    #: name of the environment variable holding a token (never the token itself)
    token_env: str | None = None
    #: seconds before the server redelivers an unacknowledged message; null: twice
    #: checkpoint.checkpoint_interval_seconds plus 60 (messages are acknowledged at checkpoints)
    ack_wait_seconds: float | None = None
    #: messages delivered but not yet acknowledged (checkpointed) before the server pauses
    max_ack_pending: int = 1000000
    #: messages asked for per pull request
    pull_batch: int = 1000
    #: messages fetched and waiting to be counted, at most
    max_buffered_messages: int = 20000
    connect_timeout_seconds: float = 2.0
    #: first wait before connecting again after a failure; doubles up to the maximum
    reconnect_wait_seconds: float = 0.5
    max_reconnect_wait_seconds: float = 30.0
    #: resume even when the stream no longer holds the message after the checkpointed one
    #: (retention removed it while streamcount was stopped); the gap is logged and counted
    accept_gap: bool = False


@dataclass(frozen=True, slots=True)
class InputConfig:
    """Where transactions come from and how they are read."""

    #: where records come from: one name or a list of them (file | stdin | http | nats); several
    #: run at once, each with its own position in the checkpoint
    source: tuple[str, ...] = ("file",)
    #: the file the ``file`` source follows
    path: str | None = None
    format: str = "basket"  # basket | jsonl | csv
    #: keep reading appended lines (``false``: stop at end of file)
    follow: bool = True
    #: where to start a followed file or a NATS stream when no checkpoint exists:
    #: beginning | end
    start_at: str = "beginning"
    poll_interval_seconds: float = 0.2
    #: wall-clock seconds with nothing new while every source is caught up after which the
    #: service closes open CSV orders and, for a time-based window, moves the watermark to the
    #: clock (never in replay)
    idle_seconds: float = 10.0
    max_record_bytes: int = 65536
    encoding: str = "utf-8"
    #: item names in Unicode normal form C (``nfc``), so one name written with a precomposed
    #: letter or with a combining accent is one item; ``none`` keeps the bytes as read
    normalize: str = "nfc"
    #: largest body POST /v1/transactions accepts (the ``http`` source)
    max_body_bytes: int = 1048576
    #: events stamped more than this many seconds ahead of the wall clock are set aside
    #: (too_early) so one bad clock cannot close every pane; null: no check
    max_future_seconds: float | None = 3600.0
    dead_letter_path: str | None = "dead-letter.jsonl"
    jsonl: JsonlConfig = field(default_factory=JsonlConfig)
    csv: CsvConfig = field(default_factory=CsvConfig)
    nats: NatsConfig = field(default_factory=NatsConfig)


@dataclass(frozen=True, slots=True)
class EngineConfig:
    """Counting: Lossy Counting per pane, panes making up a sliding window."""

    #: Lossy Counting error as a fraction of the window's transactions; 0 counts exactly
    epsilon: float = 0.001
    max_itemset_size: int = 3
    #: baskets with more distinct items are set aside (reason too_many_items), never truncated
    max_basket_items: int = 200
    #: count-based window (transactions); used when window_seconds is null
    window_size: int = 50000
    pane_size: int = 5000
    #: time-based window on the transactions' own timestamps (seconds); overrides window_size
    window_seconds: float | None = None
    pane_seconds: float | None = None
    allowed_lateness_seconds: float = 0.0
    #: transactions buffered before counting (rounded to whole buckets of ceil(1/epsilon))
    batch_size: int = 5000


@dataclass(frozen=True, slots=True)
class ItemsConfig:
    """What counts as an item: filters, renames, the catalogue and the levels counted."""

    #: items removed before counting: exact names, or case-sensitive glob patterns (``*``,
    #: ``?``, ``[...]``); an item both allowed and ignored is ignored
    ignore: tuple[str, ...] = ()
    #: when set, only items matching one of these names or patterns are counted
    allow: tuple[str, ...] | None = None
    #: rename rules ``PATTERN => REPLACEMENT`` (Python regular expressions matching the whole
    #: name; the first rule that matches applies), e.g. ``(.+)-(S|M|L) => \1``
    rename: tuple[str, ...] = ()
    #: the catalogue: a CSV file mapping each SKU to its ancestors (null: no catalogue)
    catalogue: str | None = None
    #: header names of the catalogue's hierarchy columns, most specific first; the ones the
    #: file holds are its levels
    level_columns: tuple[str, ...] = ("sku", "product", "category")
    #: the levels counted, most specific first: one (SKUs, or products...) or several at once
    #: (generalised itemsets: each order extended with the ancestors of its items)
    levels: tuple[str, ...] = ("sku",)
    #: a column named <level column><suffix> holds that level's display names
    display_name_suffix: str = "_name"
    #: seconds between looks at the catalogue file for a change (reloaded when it changed);
    #: null: reload on SIGHUP only
    reload_seconds: float | None = 5.0


@dataclass(frozen=True, slots=True)
class RulesConfig:
    """Association rules from the window's frequent itemsets, and when they are active."""

    min_support: float = 0.01
    min_confidence: float = 0.5
    min_lift: float = 1.5
    #: absolute joint count below which no rule is formed; null: 10 x the window's max_error,
    #: and at least 10
    min_count: int | None = None
    max_consequent_size: int = 1
    #: significance test (fisher | chi2) at the least favourable corner of the intervals;
    #: null max_p_value switches the test off
    significance: str = "fisher"
    max_p_value: float | None = 0.001
    #: judge thresholds on the intervals' conservative ends (low bounds to enter)
    conservative: bool = True
    #: exit thresholds are the entry thresholds times this factor (hysteresis), in (0, 1]
    exit_ratio: float = 0.8
    #: cap on rules kept per evaluation (highest lift first)
    max_rules: int = 1000
    #: R of the R-interest measure for rules across catalogue levels: a rule is dropped when
    #: its support is below R times what its closest ancestor rule predicts (judged on the
    #: intervals: only when the upper bound is below R x the expected lower bound); null: keep
    #: every rule. Has an effect only with several items.levels.
    min_interest: float | None = 1.1


@dataclass(frozen=True, slots=True)
class AlertsConfig:
    """Alerts: detected changes of co-purchase rates under one false-alert budget."""

    #: expected false alerts per million transactions on a stationary feed, shared by every
    #: kind (emerged, faded, surged) and split over the tests run at each pane close
    false_alerts_per_million: float = 1.0
    #: panes of an itemset's own history in the reference rate its change tests compare with
    baseline_panes: int = 50
    #: raise ``surged`` alerts (a co-purchase rate rising, rule or not)
    surge: bool = True
    #: panes over which an itemset needs surge_min_count orders to be tested for a surge
    recent_panes: int = 1
    #: minimum lower-bound count in the recent panes for a surge
    surge_min_count: int = 20
    #: least lift of the itemset in the recent panes (its best rule's, counted conservatively)
    #: for a surge: bought together this many times as often as chance; 0 also alerts on
    #: itemsets whose joint rate rose only because their items sell more
    surge_min_lift: float = 1.5
    #: relative lift (or growth-rate) gain a superset rule (or itemset) needs to alert apart
    #: from its family's representative
    family_lift_tolerance: float = 0.1
    #: alerts kept in memory for GET /v1/alerts
    history: int = 1000


@dataclass(frozen=True, slots=True)
class WebhookConfig:
    url: str | None = None
    timeout_seconds: float = 5.0
    max_retries: int = 5
    backoff_seconds: float = 0.5
    max_backoff_seconds: float = 30.0
    queue_size: int = 1000


@dataclass(frozen=True, slots=True)
class SinksConfig:
    """Where alert records go. Each sink runs on its own; a slow one never blocks the rest."""

    stdout: bool = False
    file: str | None = None
    log: bool = True
    webhook: WebhookConfig = field(default_factory=WebhookConfig)


@dataclass(frozen=True, slots=True)
class ServerConfig:
    """HTTP listener for /metrics and the JSON API."""

    #: host:port; null disables the listener
    listen: str | None = DEFAULT_LISTEN
    #: name of the environment variable holding the bearer token (the token never goes here)
    token_env: str | None = None
    #: file holding the bearer token instead (re-read on SIGHUP: rotation without a restart)
    token_file: str | None = None
    #: serve /metrics without the token, minus the per-rule gauges (their labels hold item
    #: names); false: /metrics needs the token like the API when one is set
    public_metrics: bool = False
    #: PEM certificate (chain) and key for HTTPS; needed to listen beyond loopback unless
    #: behind_proxy is true
    tls_certificate: str | None = None
    tls_key: str | None = None
    #: a TLS-terminating reverse proxy is in front: plain HTTP beyond loopback is allowed and
    #: limits per client use the address the proxy appends to X-Forwarded-For
    behind_proxy: bool = False
    max_request_bytes: int = 1048576
    #: deadline for reading a whole request (headers and body) and for writing its answer
    request_timeout_seconds: float = 10.0
    #: an idle keep-alive connection is closed after this many seconds
    keepalive_timeout_seconds: float = 5.0
    #: open connections in all, and per client address (0: no per-address cap); over a cap a
    #: connection gets 503 with Retry-After
    max_connections: int = 512
    max_connections_per_client: int = 64
    #: connections the kernel queues before they are accepted
    backlog: int = 512
    #: worker threads answering API requests (probes and /metrics have two of their own)
    workers: int = 8
    #: failed authentications one address may make per minute before it gets 429
    auth_failures_per_minute: int = 10


@dataclass(frozen=True, slots=True)
class MetricsConfig:
    #: per-rule gauges for the top N rules by lift (0: off) so label cardinality stays bounded
    top_rules: int = 0


@dataclass(frozen=True, slots=True)
class CheckpointConfig:
    #: directory for checkpoints; null disables them
    checkpoint_dir: str | None = None
    checkpoint_interval_seconds: float = 60.0


@dataclass(frozen=True, slots=True)
class ClusterConfig:
    """Scale-out over NATS JetStream: workers count partitions of one feed and publish every
    closed pane's summary; a merger merges them into one window (README, "When one process is
    not enough"). Both connect with ``input.nats``'s servers and credentials."""

    #: null: one process counts the whole feed; worker: count a partition and publish each
    #: closed pane's summary; merger: merge the workers' summaries (``streamcount merge``)
    role: str | None = None
    #: this worker's name (role worker): letters, digits, '_' and '-'
    worker: str | None = None
    #: the workers whose summaries the merger expects (role merger)
    workers: tuple[str, ...] | None = None
    #: the JetStream stream holding the summaries (file storage; a worker creates it if missing)
    stream: str = "PANES"
    #: subject of a worker's summaries, ``{worker}`` replaced by its name; the merger reads
    #: them all (``{worker}`` as ``*``)
    subject: str = "panes.{worker}"
    #: the merger's durable pull consumer on the summaries stream
    durable: str = "streamcount-merger"
    #: merger: a pane still missing some worker's summary this many seconds (wall clock) after
    #: its first summary arrived is closed without it (the missing workers are named)
    pane_timeout_seconds: float = 60.0
    #: worker: longest wait for the stream to acknowledge published summaries before a
    #: checkpoint; past it the checkpoint is put off (input is acknowledged only after)
    publish_timeout_seconds: float = 30.0
    #: largest message a summary chunk may be, in bytes; null: the server's max_payload
    max_message_bytes: int | None = None


@dataclass(frozen=True, slots=True)
class LoggingConfig:
    level: str = "INFO"
    format: str = "text"  # text | json


@dataclass(frozen=True, slots=True)
class HistoryConfig:
    """The per-pane-close history behind ``GET /v1/history`` and the page's chart."""

    #: points (one itemset at one pane close) held at most; the oldest pane close goes first
    max_points: int = 200000
    #: pane closes an alerted itemset stays followed after its last alert (active rules
    #: are always followed)
    alerted_closes: int = 20


@dataclass(frozen=True, slots=True)
class PageConfig:
    """The page served at ``GET /`` on the API's listener."""

    #: serve the page (false: ``/`` answers 404; the API is unchanged)
    enabled: bool = True
    #: seconds between the page's refreshes
    refresh_seconds: float = 3.0


@dataclass(frozen=True, slots=True)
class Config:
    """The whole validated configuration."""

    input: InputConfig = field(default_factory=InputConfig)
    items: ItemsConfig = field(default_factory=ItemsConfig)
    engine: EngineConfig = field(default_factory=EngineConfig)
    rules: RulesConfig = field(default_factory=RulesConfig)
    alerts: AlertsConfig = field(default_factory=AlertsConfig)
    sinks: SinksConfig = field(default_factory=SinksConfig)
    server: ServerConfig = field(default_factory=ServerConfig)
    metrics: MetricsConfig = field(default_factory=MetricsConfig)
    checkpoint: CheckpointConfig = field(default_factory=CheckpointConfig)
    logging: LoggingConfig = field(default_factory=LoggingConfig)
    cluster: ClusterConfig = field(default_factory=ClusterConfig)
    history: HistoryConfig = field(default_factory=HistoryConfig)
    page: PageConfig = field(default_factory=PageConfig)
