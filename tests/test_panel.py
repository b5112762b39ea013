"""Panel arithmetic on small hand-made histories.

Quarter numbers are absolute: quarter ``q`` starts in month ``3q + fiscal_year_start - 1`` counted from
January of year 0. With calendar quarters, January 2023 is month 2023 * 12 = 24276, so the quarter
January-March 2023 is 24276 // 3 = 8092, April-June 8093, July-September 8094, October-December 8095.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from conftest import mailings_text, orders_text, repair_count
from lapsewise.errors import InputError
from lapsewise.load import load_mailings, load_orders
from lapsewise.panel import build_panel, compress, compress_arrays, history_arrays, integer_codes, parse_as_of, quarter_start, summarize, truncate

Q1_2023 = 8092  # January-March 2023, see the module docstring


@pytest.fixture
def make_panel(write_file):
    """Build a panel from order rows (and mailing rows, when given) written as CSV files."""

    def make(orders, mailings=None, as_of=None, fiscal_year_start=1):
        loaded = load_orders(write_file("orders.csv", orders_text(*orders)))
        mailed = load_mailings(write_file("mailings.csv", mailings_text(*mailings))) if mailings is not None else None
        return build_panel(loaded, mailed, parse_as_of(as_of), fiscal_year_start)

    return make


def row_of(panel, customer_id: str) -> int:
    return int(np.flatnonzero(panel.customer_ids == customer_id)[0])


# ---------------------------------------------------------------- netting and purchase occasions


def test_returns_are_netted_into_their_quarter(make_panel):
    panel = make_panel(
        [
            "A1,2023-01-10,50",
            "A1,2023-04-05,30",
            "A1,2023-05-20,-30",
            "A1,2023-08-01,40",
            "A1,2023-08-15,-10",
        ],
        as_of="2023-12-31",
    )
    a1 = row_of(panel, "A1")
    # Q1: 50; Q2: 30 - 30 = 0, not a purchase; Q3: 40 - 10 = 30, a purchase; Q4: nothing.
    assert_array_equal(panel.purchased[a1], [1, 0, 1, 0])
    assert_array_equal(panel.spend[a1], [50, 0, 30, 0])
    # Two negative rows; one customer-quarter (Q2) netted to zero.
    assert repair_count(panel.counts, "return rows") == 2
    assert repair_count(panel.counts, "netted spend to zero or below") == 1


def test_quarter_with_negative_net_spend_is_not_a_purchase(make_panel):
    panel = make_panel(
        [
            "A1,2023-01-10,10",
            "B2,2023-02-01,20",
            "B2,2023-03-01,-25",
            "B2,2023-07-01,15",
            "G7,2023-02-01,10",
            "G7,2023-02-20,-10",
        ],
        as_of="2023-12-31",
    )
    # G7 nets to 10 - 10 = 0 in its only quarter: never a purchase, so not a customer.
    assert panel.customer_ids.tolist() == ["A1", "B2"]
    assert repair_count(panel.counts, "no quarter of positive net spend") == 1
    # B2's Q1 nets to 20 - 25 = -5, so its quarter 0 is July-September (8094) and one quarter follows.
    b2 = row_of(panel, "B2")
    assert panel.first_quarter[b2] == Q1_2023 + 2
    assert panel.n[b2] == 1
    assert_array_equal(panel.spend[b2], [15, 0, 0, 0])
    # Two customer-quarters netted to zero or below: B2's Q1 and G7's Q1.
    assert repair_count(panel.counts, "netted spend to zero or below") == 2


def test_several_orders_in_one_quarter_are_one_purchase(make_panel):
    panel = make_panel(
        ["C3,2023-01-02,10", "C3,2023-02-02,20", "C3,2023-03-30,5", "C3,2023-10-01,15", "C3,2023-12-31,5"],
        as_of="2023-12-31",
    )
    # Three orders in Q1 are one occasion worth 35; two in Q4 are one worth 20.
    assert_array_equal(panel.purchased[0], [1, 0, 0, 1])
    assert_array_equal(panel.spend[0], [35, 0, 0, 20])
    summary = summarize(panel)
    # One repeat occasion (Q4), not four repeat orders; mean order value (35 + 20) / 2.
    assert summary.x.tolist() == [1]
    assert summary.t_x.tolist() == [3]
    assert summary.mean_repeat_value.tolist() == [20.0]
    assert summary.mean_order_value.tolist() == [27.5]


# ---------------------------------------------------------------- fiscal quarters


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


# ---------------------------------------------------------------- mailings

MAILING_ORDERS = ["D4,2023-01-10,25", "D4,2023-07-10,35", "E5,2023-01-05,10"]


def test_mailings_file_marks_mailed_quarters(make_panel):
    panel = make_panel(
        MAILING_ORDERS,
        mailings=[
            "D4,2023-01-20",  # quarter 0: never flagged
            "D4,2023-04-15",  # quarter 1
            "D4,2023-10-01",  # quarter 3 ...
            "D4,2023-11-01",  # ... twice: still one flag
            "D4,2024-02-01",  # after the as-of quarter
            "Z9,2023-04-01",  # no orders
        ],
        as_of="2023-12-31",
    )
    d4, e5 = row_of(panel, "D4"), row_of(panel, "E5")
    assert panel.mailing_history
    assert_array_equal(panel.mailed[d4], [0, 1, 0, 1])
    # E5 was never mailed.
    assert_array_equal(panel.mailed[e5], [0, 0, 0, 0])
    summary = summarize(panel)
    # D4 last bought in quarter 2 and was mailed in quarter 3 after it; E5's three silent quarters were unmailed.
    assert summary.t_x[[d4, e5]].tolist() == [2, 0]
    assert summary.mailed_since_last[[d4, e5]].tolist() == [1, 0]
    assert repair_count(panel.counts, "mailing rows after the as-of quarter") == 1
    assert repair_count(panel.counts, "mailing rows for customers not in the orders") == 1


def test_without_mailings_every_later_quarter_is_mailed(make_panel):
    panel = make_panel(MAILING_ORDERS + ["F6,2023-10-15,5"], as_of="2023-12-31")
    d4, e5, f6 = row_of(panel, "D4"), row_of(panel, "E5"), row_of(panel, "F6")
    assert not panel.mailing_history
    # Quarters 1..n are mailed, quarter 0 is not; F6 starts in the as-of quarter (n = 0), so nothing is.
    assert_array_equal(panel.mailed[d4], [0, 1, 1, 1])
    assert_array_equal(panel.mailed[e5], [0, 1, 1, 1])
    assert_array_equal(panel.mailed[f6], [0, 0, 0, 0])
    # D4: quarter 3 follows its last purchase (2); E5: quarters 1-3 follow its only one.
    assert summarize(panel).mailed_since_last[[d4, e5, f6]].tolist() == [1, 3, 0]


# ---------------------------------------------------------------- per-customer summary

THREE_CUSTOMERS = [
    "A1,2023-01-10,50",
    "A1,2023-04-05,30",
    "A1,2023-10-20,10",
    "B2,2023-04-02,40",
    "C3,2023-01-31,12",
    "C3,2023-07-01,8",
]


def test_summary_per_customer(make_panel):
    panel = make_panel(THREE_CUSTOMERS, as_of="2023-12-31")
    assert panel.customer_ids.tolist() == ["A1", "B2", "C3"]
    # A1 and C3 start in January-March (8092), B2 in April-June (8093); the as-of quarter is 8095.
    assert panel.first_quarter.tolist() == [Q1_2023, Q1_2023 + 1, Q1_2023]
    assert panel.end_quarter == Q1_2023 + 3
    summary = summarize(panel)
    # A1 bought in quarters 0, 1, 3; B2 only in its quarter 0; C3 in quarters 0 and 2.
    assert summary.x.tolist() == [2, 0, 1]
    assert summary.t_x.tolist() == [3, 0, 2]
    assert summary.n.tolist() == [3, 2, 3]
    assert summary.silent_quarters.tolist() == [0, 2, 1]
    # A1: (30 + 10) / 2; B2: no repeat purchase; C3: 8.
    assert_array_equal(summary.mean_repeat_value, [20.0, np.nan, 8.0])
    # Including quarter 0: A1 (50 + 30 + 10) / 3, B2 40, C3 (12 + 8) / 2.
    assert_array_equal(summary.mean_order_value, [30.0, 40.0, 10.0])


# ---------------------------------------------------------------- the as-of quarter


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


# ---------------------------------------------------------------- truncation


def test_truncate_matches_a_panel_built_at_the_earlier_as_of(make_panel):
    mailings = ["A1,2023-04-20", "A1,2023-08-20", "C3,2023-11-11"]
    full = make_panel(THREE_CUSTOMERS, mailings=mailings, as_of="2023-12-31")
    earlier = make_panel(THREE_CUSTOMERS, mailings=mailings, as_of="2023-06-30")
    cut = truncate(full, Q1_2023 + 1)
    # Cutting the panel back to April-June must give what building it then would have given.
    assert cut.end_quarter == earlier.end_quarter == Q1_2023 + 1
    for name in ("customer_ids", "first_quarter", "purchased", "spend", "mailed", "n"):
        assert_array_equal(getattr(cut, name), getattr(earlier, name), err_msg=name)
    # By hand: A1 bought in quarters 0 and 1 and was mailed in 1; C3's July purchase and November mailing are gone.
    assert_array_equal(cut.purchased, [[1, 1], [1, 0], [1, 0]])
    assert_array_equal(cut.mailed, [[0, 1], [0, 0], [0, 0]])


def test_truncate_drops_customers_who_start_later(make_panel):
    cut = truncate(make_panel(THREE_CUSTOMERS, as_of="2023-12-31"), Q1_2023)
    # B2 starts in April-June, after the new as-of quarter; A1 and C3 keep only quarter 0.
    assert cut.customer_ids.tolist() == ["A1", "C3"]
    assert_array_equal(cut.spend, [[50], [12]])
    assert cut.n.tolist() == [0, 0]


# ---------------------------------------------------------------- distinct histories


def test_compress_groups_identical_histories(make_panel):
    # Quarters 0..5 are January-March 2023 .. April-June 2024.
    panel = make_panel(
        [
            "E5,2023-02-01,10",  # bought in quarters 0 and 3
            "E5,2023-10-10,20",
            "F6,2023-03-30,99",  # the same quarters as E5, other days and amounts
            "F6,2023-12-01,1",
            "G7,2023-01-15,5",  # quarter 0 only
            "H8,2024-04-01,7",  # starts in the as-of quarter: n = 0
        ],
        mailings=[
            "E5,2023-04-10",  # quarter 1
            "E5,2024-01-15",  # quarter 4
            "F6,2023-06-30",  # quarter 1, like E5
            "F6,2024-03-31",  # quarter 4, like E5
            "G7,2023-05-01",  # quarter 1
            "G7,2023-08-01",  # quarter 2
        ],
        as_of="2024-06-30",
    )
    histories = compress(panel)
    e5, f6, g7, h8 = (histories.inverse[row_of(panel, c)] for c in ("E5", "F6", "G7", "H8"))
    # E5 and F6 share one history; G7 and H8 have their own: three histories for four customers.
    assert e5 == f6
    assert len({e5, g7, h8}) == 3
    assert histories.size == 3
    assert sorted(histories.count.tolist()) == [1, 1, 2]
    assert histories.count.sum() == panel.customers
    # E5: one repeat purchase (quarter 3, unmailed), silent quarter 1 mailed and 2 unmailed before it,
    # then quarter 4 mailed and 5 not; the mail flags are padded to the longest silence (G7's 5 quarters).
    assert (histories.x[e5], histories.x_unmailed[e5], histories.t_x[e5], histories.n[e5]) == (1, 1, 3, 5)
    assert (histories.mailed_silent[e5], histories.unmailed_silent[e5]) == (1, 1)
    assert histories.after_last[e5].tolist() == [1, 0, 0, 0, 0]
    # G7: silent for all 5 quarters after quarter 0, mailed in the first two.
    assert histories.after_last[g7].tolist() == [1, 1, 0, 0, 0]
    assert histories.silent_quarters[g7] == 5
    # H8: nothing observed after quarter 0.
    assert (histories.n[h8], histories.after_last[h8].sum()) == (0, 0)


def test_compress_inverse_maps_each_customer_back_to_its_own_history(make_panel):
    panel = make_panel(THREE_CUSTOMERS + ["D4,2023-01-05,9", "D4,2023-07-30,9"], as_of="2023-12-31")
    summary, histories = summarize(panel), compress(panel)
    # C3 and D4 both bought in quarters 0 and 2 of four, all mailed: one shared history, four customers in all.
    assert histories.size == 3
    assert histories.count.sum() == 4
    for name in ("x", "t_x", "n", "silent_quarters"):
        assert_array_equal(getattr(histories, name)[histories.inverse], getattr(summary, name), err_msg=name)


def _statistics_by_definition(purchased, mailed, n):
    """history_arrays' statistics for one row, counted quarter by quarter from their definitions."""
    bought = [q for q in range(1, n + 1) if purchased[q]]
    t_x = max(bought, default=0)
    silent_before = [q for q in range(1, t_x + 1) if not purchased[q]]
    return {
        "x": len(bought),
        "x_unmailed": sum(1 for q in bought if not mailed[q]),
        "t_x": t_x,
        "n": n,
        "mailed_silent": sum(1 for q in silent_before if mailed[q]),
        "unmailed_silent": sum(1 for q in silent_before if not mailed[q]),
        "after_last": [int(mailed[q]) for q in range(t_x + 1, n + 1)],
    }


