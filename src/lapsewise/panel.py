"""The quarterly customer panel, per-customer summaries, and compression into distinct histories.

A customer's quarter 0 is the quarter of their first purchase. For every later
quarter up to the as-of quarter the panel holds whether they purchased (net
spend above zero), their net spend, and whether they were mailed. The panel is
held as dense customer-by-quarter arrays, aligned on each customer's quarter 0,
so that every per-customer quantity is one numpy reduction along a row.

Quarters are numbered on one absolute scale: quarter ``q`` starts in month
``3 * q + fiscal_year_start - 1`` counted from January of year 0, so calendar
quarters (``fiscal_year_start = 1``) start in January, April, July and October.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from lapsewise.errors import InputError
from lapsewise.load import AMOUNT_COLUMN, ID_COLUMN, MAIL_DATE_COLUMN, ORDER_DATE_COLUMN, Loaded


@dataclass(frozen=True)
class Panel:
    """Quarterly purchase and mailing histories, one row per customer.

    Attributes
    ----------
    customer_ids : numpy.ndarray of str
        Sorted customer ids.
    first_quarter : numpy.ndarray of int64
        Absolute index of each customer's quarter 0 (the first purchase).
    end_quarter : int
        Absolute index of the as-of quarter, the last complete quarter observed.
    purchased : numpy.ndarray of uint8, shape (customers, width)
        Column ``j`` is the customer's quarter ``j``; 1 when net spend was above zero.
        Columns after the customer's last observed quarter are 0.
    spend : numpy.ndarray of float32, shape (customers, width)
        Net spend per quarter (returns netted), 0 where there was no purchase.
    mailed : numpy.ndarray of uint8, shape (customers, width)
        1 when at least one piece was mailed in that quarter; column 0 and columns
        after the last observed quarter are 0. Without a mailings file every
        quarter 1..n is 1.
    mailing_history : bool
        True when a mailings file was given.
    fiscal_year_start : int
        Month (1-12) in which the first quarter of the year starts.
    counts : dict
        What was left out or repaired while loading and building the panel, ``{description: count}``.
    """

    customer_ids: np.ndarray
    first_quarter: np.ndarray
    end_quarter: int
    purchased: np.ndarray
    spend: np.ndarray
    mailed: np.ndarray
    mailing_history: bool
    fiscal_year_start: int = 1
    counts: dict[str, int] = field(default_factory=dict)

    @property
    def n(self) -> np.ndarray:
        """Quarters observed after quarter 0, per customer."""
        return self.end_quarter - self.first_quarter

    @property
    def customers(self) -> int:
        return len(self.customer_ids)

    @property
    def as_of(self) -> dt.date:
        """The last day of the as-of quarter."""
        return quarter_end(self.end_quarter, self.fiscal_year_start)


# ---------------------------------------------------------------- quarters

MAX_QUARTERS = 400  # a century of quarters: the panel is customers x quarters, so this bounds its memory


_PER_DAY = {"h": 24, "m": 24 * 60, "s": 86_400, "ms": 86_400_000, "us": 86_400_000_000, "ns": 86_400_000_000_000}


def _day_numbers(dates: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of a datetime64 array (an integer division for units finer than a day)."""
    unit, count = np.datetime_data(dates.dtype)
    if unit in _PER_DAY and _PER_DAY[unit] % count == 0:
        return dates.view(np.int64) // (_PER_DAY[unit] // count)
    return dates.astype("datetime64[D]").astype(np.int64)


def quarter_index(dates: np.ndarray, fiscal_year_start: int = 1) -> np.ndarray:
    """Absolute quarter index (int32) of each date (datetime64 array).

    Calendar arithmetic is done once per distinct day in the dates' range (a
    lookup table), not once per date: millions of dates span a few thousand days.
    """
    dates = np.asarray(dates)
    if dates.size == 0:
        return np.zeros(0, dtype=np.int32)
    days = _day_numbers(dates)
    low, high = int(days.min()), int(days.max())
    if high - low < 1_000_000:  # under about 2,700 years of days
        calendar = np.arange(low, high + 1).astype("datetime64[D]")
        table = _quarter_of_month(calendar.astype("datetime64[M]").astype(np.int64), fiscal_year_start)
        days -= low
        return table[days]
    return _quarter_of_month(dates.astype("datetime64[M]").astype(np.int64), fiscal_year_start)


