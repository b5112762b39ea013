"""Customers compressed into distinct histories: everything the churn likelihood needs, once per pattern.

The fast :func:`compress_arrays` packs each customer's statistics into 64-bit
words and groups them with pandas' factorize; :mod:`lapsewise.data.reference`
keeps a plain version of the same grouping that the tests compare it with.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.data.panel import Panel
from lapsewise.data.summary import last_purchase_quarter


@dataclass(frozen=True)
class Histories:
    """Customers compressed into distinct histories: everything the churn likelihood needs, once per pattern.

    For each distinct history: ``x`` repeat purchases, ``x_unmailed`` of them in
    unmailed quarters, ``t_x``, ``n``, ``mailed_silent`` and ``unmailed_silent``
    (silent quarters up to ``t_x`` that were mailed / not mailed), and
    ``after_last`` (mail flags of the quarters ``t_x + 1 .. n``, left-aligned,
    padded with 0). ``count`` is how many customers share it and ``inverse`` maps
    every customer to its history.
    """

    x: np.ndarray
    x_unmailed: np.ndarray
    t_x: np.ndarray
    n: np.ndarray
    mailed_silent: np.ndarray
    unmailed_silent: np.ndarray
    after_last: np.ndarray
    count: np.ndarray
    inverse: np.ndarray

    @property
    def size(self) -> int:
        return len(self.x)

    @property
    def silent_quarters(self) -> np.ndarray:
        return self.n - self.t_x

    @property
    def unmailed_quarters(self) -> np.ndarray:
        """b: unmailed silent quarters in the whole history, before and after the last purchase."""
        return self.unmailed_silent + self.silent_quarters - self.after_last.sum(axis=1, dtype=np.int64)


def history_arrays(purchased: np.ndarray, mailed: np.ndarray, n: np.ndarray) -> dict[str, np.ndarray]:
    """The likelihood's sufficient statistics of every row of aligned purchase and mail arrays.

    Each count is one pass over the (customers x quarters) flags; the rest follow
    from identities: the silent quarters 1..t_x number ``t_x - x``, of which
    ``mailed_silent`` are the mailed quarters up to t_x less the mailed purchases.
    """
    width = purchased.shape[1]
    columns = np.arange(width)[None, :]
    observed = (columns >= 1) & (columns <= n[:, None])
    bought = np.logical_and(purchased, observed)
    was_mailed = np.logical_and(mailed, observed)
    del observed
    x = bought.sum(axis=1, dtype=np.int64)
    t_x = np.where(x > 0, last_purchase_quarter(bought), 0)
    x_mailed = (bought & was_mailed).sum(axis=1, dtype=np.int64)
    mailed_through_last = np.logical_and(was_mailed, columns <= t_x[:, None]).sum(axis=1, dtype=np.int64)
    mailed_silent = mailed_through_last - x_mailed
    silent_quarters = n - t_x
    after_width = max(int(silent_quarters.max()), 1) if len(n) else 1
    # The quarters after the last purchase, left-aligned: each row's window of the mail flags from t_x + 1.
    # Flags past n are already 0 (not observed), and so is the padding.
    padded = np.zeros((len(n), width + after_width), dtype=bool)
    padded[:, :width] = was_mailed
    windows = np.lib.stride_tricks.sliding_window_view(padded, after_width, axis=1)
    after_last = windows[np.arange(len(n)), t_x + 1]
    return {
        "x": x,
        "x_unmailed": x - x_mailed,
        "t_x": t_x,
        "n": n.astype(np.int64),
        "mailed_silent": mailed_silent,
        "unmailed_silent": t_x - x - mailed_silent,
        "after_last": after_last.view(np.uint8),
    }


def compress(panel: Panel) -> Histories:
    """Group customers into distinct histories so that model work scales with patterns, not people."""
    arrays = history_arrays(panel.purchased, panel.mailed, panel.n)
    return compress_arrays(arrays)


def compress_arrays(arrays: dict[str, np.ndarray]) -> Histories:
    """Distinct rows of the sufficient statistics, in order of first appearance, with counts and each row's history."""
    scalars = ["x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent"]
    if len(arrays["x"]) == 0:
        empty = np.zeros(0, dtype=np.int64)
        return Histories(**{s: empty for s in scalars}, after_last=arrays["after_last"], count=empty, inverse=empty)
    # The statistics as 64-bit words: the six counts in one word when they fit, then the mail flags, 64 to a word.
    counts = [np.asarray(arrays[s], dtype=np.int64) for s in scalars]
    bits = max(int(c.max()) for c in counts).bit_length() or 1
    if min(int(c.min()) for c in counts) >= 0 and bits * len(counts) <= 63:
        word = np.zeros(len(counts[0]), dtype=np.int64)
        for position, count in enumerate(counts):
            word |= count << (bits * position)
        words, widths = [word], [bits * len(counts)]
    else:
        words, widths = counts, [64] * len(counts)
    packed = np.packbits(arrays["after_last"], axis=1)
    flag_bytes = packed.shape[1]
    packed = np.pad(packed, ((0, 0), (0, -flag_bytes % 8)))
    words += list(np.ascontiguousarray(packed).view("<i8").T)  # little-endian: a short last word keeps its bits low
    widths += [64] * (flag_bytes // 8) + ([8 * (flag_bytes % 8)] if flag_bytes % 8 else [])
    codes = pd.factorize(words[0])[0]
    for word, width in zip(words[1:], widths[1:]):
        if int(codes.max()).bit_length() + width <= 63:  # the codes so far and the word side by side in one key
            codes = pd.factorize((codes << width) | word)[0]
        else:
            word_codes = pd.factorize(word)[0]
            codes = pd.factorize(codes * (int(word_codes.max()) + 1) + word_codes)[0]
    # factorize numbers patterns as they first appear, so a row starts a pattern where the running maximum grows.
    first = np.flatnonzero(np.diff(np.maximum.accumulate(codes), prepend=-1) > 0)
    return Histories(
        **{s: np.asarray(arrays[s])[first] for s in scalars},
        after_last=arrays["after_last"][first],
        count=np.bincount(codes, minlength=len(first)).astype(np.int64),
        inverse=codes.astype(np.int64),
    )


def mailed_silent_histories(x: np.ndarray, t_x: np.ndarray, silent: np.ndarray) -> Histories:
    """Histories of customers mailed every quarter: x repeat purchases, last in t_x, then ``silent`` mailed silent quarters."""
    x, t_x, silent = (np.asarray(v, dtype=np.int64) for v in (x, t_x, silent))
    width = max(int(silent.max()), 1)
    arrays = {
        "x": x,
        "x_unmailed": np.zeros_like(x),
        "t_x": t_x,
        "n": t_x + silent,
        "mailed_silent": t_x - x,
        "unmailed_silent": np.zeros_like(x),
        "after_last": (np.arange(width)[None, :] < silent[:, None]).astype(np.uint8),
    }
    return compress_arrays(arrays)
