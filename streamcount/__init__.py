"""streamcount: live co-purchase counts, rules and alerts over a sliding window.

Data flow (open the modules in this order to follow one order through the service)::

    intake/sources   file / stdin / HTTP ingest (one registry) -> RecordBatch (lines + offsets)
    intake/formats   RecordBatch -> Decoded transactions (basket, JSON lines, CSV order lines);
                     bad records -> ParseError -> intake/deadletter
    pipeline         Decoded -> engine; at each pane close: rules and alerts -> sinks
    engine/engine    guards, sequence numbers, batching into panes (count- or time-based)
      engine/window  SlidingWindow: panes in order, expiry, warm-up, the split cache
      engine/pane    Pane: a counting summary + the buffer not yet counted (its exact overlay)
      engine/counters  LossySummary: itemset counts of one pane, vectorised on integer keys
    engine/snapshot  WindowSnapshot: frozen window counts with lower/upper bounds
    rules            frequent itemsets -> rules with support/confidence/lift... as intervals
    alerts           rule list; CUSUM change tests per itemset under one false-alert budget;
                     detectors (emerged, surged, faded) -> Alert records -> sinks

Around the flow: config (typed, validated settings), service (the loop, the HTTP API, metrics,
checkpoints, the per-pane-close history and the page at ``GET /`` with its files in web/),
replay (a file as fast as possible), cli, and apart from the core the demo material (demo: the
generator, the invented shop, the demo).
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
