"""Integer codes: distinct keys and each key's index among them, by table lookup instead of sorting."""

from __future__ import annotations

import numpy as np


def integer_codes(keys: np.ndarray, size: int) -> tuple[np.ndarray, np.ndarray]:
    """Sorted distinct keys and each key's index among them (``np.unique`` with ``return_inverse``).

    Keys are non-negative integers below ``size``; when a table of that size fits
    comfortably in memory it replaces sorting.
    """
    if size > 50_000_000:
        distinct, inverse = np.unique(keys, return_inverse=True)
        return distinct, inverse.ravel()
    present = np.zeros(size, dtype=bool)
    present[keys] = True
    distinct = np.flatnonzero(present)
    # Each distinct key's index is written at its own place only: the rest of the table is never read, never touched.
    index = np.empty(size, dtype=np.int32 if len(distinct) < 2**31 else np.int64)
    index[distinct] = np.arange(len(distinct))
    return distinct, index[keys]