def _quarter_of_month(months_since_1970: np.ndarray, fiscal_year_start: int) -> np.ndarray:
    months = months_since_1970 + 1970 * 12  # months since January of year 0
    return ((months - (fiscal_year_start - 1)) // 3).astype(np.int32)  # quarter numbers are small: 32 bits halve the traffic


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


def quarter_start(quarter: int, fiscal_year_start: int = 1) -> dt.date:
    month = 3 * int(quarter) + fiscal_year_start - 1
    return dt.date(month // 12, month % 12 + 1, 1)


def quarter_end(quarter: int, fiscal_year_start: int = 1) -> dt.date:
    return quarter_start(quarter + 1, fiscal_year_start) - dt.timedelta(days=1)


def quarter_label(quarter: int, fiscal_year_start: int = 1) -> str:
    """A quarter named by its dates, e.g. ``2024-04-01..2024-06-30``."""
    return f"{quarter_start(quarter, fiscal_year_start)}..{quarter_end(quarter, fiscal_year_start)}"


def parse_as_of(text: str | None) -> dt.date | None:
    """Parse the ``--as-of`` option (YYYY-MM-DD)."""
    if text is None:
        return None
    try:
        return dt.date.fromisoformat(str(text).strip())
    except ValueError:
        raise InputError(f"--as-of: '{text}' is not a date; write it as YYYY-MM-DD") from None


def _end_quarter(name: str, order_dates: np.ndarray, as_of: dt.date | None, fiscal_year_start: int) -> int:
    """The last complete quarter on or before the as-of date (default: the last order date)."""
    first = pd.Timestamp(order_dates.min()).date()
    given = as_of is not None
    if as_of is None:
        as_of = pd.Timestamp(order_dates.max()).date()
    elif as_of < first:
        raise InputError(f"--as-of {as_of} is before the first order in {name} ({first}); choose a later date")
    elif as_of > pd.Timestamp.max.date():
        raise InputError(f"--as-of {as_of} is after {pd.Timestamp.max.year - 1}; choose an earlier date")
    quarter = int(quarter_index(np.array([np.datetime64(as_of, "D")]), fiscal_year_start)[0])
    if quarter_end(quarter, fiscal_year_start) != as_of:
        quarter -= 1
    first_quarter = int(quarter_index(np.array([np.datetime64(first, "D")]), fiscal_year_start)[0])
    if quarter < first_quarter and given:
        raise InputError(
            f"--as-of {as_of}: no complete quarter of orders in {name} ends by then (first order {first}); choose a later date"
        )
    if quarter < first_quarter:
        raise InputError(
            f"{name}: every order falls in one quarter that is not complete ({first} to {as_of}); "
            f"pass --as-of {quarter_end(first_quarter, fiscal_year_start)} to count that quarter as complete"
        )
    if quarter - first_quarter + 1 > MAX_QUARTERS:
        raise InputError(
            f"--as-of {as_of}: spans {quarter - first_quarter + 1} quarters from the first order in {name} ({first}); "
            f"lapsewise handles up to {MAX_QUARTERS} quarters, so choose an earlier date or drop the oldest orders"
        )
    return quarter


# ---------------------------------------------------------------- building the panel


def build_panel(
    orders: Loaded,
    mailings: Loaded | None = None,
    as_of: dt.date | None = None,
    fiscal_year_start: int = 1,
) -> Panel:
    """Build the quarterly panel from loaded orders and (optionally) mailings.

    Orders are netted per customer and quarter; a quarter whose net spend is above
    zero is one purchase occasion, however many orders it holds. Orders after the
    as-of quarter, and customers whose first purchase comes after it, are left out
    and counted. Mailings for customers not in the orders are left out and counted.
    """
    return attach_mailings(purchase_panel(orders, as_of, fiscal_year_start), mailings)


@dataclass(frozen=True)
class PurchasePanel:
    """The panel's purchase side, built from the orders alone (:func:`purchase_panel`), waiting for the mailings.

    ``fields`` are the :class:`Panel` fields the orders decide (all but ``mailed`` and
    ``mailing_history``); ``order_ids`` are the orders' id categories and
    ``row_of_code`` the panel row of each (-1 when the customer is left out), so that
    mailing rows map to panel rows through integer codes.
    """

    fields: dict
    order_ids: pd.Index
    row_of_code: np.ndarray


def attach_mailings(purchases: PurchasePanel, mailings: Loaded | None) -> Panel:
    """The panel with its mailed quarters: from the mailings, or every quarter after quarter 0 when there are none."""
    fields = purchases.fields
    first_quarter, end_quarter = fields["first_quarter"], fields["end_quarter"]
    width = fields["purchased"].shape[1]
    if mailings is None:
        columns = np.arange(width)[None, :]
        mailed = ((columns >= 1) & (columns <= (end_quarter - first_quarter)[:, None])).astype(np.uint8)
        return Panel(**fields, mailed=mailed, mailing_history=False)
    mailed, mail_counts = _mailed_quarters(
        mailings, purchases.order_ids, purchases.row_of_code, first_quarter, end_quarter, width, fields["fiscal_year_start"]
    )
    return Panel(**{**fields, "counts": {**fields["counts"], **mail_counts}}, mailed=mailed, mailing_history=True)


def purchase_panel(orders: Loaded, as_of: dt.date | None = None, fiscal_year_start: int = 1) -> PurchasePanel:
    """The purchase side of :func:`build_panel`: everything the orders alone decide."""
    if not 1 <= fiscal_year_start <= 12:
        raise InputError(f"--fiscal-year-start: {fiscal_year_start} is not a month; give 1 to 12")
    counts = dict(orders.repairs)
    frame = orders.frame
    dates = frame[ORDER_DATE_COLUMN].to_numpy()
    end_quarter = _end_quarter(orders.name, dates, as_of, fiscal_year_start)
    quarters = quarter_index(dates, fiscal_year_start)
    ids = frame[ID_COLUMN].array
    codes = np.asarray(ids.codes, dtype=np.int64)
    late = quarters > end_quarter
    if late.any():
        counts["orders after the as-of quarter left out"] = int(late.sum())
    early_customers = np.zeros(len(ids.categories), dtype=bool)
    early_customers[codes[~late]] = True
    all_customers = np.zeros(len(ids.categories), dtype=bool)
    all_customers[codes] = True
    new_after = int((all_customers & ~early_customers).sum())
    if new_after:
        counts["customers whose first order is after the as-of quarter left out"] = new_after

    keep = ~late
    codes, quarters, amounts = codes[keep], quarters[keep], frame[AMOUNT_COLUMN].to_numpy()[keep]
    # Net spend per customer and quarter.
    base = quarters.min()
    span = end_quarter - base + 1
    cells, inverse = integer_codes(codes * span + (quarters - base), len(ids.categories) * span)
    net = np.bincount(inverse, weights=amounts, minlength=len(cells))
    cell_code = cells // span
    cell_quarter = cells % span + base
    bought = net > 0
    netted_out = int((~bought).sum())
    if netted_out:
        counts["customer-quarters whose returns netted spend to zero or below (not purchases)"] = netted_out

    # Quarter 0: the first quarter with a purchase.
    first_by_code = np.full(len(ids.categories), np.iinfo(np.int64).max)
    np.minimum.at(first_by_code, cell_code[bought], cell_quarter[bought])
    has_purchase = first_by_code != np.iinfo(np.int64).max
    never = int((early_customers & ~has_purchase).sum())
    if never:
        counts["customers with no quarter of positive net spend left out"] = never
    if not has_purchase.any():
        raise InputError(f"{orders.name}: no customer has a quarter with positive net spend by the as-of date; check the amounts")

    category_text = np.asarray(ids.categories).astype(str)
    kept_codes = np.flatnonzero(has_purchase)
    order = np.argsort(category_text[kept_codes], kind="stable")
    kept_codes = kept_codes[order]
    new_code = np.full(len(ids.categories), -1, dtype=np.int64)
    new_code[kept_codes] = np.arange(len(kept_codes))
    customer_ids = category_text[kept_codes]
    first_quarter = first_by_code[kept_codes]
    width = int(end_quarter - first_quarter.min() + 1)

    customers = len(customer_ids)
    purchased = np.zeros((customers, width), dtype=np.uint8)
    spend = np.zeros((customers, width), dtype=np.float32)
    row = new_code[cell_code[bought]]
    live = row >= 0
    row = row[live]
    flat = row * width + (cell_quarter[bought][live] - first_quarter[row])
    purchased.ravel()[flat] = 1
    spend.ravel()[flat] = net[bought][live]

    fields = {
        "customer_ids": customer_ids,
        "first_quarter": first_quarter,
        "end_quarter": int(end_quarter),
        "purchased": purchased,
        "spend": spend,
        "fiscal_year_start": fiscal_year_start,
        "counts": counts,
    }
    return PurchasePanel(fields, ids.categories, new_code)


def _mailed_quarters(
    mailings: Loaded,
    order_ids: pd.Index,
    order_new_code: np.ndarray,
    first_quarter: np.ndarray,
    end_quarter: int,
    width: int,
    fiscal_year_start: int,
) -> tuple[np.ndarray, dict[str, int]]:
    """Mark each customer-quarter in which at least one piece was mailed.

    The mailings' own id categories are looked up once in the orders' categories
    (whose hash table pandas already built), then every mailing row maps to its
    panel row through integer codes.
    """
    counts = {f"mailings file: {k}": v for k, v in mailings.repairs.items()}
    frame = mailings.frame
    ids = frame[ID_COLUMN].array
    position = order_ids.get_indexer(ids.categories)
    lookup = np.where(position >= 0, order_new_code[position], -1).astype(np.int32)
    row = lookup[np.asarray(ids.codes)]
    unknown = row < 0
    if unknown.any():
        counts["mailing rows for customers not in the orders left out"] = int(unknown.sum())
    quarters = quarter_index(frame[MAIL_DATE_COLUMN].to_numpy(), fiscal_year_start)
    after = (quarters > end_quarter) & ~unknown
    if after.any():
        counts["mailing rows after the as-of quarter ignored"] = int(after.sum())
    if unknown.any() or after.any():
        keep = ~unknown & ~after
        row, quarters = row[keep], quarters[keep]
    column = quarters - first_quarter.astype(np.int32)[row]
    mailed = np.zeros((len(first_quarter), width), dtype=np.uint8)
    flat = row.astype(np.int32 if mailed.size < 2**31 else np.int64)
    flat *= width
    flat += column
    mailed.ravel()[flat[column >= 1]] = 1
    return mailed, counts


# ---------------------------------------------------------------- per-customer summary


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


def truncate(panel: Panel, end_quarter: int) -> Panel:
    """The panel as it stood at an earlier as-of quarter: later quarters blanked, later customers dropped."""
    keep = panel.first_quarter <= end_quarter
    first = panel.first_quarter[keep]
    width = int(end_quarter - first.min() + 1)
    columns = np.arange(width)[None, :]
    inside = columns <= (end_quarter - first)[:, None]
    return Panel(
        customer_ids=panel.customer_ids[keep],
        first_quarter=first,
        end_quarter=int(end_quarter),
        purchased=panel.purchased[keep, :width] * inside,
        spend=panel.spend[keep, :width] * inside,
        mailed=panel.mailed[keep, :width] * inside,
        mailing_history=panel.mailing_history,
        fiscal_year_start=panel.fiscal_year_start,
        counts=dict(panel.counts),
    )


def select(panel: Panel, rows: np.ndarray) -> Panel:
    """The panel restricted to some customers (a boolean mask or row indices), in their order."""
    return Panel(
        customer_ids=panel.customer_ids[rows],
        first_quarter=panel.first_quarter[rows],
        end_quarter=panel.end_quarter,
        purchased=panel.purchased[rows],
        spend=panel.spend[rows],
        mailed=panel.mailed[rows],
        mailing_history=panel.mailing_history,
        fiscal_year_start=panel.fiscal_year_start,
        counts=dict(panel.counts),
    )


# ---------------------------------------------------------------- distinct histories


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


def panel_from_files(
    orders_path: str,
    mailings_path: str | None = None,
    as_of: str | None = None,
    fiscal_year_start: int = 1,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
) -> Panel:
    """Load the orders (and mailings) files and build the panel: the first two stages in one call.

    ``orders_path`` may instead be a customer-quarter table (customer_id, quarter,
    purchased, spend[, mailed]), recognised by its columns; it then stands for both
    orders and mailings, and its last quarter is the default as-of quarter.
    """
    from lapsewise.load import is_quarterly_table, load_orders_and_mailings, load_quarterly

    as_of_date = parse_as_of(as_of)
    if is_quarterly_table(orders_path):
        if mailings_path:
            raise InputError(f"{orders_path}: is a customer-quarter table, which already says which quarters were mailed; drop --mailings")
        orders, mailings = load_quarterly(orders_path, id_column)
        if as_of_date is None:
            last = int(quarter_index(orders.frame[ORDER_DATE_COLUMN].to_numpy(), fiscal_year_start).max())
            if mailings is not None and len(mailings.frame):
                last = max(last, int(quarter_index(mailings.frame[MAIL_DATE_COLUMN].to_numpy(), fiscal_year_start).max()))
            as_of_date = quarter_end(last, fiscal_year_start)
        return build_panel(orders, mailings, as_of_date, fiscal_year_start)
    # The purchase side of the panel is built from the orders while the (larger) mailings file is still loading.
    purchases, mailings = load_orders_and_mailings(
        orders_path, mailings_path, id_column, date_column, amount_column, then=lambda orders: purchase_panel(orders, as_of_date, fiscal_year_start)
    )
    return attach_mailings(purchases, mailings)