@pytest.mark.parametrize("width", [6, 41, 75])
def test_history_statistics_and_their_grouping_match_a_quarter_by_quarter_count(width):
    # Reference: the definitions counted row by row, and numpy's np.unique over whole rows for the grouping.
    # 75 quarters need two 64-bit words of mail flags, so both ways of combining words into one key are used.
    rng = np.random.default_rng(7)
    rows = 400
    purchased = (rng.random((rows, width)) < 0.15).astype(np.uint8)
    mailed = (rng.random((rows, width)) < 0.5).astype(np.uint8)
    purchased[rows // 2 :] = purchased[: rows // 2]  # repeated rows, so that histories are shared
    mailed[rows // 2 :] = mailed[: rows // 2]
    n = rng.integers(0, width, size=rows)
    n[rows // 2 :] = n[: rows // 2]
    # Rows with the same mail flags after one last-purchase quarter and different counts before it:
    # the flags' word is then the same and only the counts tell the histories apart.
    last = min(4, width - 2)
    purchased[:40, 1 : last + 1] = rng.random((40, last)) < 0.5
    purchased[:40, last] = 1
    purchased[:40, last + 1 :] = 0
    mailed[:40] = 1
    n[:40] = width - 1
    arrays = history_arrays(purchased, mailed, n)
    for row in range(rows):
        expected = _statistics_by_definition(purchased[row], mailed[row], int(n[row]))
        flags = expected.pop("after_last")
        assert {name: int(arrays[name][row]) for name in expected} == expected, row
        assert arrays["after_last"][row, : len(flags)].tolist() == flags and not arrays["after_last"][row, len(flags) :].any(), row
    histories = compress_arrays(arrays)
    scalars = ["x", "x_unmailed", "t_x", "n", "mailed_silent", "unmailed_silent"]
    table = np.column_stack([arrays[name] for name in scalars] + [arrays["after_last"]])
    distinct, inverse, counts = np.unique(table, axis=0, return_inverse=True, return_counts=True)
    assert histories.size == len(distinct)
    # The same partition of the rows: each history pairs with one np.unique row and each row with one history.
    assert len(set(zip(histories.inverse.tolist(), inverse.ravel().tolist()))) == histories.size
    assert sorted(histories.count.tolist()) == sorted(counts.tolist())
    table_of_history = np.column_stack([getattr(histories, name) for name in scalars] + [histories.after_last])
    assert_array_equal(table_of_history[histories.inverse], table)


@pytest.mark.parametrize("size", [1, 50, 10_000, 60_000_000])
def test_integer_codes_are_numpys_unique_with_inverse(size):
    # Reference: np.unique(keys, return_inverse=True). 60 million is past the table's limit, where np.unique itself is used.
    rng = np.random.default_rng(size)
    keys = rng.integers(0, size, 5_000)
    distinct, inverse = integer_codes(keys, size)
    expected, expected_inverse = np.unique(keys, return_inverse=True)
    assert_array_equal(distinct, expected)
    assert_array_equal(inverse, expected_inverse.ravel())
