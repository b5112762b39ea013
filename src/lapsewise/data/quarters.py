"""Quarters: dates to quarter numbers, quarter numbers to dates, and the as-of quarter.

Quarters are numbered on one absolute scale: quarter ``q`` starts in month
``3 * q + fiscal_year_start - 1`` counted from January of year 0, so calendar
quarters (``fiscal_year_start = 1``) start in January, April, July and October.
The quarter of the (fiscal) year of quarter ``q`` is ``q % 4`` (0 for the first).
"""

from __future__ import annotations

import datetime as dt
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.errors import InputError

MAX_QUARTERS = 120  # thirty years of quarters: the panel is customers x quarters and the stop-rule program grows with the history too


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


STRAY_QUARTERS = 4
"""An order more than this many quarters after nearly all others (99.9%) is taken for a mistyped date."""


def check_latest_date(name: str, dates: np.ndarray, row_of: Callable[[int], int] = lambda index: index + 2) -> dt.date:
    """The latest date, refused when it is a stray far past the rest: more than ``STRAY_QUARTERS`` quarters after 99.9%.

    Without ``--as-of`` the latest order sets the as-of quarter, so one mistyped year
    (2099 for 2019) would make every customer look silent for decades. The bulk is the
    date below which 99.9% of the others lie (for a few rows, the second latest), so a
    single stray cannot hide itself. ``row_of`` turns an index of ``dates`` into the row
    number the file shows. Dates after today are not refused by themselves (a history may
    be simulated, or run ahead of this machine's clock); the panel counts them.
    """
    last = int(np.argmax(dates))
    latest = pd.Timestamp(dates[last]).date()
    days = dates.astype("datetime64[D]").astype(np.int64)
    bulk = dt.date(1970, 1, 1) + dt.timedelta(days=int(np.quantile(days, 0.999, method="lower")))
    gap = (latest.year - bulk.year) * 4 + (latest.month - 1) // 3 - (bulk.month - 1) // 3
    if gap > STRAY_QUARTERS:
        raise InputError(
            f"{name}, row {row_of(last)}: the date {latest} is {gap} quarters after nearly every other (99.9% by {bulk}); "
            "fix the date, or pass --as-of to set the last day used (later orders are then left out and counted)"
        )
    return latest


def as_of_quarter(name: str, order_dates: np.ndarray, as_of: dt.date | None, fiscal_year_start: int, row_of: Callable[[int], int] = lambda index: index + 2) -> int:
    """The last complete quarter on or before the as-of date (default: the last order date, checked by :func:`check_latest_date`)."""
    first = pd.Timestamp(order_dates.min()).date()
    given = as_of is not None
    if as_of is None:
        as_of = check_latest_date(name, order_dates, row_of)
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
