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
from lapsewise.data.quarters import _day_numbers, as_of_quarter, check_latest_date, parse_as_of, quarter_end, quarter_index
from lapsewise.errors import InputError
from lapsewise.files.inputs import AMOUNT_COLUMN, BEFORE_ORDER_COLUMN, ID_COLUMN, MAIL_DATE_COLUMN, ORDER_DATE_COLUMN, Loaded


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
        1 when at least one piece was mailed in that quarter; in a quarter with a
        purchase, only a piece that arrived by the quarter's first order counts
        (see :func:`attach_mailings`). Column 0 and columns after the last observed
        quarter are 0. Without a mailings file every quarter 1..n is 1.
    mailing_history : bool
        True when a mailings file was given.
    fiscal_year_start : int
        Month (1-12) in which the first quarter of the year starts.
    counts : dict
        What was left out or repaired while loading and building the panel, ``{description: count}``.
    late_pieces : numpy.ndarray of int64
        The purchase quarters not counted as mailed because their only pieces
        arrived after the first order, as flat indices ``row * width + column``
        into the arrays above (sorted; empty when there were none). They were sent
        a piece all the same, which a randomised comparison counts (:meth:`sent_in`).
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
    late_pieces: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))

    def sent_in(self, column: np.ndarray) -> np.ndarray:
        """Whether each customer was sent a piece in their quarter ``column`` (one per row), whenever it arrived:
        mailed, or a purchase quarter whose only pieces came after its first order."""
        rows = np.arange(self.customers)
        sent = self.mailed[rows, column].astype(bool)
        width = self.mailed.shape[1]
        late_rows, late_columns = np.divmod(self.late_pieces, width)
        sent[late_rows[late_columns == column[late_rows]]] = True
        return sent

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
    in_home_days: int = 0,
) -> Panel:
    """Build the quarterly panel from loaded orders and (optionally) mailings.

    Orders are netted per customer and quarter; a quarter whose net spend is above
    zero is one purchase occasion, however many orders it holds. Orders after the
    as-of quarter, and customers whose first purchase comes after it, are left out
    and counted. Mailings for customers not in the orders are left out and counted.
    A quarter with a purchase counts as mailed only when a piece arrived by its
    first order (``in_home_days``: see :func:`attach_mailings`).
    """
    return attach_mailings(purchase_panel(orders, as_of, fiscal_year_start), mailings, in_home_days)


@dataclass(frozen=True)
class PurchasePanel:
    """The panel's purchase side, built from the orders alone (:func:`purchase_panel`), waiting for the mailings.

    ``fields`` are the :class:`Panel` fields the orders decide (all but ``mailed`` and
    ``mailing_history``); ``order_ids`` are the orders' id categories and
    ``row_of_code`` the panel row of each (-1 when the customer is left out), so that
    mailing rows map to panel rows through integer codes. ``first_order_day``
    (int32, shaped like ``purchased``) is the day number (days since 1970-01-01) of
    the earliest order with a positive amount in each purchase quarter; it is 0 in
    quarters without a purchase.
    """

    fields: dict
    order_ids: pd.Index
    row_of_code: np.ndarray
    first_order_day: np.ndarray


TIMING_COUNT = "purchase quarters whose only pieces arrived after the first order (not counted as mailed)"
"""The count of purchase quarters that a piece dated in them would mark mailed, were it not for its timing."""


def attach_mailings(purchases: PurchasePanel, mailings: Loaded | None, in_home_days: int = 0) -> Panel:
    """The panel with its mailed quarters: from the mailings, or every quarter after quarter 0 when there are none.

    A quarter without a purchase is mailed when any piece is dated in it. A quarter
    with a purchase is mailed only when a piece dated in it arrived by the quarter's
    first order, that is when its mail date is at least ``in_home_days`` days before
    the first order's date (with 0, a piece dated on the order's day counts): a piece
    that arrives after the order cannot have caused it, and counting it would credit
    the piece with a purchase made without it. Purchase quarters that lose their
    mailed flag this way are counted (:data:`TIMING_COUNT`). A customer-quarter
    table's mailings carry the answer in a column instead of dates (see
    :func:`lapsewise.files.inputs.load_quarterly`).
    """
    if in_home_days < 0:
        raise InputError(f"--in-home-days: {in_home_days} is below 0; give the days a piece takes to arrive, 0 or more")
    fields = purchases.fields
    first_quarter, end_quarter = fields["first_quarter"], fields["end_quarter"]
    width = fields["purchased"].shape[1]
    if mailings is None:
        columns = np.arange(width)[None, :]
        mailed = ((columns >= 1) & (columns <= (end_quarter - first_quarter)[:, None])).astype(np.uint8)
        return Panel(**fields, mailed=mailed, mailing_history=False)
    mailed, mail_counts, late_pieces = _mailed_quarters(
        mailings,
        purchases.order_ids,
        purchases.row_of_code,
        first_quarter,
        end_quarter,
        fields["purchased"],
        purchases.first_order_day,
        in_home_days,
        fields["fiscal_year_start"],
    )
    return Panel(**{**fields, "counts": {**fields["counts"], **mail_counts}}, mailed=mailed, mailing_history=True, late_pieces=late_pieces)


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
    dates = dates[keep]
    # Net spend per customer and quarter.
    base = quarters.min()
    span = end_quarter - base + 1
    cells, inverse = integer_codes(codes * span + (quarters - base), len(ids.categories) * span)
    net = np.bincount(inverse, weights=amounts, minlength=len(cells))
    cell_code = cells // span
    cell_quarter = cells % span + base
    bought = net > 0
    # The first order of each cell: the earliest order with a positive amount (a purchase cell has one, since its net is above 0).
    positive = amounts > 0
    first_day = np.full(len(cells), np.iinfo(np.int32).max, dtype=np.int32)
    np.minimum.at(first_day, inverse[positive], _day_numbers(dates[positive]).astype(np.int32))
    del dates, positive
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
    first_order_day = np.zeros((customers, width), dtype=np.int32)
    first_order_day.ravel()[flat] = first_day[bought][live]

    fields = {
        "customer_ids": customer_ids,
        "first_quarter": first_quarter,
        "end_quarter": int(end_quarter),
        "purchased": purchased,
        "spend": spend,
        "fiscal_year_start": fiscal_year_start,
        "counts": counts,
    }
    return PurchasePanel(fields, ids.categories, new_code, first_order_day)


