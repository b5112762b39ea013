"""Panel arithmetic on small hand-made histories: netting, purchase occasions, mailed quarters, truncation.

Quarter numbers are absolute (see tests/test_quarters.py): January-March 2023 is quarter 8092.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal

from conftest import GOOD_ORDERS, Q1_2023, THREE_CUSTOMERS, mailings_text, orders_text, repair_count, row_of
from lapsewise.data.panel import panel_from_files, select, truncate
from lapsewise.data.summary import summarize
from lapsewise.errors import InputError
from lapsewise.model.fitted import fit_model
from lapsewise.model.process import Process
from simulate_histories import dated_orders_and_mailings


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


def test_truncate_matches_a_panel_built_at_the_earlier_as_of(make_panel):
    # A1's April piece comes before its April order (2023-04-05), so it counts for that purchase quarter.
    mailings = ["A1,2023-04-01", "A1,2023-08-20", "C3,2023-11-11"]
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


def test_orders_after_the_as_of_date_are_counted(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", "A1,2023-07-02,20", "A1,2023-08-09,30"))
    panel = panel_from_files(str(path), as_of="2023-06-30")
    # The July and August orders fall after the as-of quarter (April to June).
    assert repair_count(panel.counts, "orders after the as-of quarter") == 2
    assert panel.spend.sum() == 10.0


def test_mailings_for_unknown_customers_are_counted(write_file):
    orders = write_file("orders.csv", GOOD_ORDERS)
    mailings = write_file("mailings.csv", mailings_text("A1,2023-04-10", "Z9,2023-04-10", "Z9,2023-07-10", "Y8,2023-04-10"))
    panel = panel_from_files(str(orders), str(mailings))
    # Z9 and Y8 have no orders: their three rows are left out; A1's row is used.
    assert repair_count(panel.counts, "mailing rows for customers not in the orders") == 3
    assert panel.mailing_history


# ---------------------------------------------------------------- order and piece timing within a quarter

# Each customer's first order is in January-March 2023 (quarter 0) and a repeat purchase falls in
# April-June (quarter 1), where the pieces below are dated around it; July-September (quarter 2) has no order.
TIMING_ORDERS = [
    "T1,2023-01-10,20",
    "T1,2023-05-10,30",  # piece 2023-05-20, ten days after the order
    "T2,2023-01-10,20",
    "T2,2023-05-10,30",  # piece 2023-05-01, nine days before
    "T3,2023-01-10,20",
    "T3,2023-05-10,30",  # piece 2023-05-10, the order's own day
    "T4,2023-01-10,20",
    "T4,2023-04-05,10",  # first order of the quarter ...
    "T4,2023-06-01,25",  # ... and a second; the piece (2023-05-01) falls between them
    "T5,2023-01-10,20",
    "T5,2023-05-10,30",  # no piece in the quarter at all
    "T6,2023-01-10,20",
    "T6,2023-04-02,-5",  # a return before the first positive order does not count as the first order
    "T6,2023-05-10,30",  # piece 2023-05-01, before this order (and after the return)
]
TIMING_MAILINGS = [
    "T1,2023-05-20",
    "T1,2023-08-01",  # quarter 2 has no purchase: mailed whatever the date
    "T2,2023-05-01",
    "T3,2023-05-10",
    "T4,2023-05-01",
    "T6,2023-05-01",
]


def test_a_piece_counts_for_a_purchase_quarter_only_if_dated_by_its_first_order(make_panel):
    panel = make_panel(TIMING_ORDERS, mailings=TIMING_MAILINGS, as_of="2023-09-30")
    mailed_in_quarter_1 = {customer: int(panel.mailed[row_of(panel, customer), 1]) for customer in panel.customer_ids}
    # By hand, from the dates above: the piece after the order (T1) and the one after the first of two
    # orders (T4) do not count; the one before (T2, T6) and the one on the order's day (T3) do; T5 had none.
    assert mailed_in_quarter_1 == {"T1": 0, "T2": 1, "T3": 1, "T4": 0, "T5": 0, "T6": 1}
    # T1's August piece falls in a quarter without a purchase, which is mailed as before.
    assert panel.mailed[row_of(panel, "T1"), 2] == 1
    # Two purchase quarters had a piece only after their first order: T1's and T4's.
    assert repair_count(panel.counts, "only pieces arrived after the first order") == 2


def test_in_home_days_move_the_cut_off_before_the_first_order(write_file):
    orders = write_file("orders.csv", orders_text(*TIMING_ORDERS))
    mailings = write_file("mailings.csv", mailings_text(*TIMING_MAILINGS))
    panel = panel_from_files(str(orders), str(mailings), as_of="2023-09-30", in_home_days=1)
    mailed_in_quarter_1 = {customer: int(panel.mailed[row_of(panel, customer), 1]) for customer in panel.customer_ids}
    # With one in-home day the piece dated on T3's order day arrives the day after it: T3 joins T1 and T4.
    assert mailed_in_quarter_1 == {"T1": 0, "T2": 1, "T3": 0, "T4": 0, "T5": 0, "T6": 1}
    assert repair_count(panel.counts, "only pieces arrived after the first order") == 3
    # Nine in-home days still let T2's and T6's pieces (nine days before) count; ten do not.
    nine = panel_from_files(str(orders), str(mailings), as_of="2023-09-30", in_home_days=9)
    ten = panel_from_files(str(orders), str(mailings), as_of="2023-09-30", in_home_days=10)
    assert [int(nine.mailed[row_of(nine, c), 1]) for c in ("T2", "T6")] == [1, 1]
    assert [int(ten.mailed[row_of(ten, c), 1]) for c in ("T2", "T6")] == [0, 0]
    assert repair_count(ten.counts, "only pieces arrived after the first order") == 5


def test_an_early_piece_beside_a_late_one_makes_the_quarter_mailed(make_panel):
    # The earliest piece of the quarter decides: 2023-04-20 is before the order of 2023-05-10, 2023-06-01 after it.
    panel = make_panel(["U1,2023-01-10,20", "U1,2023-05-10,30"], mailings=["U1,2023-06-01", "U1,2023-04-20"], as_of="2023-06-30")
    assert_array_equal(panel.mailed[0], [0, 1])
    assert repair_count(panel.counts, "only pieces arrived after the first order") == 0


def test_the_changed_quarters_are_exactly_those_mailed_by_quarter_but_not_in_time(make_panel):
    # The count is the number of purchase quarters whose flag the timing turned off: the panel built with the
    # timing, compared cell by cell with the quarters in which any piece is dated (computed here from the rows).
    panel = make_panel(TIMING_ORDERS, mailings=TIMING_MAILINGS, as_of="2023-09-30")
    by_quarter = np.zeros_like(panel.mailed)
    for line in TIMING_MAILINGS:
        customer, date = line.split(",")
        quarter = (int(date[5:7]) - 1) // 3  # every customer's quarter 0 is January-March 2023
        by_quarter[row_of(panel, customer), quarter] = 1
    changed = (by_quarter == 1) & (panel.mailed == 0) & (panel.purchased == 1)
    assert int(changed.sum()) == repair_count(panel.counts, "only pieces arrived after the first order") == 2
    # The panel keeps where they are: a randomised comparison counts them as sent (Panel.sent_in).
    assert_array_equal(panel.late_pieces, np.flatnonzero(changed.ravel()))
    for column in range(panel.mailed.shape[1]):
        assert_array_equal(panel.sent_in(np.full(panel.customers, column)), by_quarter[:, column] == 1)
    # Cutting the panel keeps them with their customers and quarters.
    order = np.array([row_of(panel, "T4"), row_of(panel, "T2"), row_of(panel, "T1")])
    picked = select(panel, order)
    assert_array_equal(picked.sent_in(np.ones(3, dtype=np.int64)), by_quarter[order, 1] == 1)
    assert len(truncate(panel, panel.end_quarter - 2).late_pieces) == 0  # quarter 1 cut away
    # Quarters without a purchase, and purchase quarters with a piece in time, are unchanged.
    assert_array_equal(panel.mailed[~changed], by_quarter[~changed])


def test_negative_in_home_days_are_refused(write_file):
    orders = write_file("orders.csv", orders_text(*TIMING_ORDERS))
    mailings = write_file("mailings.csv", mailings_text(*TIMING_MAILINGS))
    with pytest.raises(InputError, match="--in-home-days: -1"):
        panel_from_files(str(orders), str(mailings), in_home_days=-1)


def _quarter_table(orders: pd.DataFrame, mailings: pd.DataFrame, with_timing: bool) -> pd.DataFrame:
    """The customer-quarter table of the files, built as the README's GROUP BY builds it (0 in-home days).

    Without ``with_timing`` it has no mailed_before_order column: a quarter is mailed whenever a piece is dated in it.
    """
    orders = orders.assign(quarter=pd.PeriodIndex(orders.order_date, freq="Q").start_time)
    mailings = mailings.assign(quarter=pd.PeriodIndex(mailings.mail_date, freq="Q").start_time)
    spend = orders.groupby(["customer_id", "quarter"]).agg(spend=("amount", "sum"), first_order=("order_date", "min"))
    pieces = mailings.groupby(["customer_id", "quarter"]).agg(first_piece=("mail_date", "min"))
    table = spend.join(pieces, how="outer").reset_index()
    table["purchased"] = (table.spend > 0).astype(int)
    table["spend"] = table.spend.fillna(0.0)
    table["mailed"] = table.first_piece.notna().astype(int)
    if with_timing:
        table["mailed_before_order"] = (table.first_piece <= table.first_order).astype(int)
    return table.drop(columns=["first_order", "first_piece"])


def test_rho_is_recovered_only_when_follow_up_pieces_are_timed_against_the_orders(tmp_path):
    # Invented base: 6,000 customers from a process with rho = 0.6, mailed by a lapse rule (regular pieces early in
    # their quarter, orders of a mailed quarter after its piece), and a follow-up piece a few days after 30% of
    # orders. Every order here has a positive amount, so a quarter's first order is its earliest.
    true_rho = 0.6
    orders, mailings, end = dated_orders_and_mailings(6000, Process(1.0, 2.5, 0.6, 4.0, true_rho), follow_up_share=0.3, seed=11)
    orders.to_csv(tmp_path / "orders.csv", index=False)
    mailings.to_csv(tmp_path / "mailings.csv", index=False)
    timed = panel_from_files(str(tmp_path / "orders.csv"), str(tmp_path / "mailings.csv"), as_of=str(end))
    fit = fit_model(timed).churn
    # With the timing honoured the follow-ups are left out and rho is recovered: within 4 standard errors of 0.6
    # (seed 11 gives 0.589 with a standard error of 0.020).
    assert abs(fit.rho - true_rho) <= 4 * fit.std_errors["rho"]
    assert repair_count(timed.counts, "only pieces arrived after the first order") > 0

    # The same data read as a customer-quarter table with mailed_before_order give the same mailed quarters.
    _quarter_table(orders, mailings, with_timing=True).to_csv(tmp_path / "timed-quarters.csv", index=False)
    table = panel_from_files(str(tmp_path / "timed-quarters.csv"), as_of=str(end))
    assert_array_equal(table.mailed, timed.mailed)

    # Read by quarter alone (a quarter with any piece is mailed), the follow-ups credit unmailed quarters' orders to
    # a piece and rho falls far below the truth: 0.36 at this seed, over ten of its standard errors (0.014) from 0.6.
    _quarter_table(orders, mailings, with_timing=False).to_csv(tmp_path / "quarters.csv", index=False)
    untimed = panel_from_files(str(tmp_path / "quarters.csv"), as_of=str(end))
    assert fit_model(untimed).churn.rho < 0.5
