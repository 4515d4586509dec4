"""How a counted pane travels between processes: :func:`encode_pane` and :func:`decode_pane`.

``replay --workers`` counts whole panes in worker processes and hands each one to the parent
as bytes. The pane summary format of the scale-out work (``streamcount.engine.wire``:
versioned, checksummed, item names instead of worker-local ids) is the one to use; when that
module is installed this one *is* it (the same three names, re-exported). Until it is, a
stand-in with the same signatures is defined here: the summary's arrays and the names of the
items it tracks, pickled (the bytes only ever pass between processes of one replay).

Either way::

    payload = encode_pane(summary, names, PaneMeta(...))   # summary ids index ``names``
    meta, levels, names = decode_pane(payload)             # level ids index the new ``names``

and only the names of tracked items travel, so the receiver interns names, never ids.
"""

from __future__ import annotations

import math
import pickle
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from streamcount.engine.counters import Level

__all__ = ["PaneMeta", "decode_pane", "encode_pane"]

try:  # the scale-out wire format, once it is part of the package
    from streamcount.engine.wire import (  # type: ignore[import-not-found,unused-ignore]
        PaneMeta,
        decode_pane,
        encode_pane,
    )
except ImportError:
    _TAG = b"SCPANE1\n"

    @dataclass(frozen=True, slots=True)
    class PaneMeta:  # type: ignore[no-redef]
        """What travels with a pane's counts (the fields of the scale-out format)."""

        pane_index: int
        transactions: int
        epsilon: float
        max_itemset_size: int
        fingerprint: str
        catalogue: str
        start: float | None = None
        end: float | None = None
        worker: str = ""

        @property
        def absent_bound(self) -> int:
            """``ceil(n / w)``: the bound on the count of an untracked itemset."""
            if self.epsilon == 0:
                return 0
            width = math.ceil(1.0 / self.epsilon - 1e-12)
            return -(-self.transactions // width)

    def encode_pane(summary: Any, names: Sequence[str], meta: PaneMeta) -> bytes:  # type: ignore[misc]
        """The pane as bytes: only the names of tracked items, ids renumbered onto them in
        the sender's id order (so rows keep their order)."""
        levels = tuple(summary.levels)
        if len(levels) != meta.max_itemset_size:
            raise ValueError(f"{len(levels)} levels, meta.max_itemset_size {meta.max_itemset_size}")
        if getattr(summary, "n", meta.transactions) != meta.transactions:
            raise ValueError("the summary and meta disagree on the transactions counted")
        ids = [np.asarray(lv.items).reshape(-1) for lv in levels]
        used = np.unique(np.concatenate(ids)) if ids else np.zeros(0, dtype=np.int64)
        body = (
            tuple(meta.__getattribute__(f) for f in PaneMeta.__slots__),
            [names[i] for i in used.tolist()],
            [(np.searchsorted(used, lv.items).astype(np.int32), lv.f, lv.delta) for lv in levels],
        )
        return _TAG + pickle.dumps(body, protocol=pickle.HIGHEST_PROTOCOL)

    def decode_pane(data: bytes) -> tuple[PaneMeta, tuple[Level, ...], list[str]]:  # type: ignore[misc]
        """``(meta, levels, names)`` from :func:`encode_pane`'s bytes."""
        if not bytes(data[: len(_TAG)]) == _TAG:
            raise ValueError("not a pane summary of this streamcount version")
        fields, names, arrays = pickle.loads(data[len(_TAG) :])
        meta = PaneMeta(*fields)
        levels = tuple(
            Level(np.asarray(items).reshape(-1, k), np.asarray(f), np.asarray(d))
            for k, (items, f, d) in enumerate(arrays, start=1)
        )
        return meta, levels, list(names)
