"""The alarm record a :class:`~streamcount.alerts.cusum.CusumBank` returns for one pane, and
the array helpers its steps share (directions, key arrays, row maxima, sorted insertion).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from streamcount.alerts.cusum_stats import CusumInputError

__all__ = [
    "DIRS",
    "CusumAlarms",
    "dir_index",
    "join_alarms",
    "keys_array",
    "merged_rows",
    "row_max",
]

#: the two directions a bank tests, in the order of its arrays
DIRS = ("up", "down")


@dataclass(frozen=True)
class CusumAlarms:
    """Alarms of one pane, one row per (candidate, direction); arrays of equal length.

    ``direction`` is +1 (up) or -1 (down). ``ratio`` is ``p1/p0`` of the alarming alternative
    (the one with the largest statistic). ``p0`` is the reference bound the test used.
    ``ref_rate`` / ``recent_rate`` are the conservative point rates (up: reference from the
    upper counts, recent from the lower counts; down: the reverse) and their ``_low`` /
    ``_high`` ends are Poisson bounds at ``evidence_z`` on the lower and upper counts.
    ``recent_*`` covers the panes from ``change_pane`` to this one (``recent_transactions``).
    """

    pane: int
    threshold: float
    keys: np.ndarray
    direction: np.ndarray
    statistic: np.ndarray
    ratio: np.ndarray
    change_pane: np.ndarray
    p0: np.ndarray
    ref_rate: np.ndarray
    ref_low: np.ndarray
    ref_high: np.ndarray
    recent_rate: np.ndarray
    recent_low: np.ndarray
    recent_high: np.ndarray
    recent_transactions: np.ndarray

    def __len__(self) -> int:
        return int(self.keys.shape[0])

    def of(self, direction: str) -> np.ndarray:
        """Keys alarming in ``direction`` (``"up"`` or ``"down"``), sorted."""
        return self.keys[self.direction == (1 if dir_index(direction) == 0 else -1)]


def dir_index(direction: str) -> int:
    if direction not in DIRS:
        raise CusumInputError(f"direction = {direction!r}: must be 'up' or 'down'")
    return DIRS.index(direction)


def keys_array(keys: object, what: str) -> np.ndarray:
    arr = np.asarray(keys)
    if arr.ndim != 1 or (arr.size and arr.dtype.kind not in "iu"):
        raise CusumInputError(f"{what}: must be a 1-d integer array, got {arr.dtype} {arr.shape}")
    return arr.astype(np.int64, copy=False)


def merged_rows(
    old: np.ndarray, new: np.ndarray, old_slots: np.ndarray, new_slots: np.ndarray
) -> np.ndarray:
    """``old`` and ``new`` rows interleaved: row ``i`` of ``old`` at ``old_slots[i]``, of ``new``
    at ``new_slots[i]`` (together, every slot once).

    >>> merged_rows(np.array([1, 4]), np.array([2, 3]), np.array([0, 3]), np.array([1, 2]))
    array([1, 2, 3, 4])
    """
    out = np.empty((old.shape[0] + new.shape[0], *old.shape[1:]), dtype=old.dtype)
    out[old_slots] = old
    out[new_slots] = new
    return out


def row_max(a: np.ndarray) -> np.ndarray:
    """Each row's largest value ignoring NaN (0 for no columns), a column at a time: with a
    handful of columns several times faster than a reduction along the rows.

    >>> row_max(np.array([[0.5, 2.0], [1.0, 0.0]])).tolist()
    [2.0, 1.0]
    """
    if a.shape[1] == 0:
        return np.zeros(a.shape[0])
    out = a[:, 0].copy()
    for j in range(1, a.shape[1]):
        np.fmax(out, a[:, j], out=out)
    return out


def join_alarms(pane: int, h: float, parts: list[dict[str, np.ndarray]]) -> CusumAlarms:
    fields = {name: np.concatenate([p[name] for p in parts]) for name in parts[0]}
    return CusumAlarms(pane=pane, threshold=h, **fields)
