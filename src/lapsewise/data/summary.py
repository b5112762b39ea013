"""Per-customer recency and frequency, the bands they fall in, and the customer base as a table."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from lapsewise.data.panel import Panel


@dataclass(frozen=True)
class CustomerSummary:
    """Per-customer recency-frequency quantities at the panel's as-of quarter.

    Attributes
    ----------
    x : repeat purchase quarters (purchases after quarter 0)
    t_x : quarter of the last purchase (0 for one-time buyers)
    n : quarters observed after quarter 0
    silent_quarters : ``n - t_x``
    mean_repeat_value : mean net spend over repeat purchase quarters (NaN when x = 0)
    mean_order_value : mean net spend over all purchase quarters, quarter 0 included
    mailed_since_last : mailed quarters after the last purchase
    """

    x: np.ndarray
    t_x: np.ndarray
    n: np.ndarray
    silent_quarters: np.ndarray
    mean_repeat_value: np.ndarray
    mean_order_value: np.ndarray
    mailed_since_last: np.ndarray


def last_purchase_quarter(purchased: np.ndarray) -> np.ndarray:
    """Index of the last 1 in each row (0 when the only purchase is quarter 0)."""
    width = purchased.shape[1]
    return (width - 1 - np.argmax(purchased[:, ::-1], axis=1)).astype(np.int64)


def summarize(panel: Panel) -> CustomerSummary:
    """Per-customer x, t_x, n, silent quarters, order values and mailed quarters since the last purchase."""
    purchased = panel.purchased
    x = purchased[:, 1:].sum(axis=1, dtype=np.int64)
    t_x = last_purchase_quarter(purchased)
    n = panel.n
    total = panel.spend.sum(axis=1, dtype=np.float64)
    first_spend = panel.spend[:, 0].astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_repeat = np.where(x > 0, (total - first_spend) / np.maximum(x, 1), np.nan)
        mean_order = total / (x + 1)
    columns = np.arange(purchased.shape[1])[None, :]
    after_last = (columns > t_x[:, None]) & (columns <= n[:, None])
    mailed_since = (panel.mailed.astype(bool) & after_last).sum(axis=1)
    return CustomerSummary(
        x=x,
        t_x=t_x,
        n=n,
        silent_quarters=n - t_x,
        mean_repeat_value=mean_repeat,
        mean_order_value=mean_order,
        mailed_since_last=mailed_since.astype(np.int64),
    )



# ---------------------------------------------------------------- bands and the base table

DEFAULT_FREQUENCY_BANDS = (0, 1, 2, 3, 5, 9)
DEFAULT_SILENT_BANDS = (0, 1, 2, 3, 5, 9)


def band_labels(lower_bounds: tuple[int, ...] | list[int]) -> list[str]:
    """Labels for integer bands given their lower bounds: (0, 1, 3) -> ['0', '1-2', '3+']."""
    labels = []
    for i, low in enumerate(lower_bounds):
        if i + 1 < len(lower_bounds):
            high = lower_bounds[i + 1] - 1
            labels.append(str(low) if high == low else f"{low}-{high}")
        else:
            labels.append(f"{low}+")
    return labels


def band_of(values: np.ndarray, lower_bounds: tuple[int, ...] | list[int]) -> np.ndarray:
    """Index of the band each value falls in (values below the first bound go to band 0)."""
    return np.maximum(np.searchsorted(np.asarray(lower_bounds), values, side="right") - 1, 0)


def base_table(
    summary: CustomerSummary,
    frequency_bands: tuple[int, ...] = DEFAULT_FREQUENCY_BANDS,
    silent_bands: tuple[int, ...] = DEFAULT_SILENT_BANDS,
) -> pd.DataFrame:
    """Customers and mean order value by frequency band and silent-quarter band (long format)."""
    frequency = band_of(summary.x, frequency_bands)
    silent = band_of(summary.silent_quarters, silent_bands)
    frame = pd.DataFrame({"frequency": frequency, "silent": silent, "value": summary.mean_order_value})
    grouped = frame.groupby(["frequency", "silent"]).agg(customers=("value", "size"), mean_order_value=("value", "mean"))
    full = pd.MultiIndex.from_product([range(len(frequency_bands)), range(len(silent_bands))], names=["frequency", "silent"])
    grouped = grouped.reindex(full).reset_index()
    grouped["customers"] = grouped["customers"].fillna(0).astype(np.int64)
    grouped["frequency_band"] = np.asarray(band_labels(frequency_bands))[grouped["frequency"]]
    grouped["silent_band"] = np.asarray(band_labels(silent_bands))[grouped["silent"]]
    return grouped[["frequency_band", "silent_band", "customers", "mean_order_value"]]


@dataclass(frozen=True)
class BaseDescription:
    """The customer base at a glance: the frequency x silent-quarter table and the shares a reader asks about first.

    ``cells`` is :func:`base_table`'s frame; ``one_time_share`` the share of customers
    with no repeat purchase; ``lapsed_share`` the share silent for ``lapsed_after``
    quarters or more; ``first_quarter`` the earliest quarter 0.
    """

    customers: int
    cells: pd.DataFrame
    one_time_share: float
    lapsed_share: float
    lapsed_after: int
    first_quarter: int


def describe_base(panel: Panel, lapsed_after: int = 4) -> BaseDescription:
    """The :class:`BaseDescription` of a panel."""
    summary = summarize(panel)
    customers = max(panel.customers, 1)
    return BaseDescription(
        customers=panel.customers,
        cells=base_table(summary),
        one_time_share=float((summary.x == 0).sum()) / customers,
        lapsed_share=float((summary.silent_quarters >= lapsed_after).sum()) / customers,
        lapsed_after=lapsed_after,
        first_quarter=int(panel.first_quarter.min()),
    )
