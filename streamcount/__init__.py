"""streamcount: live co-purchase counts, rules and alerts over a sliding window."""

from __future__ import annotations

__version__ = "0.1.0"
