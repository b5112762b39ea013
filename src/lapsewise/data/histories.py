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

    Compressed for a seasonal model (``compress(panel, seasons=True)``) a history
    also has its ``phase`` (the quarter of the year of its quarter 0, 0-3; quarter j
    falls in quarter of the year ``(phase + j) % 4``), ``season_x`` (purchases in
    quarters 1..n per quarter of the year, shape (histories, 4)) and
    ``season_mailed_silent`` (mailed silent quarters up to t_x per quarter of the
    year); otherwise these are None.
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
    phase: np.ndarray | None = None
    season_x: np.ndarray | None = None
    season_mailed_silent: np.ndarray | None = None

    @property
    def seasonal(self) -> bool:
        return self.phase is not None

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


def history_arrays(purchased: np.ndarray, mailed: np.ndarray, n: np.ndarray, phase: np.ndarray | None = None) -> dict[str, np.ndarray]:
    """The likelihood's sufficient statistics of every row of aligned purchase and mail arrays.

    Each count is one pass over the (customers x quarters) flags; the rest follow
    from identities: the silent quarters 1..t_x number ``t_x - x``, of which
    ``mailed_silent`` are the mailed quarters up to t_x less the mailed purchases.
    With ``phase`` (each row's quarter of the year of its quarter 0) the seasonal
    statistics are added: ``phase``, ``season_x`` and ``season_mailed_silent``.
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
    arrays = {
        "x": x,
        "x_unmailed": x - x_mailed,
        "t_x": t_x,
        "n": n.astype(np.int64),
        "mailed_silent": mailed_silent,
        "unmailed_silent": t_x - x - mailed_silent,
        "after_last": after_last.view(np.uint8),
    }
    if phase is not None:
        # Column j of a row is in quarter of the year (phase + j) % 4: sum the columns j = r (mod 4), four strided
        # sums, and put each at its row's quarter of the year.
        phase = np.asarray(phase, dtype=np.int64) % 4
        where = (phase[:, None] + np.arange(4)[None, :]) % 4
        mailed_silent_through = was_mailed & ~bought & (columns <= t_x[:, None])
        for name, flags in (("season_x", bought), ("season_mailed_silent", mailed_silent_through)):
            by_offset = np.stack([flags[:, r::4].sum(axis=1, dtype=np.int64) for r in range(4)], axis=1)
            values = np.empty_like(by_offset)
            np.put_along_axis(values, where, by_offset, axis=1)
            arrays[name] = values
        arrays["phase"] = phase
    return arrays


def season_quarters(phase: np.ndarray, last: np.ndarray) -> np.ndarray:
    """How many of the quarters 1..last fall in each quarter of the year, shape (rows, 4), for quarter 0 in ``phase``."""
    q = np.arange(4)[None, :]
    # Quarter j is in quarter of the year q when j = (q - phase) mod 4 + 4 i for some i >= 0, with j >= 1.
    first = (q - np.asarray(phase)[:, None]) % 4
    first = np.where(first == 0, 4, first)
    return np.maximum((np.asarray(last)[:, None] - first) // 4 + 1, 0)


def compress(panel: Panel, seasons: bool = False) -> Histories:
    """Group customers into distinct histories so that model work scales with patterns, not people.

    With ``seasons`` the histories keep what a seasonal model needs: each customer's
    quarter of the year and their purchases and mailed silent quarters by quarter of
    the year (more distinct histories: the same pattern in another season is another history).
    """
    phase = panel.first_quarter % 4 if seasons else None
    arrays = history_arrays(panel.purchased, panel.mailed, panel.n, phase)
    return compress_arrays(arrays)


def compress_both(panel: Panel) -> tuple[Histories, Histories]:
    """The histories without and with seasons (:func:`compress` twice), the statistics counted once."""
    arrays = history_arrays(panel.purchased, panel.mailed, panel.n, panel.first_quarter % 4)
    return compress_arrays({name: value for name, value in arrays.items() if name not in SEASONAL}), compress_arrays(arrays)


def compress_arrays(arrays: dict[str, np.ndarray]) -> Histories:
    """Distinct rows of the sufficient statistics, in order of first appearance, with counts and each row's history."""
    scalars = ["x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent"]
    seasonal = [name for name in SEASONAL if name in arrays]
    if len(arrays["x"]) == 0:
        empty = np.zeros(0, dtype=np.int64)
        extra = {name: np.asarray(arrays[name])[:0] for name in seasonal}
        return Histories(**{s: empty for s in scalars}, after_last=arrays["after_last"], count=empty, inverse=empty, **extra)
    # The statistics as 64-bit words: as many counts to a word as fit, then the mail flags, 64 to a word.
    counts = [np.asarray(arrays[s], dtype=np.int64) for s in scalars]
    for name in seasonal:
        values = np.asarray(arrays[name], dtype=np.int64)
        counts += [values] if values.ndim == 1 else list(values.T)
    bits = max(int(c.max()) for c in counts).bit_length() or 1
    if min(int(c.min()) for c in counts) >= 0:
        per_word = max(63 // bits, 1)
        words, widths = [], []
        for begin in range(0, len(counts), per_word):
            group = counts[begin : begin + per_word]
            word = np.zeros(len(counts[0]), dtype=np.int64)
            for position, count in enumerate(group):
                word |= count << (bits * position)
            words.append(word)
            widths.append(bits * len(group))
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
        **{name: np.asarray(arrays[name])[first] for name in seasonal},
    )


SEASONAL = ("phase", "season_x", "season_mailed_silent")
"""The statistics a seasonal model adds (see :class:`Histories`)."""


def mailed_silent_histories(x: np.ndarray, t_x: np.ndarray, silent: np.ndarray, phase: np.ndarray | None = None) -> Histories:
    """Histories of customers mailed every quarter: x repeat purchases, last in t_x, then ``silent`` mailed silent quarters.

    With ``phase`` (the quarter of the year of quarter 0) they carry the seasonal
    statistics too, the purchases taken in the x quarters up to t_x.
    """
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
    if phase is not None:
        phase = np.broadcast_to(np.asarray(phase, dtype=np.int64) % 4, x.shape).copy()
        arrays["phase"] = phase
        arrays["season_x"] = season_quarters(phase, t_x) - season_quarters(phase, t_x - x)
        arrays["season_mailed_silent"] = season_quarters(phase, t_x - x)
    return compress_arrays(arrays)
