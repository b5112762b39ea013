"""Quarters: fiscal years, the default and explicit as-of quarter, dates with a time of day.

Quarter numbers are absolute: quarter ``q`` starts in month ``3q + fiscal_year_start - 1`` counted from
January of year 0. With calendar quarters, January 2023 is month 2023 * 12 = 24276, so the quarter
January-March 2023 is 24276 // 3 = 8092, April-June 8093, July-September 8094, October-December 8095.
"""

from __future__ import annotations

import datetime as dt

import pytest
from numpy.testing import assert_array_equal

from conftest import Q1_2023, orders_text, repair_count, row_of
from lapsewise.data.quarters import quarter_start
from lapsewise.errors import InputError
from lapsewise.files.inputs import load_orders


@pytest.mark.parametrize(
    "fiscal_year_start, end_quarter, quarter_of_year, as_of, purchased",
    [
        # Calendar: April-June 2023 is 8093, the second quarter of the year (8093 % 4 = 1).
        (1, 8093, 2, dt.date(2023, 6, 30), [1, 1]),
        # April start: April is month 24279, (24279 - 3) // 3 = 8092, the first fiscal quarter (8092 % 4 = 0).
        # The boundaries are the calendar ones shifted by a whole quarter, so March and April stay apart.
        (4, 8092, 1, dt.date(2023, 6, 30), [1, 1]),
        # July start: (24279 - 6) // 3 = 8091, the fourth fiscal quarter (8091 % 4 = 3) of the year from July 2022.
        (7, 8091, 4, dt.date(2023, 6, 30), [1, 1]),
        # February start: quarters run Feb-Apr, May-Jul, ...; March and April fall in one quarter,
        # (24279 - 1) // 3 = 8092, and the last one complete by 2023-06-30 ends on 2023-04-30.
        (2, 8092, 1, dt.date(2023, 4, 30), [1]),
    ],
)
def test_fiscal_year_start_decides_the_quarters(make_panel, fiscal_year_start, end_quarter, quarter_of_year, as_of, purchased):
    panel = make_panel(["A1,2023-03-15,10", "A1,2023-04-15,20"], as_of="2023-06-30", fiscal_year_start=fiscal_year_start)
    assert panel.end_quarter == end_quarter
    assert panel.end_quarter % 4 + 1 == quarter_of_year
    assert panel.as_of == as_of
    assert_array_equal(panel.purchased[0], purchased)
    # All 10 + 20 of spend is in the panel, split over one or two quarters.
    assert panel.spend.sum() == 30.0


def test_april_quarter_starts_in_april_whatever_the_fiscal_year(make_panel):
    # For starts 1, 4 and 7 the quarter holding 2023-04-15 begins on 2023-04-01; only its number changes.
    for fiscal_year_start in (1, 4, 7):
        panel = make_panel(["A1,2023-04-15,20"], as_of="2023-06-30", fiscal_year_start=fiscal_year_start)
        assert quarter_start(panel.first_quarter[0], fiscal_year_start) == dt.date(2023, 4, 1)


def test_fiscal_year_start_outside_1_to_12_is_refused(make_panel):
    with pytest.raises(InputError, match=r"--fiscal-year-start: 13 is not a month"):
        make_panel(["A1,2023-04-15,20"], fiscal_year_start=13)


def test_default_as_of_is_the_end_of_the_last_complete_quarter(make_panel):
    panel = make_panel(["A1,2023-01-10,10", "A1,2023-08-01,20", "B2,2023-11-20,5"])
    # The last order (2023-11-20) is in October-December, not complete: the as-of quarter is July-September.
    assert panel.end_quarter == Q1_2023 + 2
    assert panel.as_of == dt.date(2023, 9, 30)
    assert_array_equal(panel.purchased[row_of(panel, "A1")], [1, 0, 1])
    # B2's only order is the one left out, so B2 is left out too.
    assert panel.customer_ids.tolist() == ["A1"]
    assert repair_count(panel.counts, "orders after the as-of quarter") == 1
    assert repair_count(panel.counts, "customers whose first order is after the as-of quarter") == 1


def test_last_order_on_a_quarter_end_completes_that_quarter(make_panel):
    panel = make_panel(["A1,2023-01-10,10", "A1,2023-09-30,20"])
    # 2023-09-30 ends July-September, so that quarter counts and nothing is left out.
    assert panel.end_quarter == Q1_2023 + 2
    assert_array_equal(panel.purchased[0], [1, 0, 1])
    assert panel.counts == {}


AS_OF_ORDERS = ["A1,2023-01-10,10", "A1,2023-05-05,20", "A1,2023-07-20,30", "B2,2023-07-05,15"]


