"""streamcount: live co-purchase counts, rules and alerts over a sliding window.

Data flow (open the modules in this order to follow one order through the service)::

    sources     a followed file / stdin / HTTP ingest -> raw records with source offsets
    formats     raw record -> Transaction (basket, JSON lines, CSV order lines); bad -> deadletter
    vocab       item names -> dense int ids
    engine      batches transactions into panes (count- or time-based), closes and expires them
      window    Pane: a Lossy Counting summary + buffer; combine_panes sums panes into a window
      counters  LossySummary: itemset counts of one pane, vectorised on integer keys (keys)
    snapshot    WindowSnapshot: frozen window counts with lower/upper bounds
    rules       frequent itemsets -> rules with support/confidence/lift... as intervals (measures)
    alerts      RuleMonitor: hysteresis, confirmation, cooldown, surges, families -> Alert
    sinks       alert records -> log / JSON lines / webhook, each isolated

Around the flow: config (typed settings, loaded and checked by one rules table), metrics
(Prometheus), server (HTTP API), checkpoint (atomic, versioned state files), app (the service loop),
replay (a file as fast as possible), generator + catalog + demo (synthetic feeds), cli.
"""

from __future__ import annotations

from streamcount.config.load import load_config
from streamcount.config.settings import Config
from streamcount.engine.engine import Engine
from streamcount.engine.snapshot import EngineStatistics, FrequentItemset, WindowSnapshot
from streamcount.errors import (
    CheckpointError,
    ConfigError,
    InputError,
    ParseError,
    SinkError,
    StreamcountError,
)

__version__ = "0.1.0"

__all__ = [
    "CheckpointError",
    "Config",
    "ConfigError",
    "Engine",
    "EngineStatistics",
    "FrequentItemset",
    "InputError",
    "ParseError",
    "SinkError",
    "StreamcountError",
    "WindowSnapshot",
    "__version__",
    "load_config",
]
