"""The quarterly customer panel: purchases, spend and mailings per customer and quarter.

A customer's quarter 0 is the quarter of their first purchase. For every later
quarter up to the as-of quarter the panel holds whether they purchased (net
spend above zero), their net spend, and whether they were mailed. The panel is
held as dense customer-by-quarter arrays, aligned on each customer's quarter 0,
so that every per-customer quantity is one numpy reduction along a row.
Quarter numbers are those of :mod:`lapsewise.data.quarters`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from lapsewise.data.codes import integer_codes
from lapsewise.data.quarters import as_of_quarter, check_latest_date, parse_as_of, quarter_end, quarter_index
from lapsewise.errors import InputError
from lapsewise.files.inputs import AMOUNT_COLUMN, ID_COLUMN, MAIL_DATE_COLUMN, ORDER_DATE_COLUMN, Loaded


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
    end_quarter = as_of_quarter(orders.name, dates, as_of, fiscal_year_start, orders.row_label)
    quarters = quarter_index(dates, fiscal_year_start)
    ids = frame[ID_COLUMN].array
    codes = np.asarray(ids.codes, dtype=np.int64)
    late = quarters > end_quarter
    if late.any():
        counts["orders after the as-of quarter left out"] = int(late.sum())
    future = dates > np.datetime64(dt.date.today())
    if future.any():
        counts["orders dated after today (check the export's dates)"] = int(future.sum())
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



def panel_from_files(
    orders_path: str,
    mailings_path: str | None = None,
    as_of: str | None = None,
    fiscal_year_start: int = 1,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
    **reading_options,
) -> Panel:
    """Load the orders (and mailings) files and build the panel: the first two stages in one call.

    ``reading_options`` are the fields of :class:`~lapsewise.files.tables.Reading` (``delimiter``,
    ``encoding``, ``sheet``, ``decimal_comma``, ``date_format``), applied to both files.

    ``orders_path`` may instead be a customer-quarter table (customer_id, quarter,
    purchased, spend[, mailed]), recognised by its columns; it then stands for both
    orders and mailings, and its last quarter is the default as-of quarter.
    """
    from lapsewise.files.inputs import (
        is_quarterly_table,
        load_orders_and_mailings,
        load_quarterly,
    )
    from lapsewise.files.tables import Reading

    reading = Reading(**reading_options)

    as_of_date = parse_as_of(as_of)
    if is_quarterly_table(orders_path, reading):
        if mailings_path:
            raise InputError(f"{orders_path}: is a customer-quarter table, which already says which quarters were mailed; drop --mailings")
        orders, mailings = load_quarterly(orders_path, id_column, reading)
        if as_of_date is None:
            dates = orders.frame[ORDER_DATE_COLUMN].to_numpy()
            check_latest_date(orders.name, dates, orders.row_label)
            last = int(quarter_index(dates, fiscal_year_start).max())
            if mailings is not None and len(mailings.frame):
                mail_dates = mailings.frame[MAIL_DATE_COLUMN].to_numpy()
                check_latest_date(mailings.name, mail_dates, mailings.row_label)
                last = max(last, int(quarter_index(mail_dates, fiscal_year_start).max()))
            as_of_date = quarter_end(last, fiscal_year_start)
        return build_panel(orders, mailings, as_of_date, fiscal_year_start)
    # The purchase side of the panel is built from the orders while the (larger) mailings file is still loading.
    purchases, mailings = load_orders_and_mailings(
        orders_path, mailings_path, id_column, date_column, amount_column, then=lambda orders: purchase_panel(orders, as_of_date, fiscal_year_start),
        reading=reading,
    )
    return attach_mailings(purchases, mailings)