@pytest.mark.parametrize(
    "as_of, end_quarter, customers, orders_after, customers_after, a1_purchased",
    [
        # Mid-quarter: the last complete quarter is April-June; A1's July order and B2 (July only) are left out.
        ("2023-08-15", Q1_2023 + 1, ["A1"], 2, 1, [1, 1]),
        # A quarter end: July-September counts, so nothing is left out.
        ("2023-09-30", Q1_2023 + 2, ["A1", "B2"], 0, 0, [1, 1, 1]),
        # Past the last order: two silent quarters (October-December, January-March) are added.
        ("2024-03-31", Q1_2023 + 4, ["A1", "B2"], 0, 0, [1, 1, 1, 0, 0]),
    ],
)
def test_explicit_as_of(make_panel, as_of, end_quarter, customers, orders_after, customers_after, a1_purchased):
    panel = make_panel(AS_OF_ORDERS, as_of=as_of)
    assert panel.end_quarter == end_quarter
    assert panel.customer_ids.tolist() == customers
    assert_array_equal(panel.purchased[row_of(panel, "A1")], a1_purchased)
    assert repair_count(panel.counts, "orders after the as-of quarter") == orders_after
    assert repair_count(panel.counts, "customers whose first order is after the as-of quarter") == customers_after


def test_order_dates_with_a_time_fall_in_their_calendar_quarter(make_panel):
    panel = make_panel(["A1,2023-03-31T23:59:59,10", "A1,2023-04-01 00:00:01,20"], as_of="2023-06-30")
    # The last second of March is in January-March, the first second of April in April-June.
    assert_array_equal(panel.spend[0], [10, 20])


# ---------------------------------------------------------------- dates that cannot end the history


def test_an_order_dated_decades_ahead_is_refused_with_its_row(make_panel):
    # Without --as-of the latest order would set the as-of quarter: one typo would make every customer look silent.
    # With three orders the bulk is the second latest (2023-02-01): 2099-05-01 lies 305 quarters after it.
    with pytest.raises(InputError, match=r"row 4: the date 2099-05-01 is 305 quarters after nearly every other \(99.9% by 2023-02-01\)"):
        make_panel(["A1,2023-01-15,10", "B2,2023-02-01,5", "A1,2099-05-01,7"])
    # With --as-of it is simply after the as-of quarter: left out and counted, and counted as dated after today.
    panel = make_panel(["A1,2023-01-15,10", "B2,2023-02-01,5", "A1,2099-05-01,7"], as_of="2023-06-30")
    assert repair_count(panel.counts, "orders after the as-of quarter") == 1
    assert repair_count(panel.counts, "dated after today") == 1


def test_a_whole_history_ahead_of_the_clock_is_read(make_panel):
    # A simulated history (or a machine whose clock is behind) may run past today: not a stray, so it is read.
    rows = [f"C{i},2031-{i % 12 + 1:02d}-10,10" for i in range(200)] + ["C1,2032-02-10,10"]
    panel = make_panel(rows)
    assert repair_count(panel.counts, "dated after today") == 201


def test_a_stray_order_years_after_the_rest_is_refused_with_its_row(make_panel):
    # 2,000 orders in 2021 and one in 2025: from the fourth quarter of 2021 to the first of 2025 is 13 quarters.
    rows = [f"C{i},2021-{i % 12 + 1:02d}-10,10" for i in range(2_000)] + ["Z9,2025-03-31,4"]
    with pytest.raises(InputError, match=r"row 2002: the date 2025-03-31 is 13 quarters after nearly every other \(99.9% by 2021-12-10\)"):
        make_panel(rows)


def test_dates_with_a_time_zone_keep_their_own_calendar_day(write_file, tmp_path):
    # An order at 01:00 on 1 January in Tokyo (+09:00) is a January order, in the first quarter, whatever UTC says.
    loaded = load_orders(write_file("orders.csv", orders_text("A1,2023-01-01T01:00+09:00,10", "A1,2023-04-02T23:30-05:00,10")))
    assert [str(d) for d in loaded.frame["order_date"]] == ["2023-01-01 01:00:00", "2023-04-02 23:30:00"]
    import pandas as pd

    aware = pd.DataFrame(
        {"customer_id": ["A1"], "order_date": pd.to_datetime(["2023-01-01 01:00"]).tz_localize("Asia/Tokyo"), "amount": [10.0]}
    )
    aware.to_parquet(tmp_path / "orders.parquet", index=False)
    assert str(load_orders(tmp_path / "orders.parquet").frame["order_date"][0]) == "2023-01-01 01:00:00"
