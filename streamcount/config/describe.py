"""What a configuration amounts to: its fingerprint and a one-line description.

:func:`fingerprint` identifies the settings that shape counting state (a checkpoint is only
valid under the same values); :func:`describe` is the start-up log line and the summary of
``streamcount check-config``.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from typing import Any

from streamcount.config.checks import window_panes
from streamcount.config.settings import Config

__all__ = ["FINGERPRINT_KEYS", "describe", "fingerprint", "fingerprint_settings"]

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


def fingerprint_settings(config: Config) -> dict[str, object]:
    """The settings named in :data:`FINGERPRINT_KEYS` with their values."""
    data = dataclasses.asdict(config)
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
    cluster = config.cluster
    if cluster.role == "merger":
        workers = ", ".join(cluster.workers or ())
        source = f"pane summaries of {workers} from stream {cluster.stream}"
    elif cluster.role == "worker":
        subject = cluster.subject.replace("{worker}", cluster.worker or "")
        source += f", as cluster worker {cluster.worker} publishing panes to {subject}"
    if eng.window_seconds is not None and eng.pane_seconds is not None:
        window = (
            f"window {eng.window_seconds:g}s in {window_panes(config)} panes "
            f"of {eng.pane_seconds:g}s"
        )
    else:
        window = (
            f"window {eng.window_size} transactions in {window_panes(config)} panes "
            f"of {eng.pane_size}"
        )
    if eng.epsilon == 0:
        error = "exact counts"
    else:
        width = math.ceil(1 / eng.epsilon)
        error = f"epsilon {eng.epsilon:g} (bucket width {width})"
        if eng.window_seconds is None:
            # Manku & Motwani bound summed over panes: sum of ceil(n_j / w)
            bound = window_panes(config) * math.ceil(eng.pane_size / width)
            error += f", max undercount {bound} per full window"
    sinks = [name for name in ("stdout", "log") if getattr(config.sinks, name)]
    if config.sinks.file:
        sinks.append(f"file {config.sinks.file}")
    if config.sinks.webhook.url:
        sinks.append("webhook")
    checkpoints = config.checkpoint.checkpoint_dir or "off"
    items = config.items
    catalogue = ""
    if items.catalogue or items.ignore or items.allow is not None or items.rename:
        parts = [f"levels {'+'.join(items.levels)}"]
        if items.catalogue:
            parts.insert(0, f"catalogue {items.catalogue}")
        if items.ignore or items.allow is not None:
            parts.append(f"{len(items.ignore)} ignore, {'an' if items.allow else 'no'} allow list")
        catalogue = "; " + ", ".join(parts)
    return (
        f"input {source} ({inp.format}){catalogue}; {window}; {error}; itemsets up to "
        f"{eng.max_itemset_size}; rules support>={rules.min_support:g} "
        f"confidence>={rules.min_confidence:g} lift>={rules.min_lift:g}; "
        f"sinks {', '.join(sinks) or 'none'}; server {config.server.listen or 'off'}; "
        f"checkpoints {checkpoints}"
    )