def _mailed_quarters(
    mailings: Loaded,
    order_ids: pd.Index,
    order_new_code: np.ndarray,
    first_quarter: np.ndarray,
    end_quarter: int,
    purchased: np.ndarray,
    first_order_day: np.ndarray,
    in_home_days: int,
    fiscal_year_start: int,
) -> tuple[np.ndarray, dict[str, int], np.ndarray]:
    """Mark each customer-quarter in which a piece was mailed (in a purchase quarter: in time for the first order);
    also return the flat indices of the purchase quarters whose only pieces were late (:attr:`Panel.late_pieces`).

    The mailings' own id categories are looked up once in the orders' categories
    (whose hash table pandas already built), then every mailing row maps to its
    panel row through integer codes. A piece in a purchase quarter is in time when
    its day is at most the first order's day less ``in_home_days``; the quarter is
    mailed when any of its pieces is, which is when the earliest one is. Pieces
    mark their cells with 2 when late and then 1 when in time, so a cell left at 2
    had only late pieces: it is counted and cleared.
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
    dates = frame[MAIL_DATE_COLUMN].to_numpy()
    quarters = quarter_index(dates, fiscal_year_start)
    after = (quarters > end_quarter) & ~unknown
    if after.any():
        counts["mailing rows after the as-of quarter ignored"] = int(after.sum())
    # The customer-quarter table says whether each piece came before the order; raw mailings have their dates.
    in_time = frame[BEFORE_ORDER_COLUMN].to_numpy() if BEFORE_ORDER_COLUMN in frame.columns else None
    if unknown.any() or after.any():
        keep = ~unknown & ~after
        row, quarters, dates = row[keep], quarters[keep], dates[keep]
        in_time = None if in_time is None else in_time[keep]
    width = purchased.shape[1]
    column = quarters - first_quarter.astype(np.int32)[row]
    mailed = np.zeros((len(first_quarter), width), dtype=np.uint8)
    flat = row.astype(np.int32 if mailed.size < 2**31 else np.int64)
    flat *= width
    flat += column
    later = column >= 1
    flat = flat[later]
    in_purchase = purchased.ravel()[flat] != 0
    if in_time is None:
        late = np.zeros_like(in_purchase)
        late[in_purchase] = _day_numbers(dates[later][in_purchase]) > first_order_day.ravel()[flat[in_purchase]].astype(np.int64) - in_home_days
    else:
        late = in_purchase & ~in_time[later]
    mailed.ravel()[flat[late]] = 2
    mailed.ravel()[flat[~late]] = 1
    late_pieces = np.flatnonzero(mailed.ravel() == 2).astype(np.int64)
    if len(late_pieces):
        counts[TIMING_COUNT] = len(late_pieces)
    mailed &= 1
    return mailed, counts, late_pieces


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
        late_pieces=_late_pieces_of(panel, np.flatnonzero(keep), width, end_quarter),
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
        late_pieces=_late_pieces_of(panel, np.arange(panel.customers)[rows], panel.mailed.shape[1], panel.end_quarter),
    )


def _late_pieces_of(panel: Panel, rows: np.ndarray, width: int, end_quarter: int) -> np.ndarray:
    """:attr:`Panel.late_pieces` of the panel cut to ``rows`` (old row numbers, in their new order), ``width``
    columns and the as-of quarter ``end_quarter``."""
    old_rows, columns = np.divmod(panel.late_pieces, panel.mailed.shape[1])
    new_row = np.full(panel.customers, -1, dtype=np.int64)
    new_row[rows] = np.arange(len(rows))
    kept = (new_row[old_rows] >= 0) & (columns < width) & (panel.first_quarter[old_rows] + columns <= end_quarter)
    return np.sort(new_row[old_rows[kept]] * width + columns[kept])



def panel_from_files(
    orders_path: str,
    mailings_path: str | None = None,
    as_of: str | None = None,
    fiscal_year_start: int = 1,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
    in_home_days: int = 0,
    **reading_options,
) -> Panel:
    """Load the orders (and mailings) files and build the panel: the first two stages in one call.

    ``reading_options`` are the fields of :class:`~lapsewise.files.tables.Reading` (``delimiter``,
    ``encoding``, ``sheet``, ``decimal_comma``, ``date_format``), applied to both files.

    ``in_home_days`` is the days a piece takes to arrive: in a quarter with a purchase
    only a piece dated at least that many days before the first order counts
    (:func:`attach_mailings`).

    ``orders_path`` may instead be a customer-quarter table (customer_id, quarter,
    purchased, spend[, mailed[, mailed_before_order]]), recognised by its columns; it
    then stands for both orders and mailings, and its last quarter is the default
    as-of quarter. Its ``mailed_before_order`` column already settles the timing, so
    it takes no ``in_home_days``.
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
        if in_home_days:
            raise InputError(
                f"--in-home-days: {orders_path} is a customer-quarter table, whose mailed_before_order column settles the timing; "
                "subtract the in-home days where that column is computed and drop --in-home-days"
            )
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
    return attach_mailings(purchases, mailings, in_home_days)
