"""Per-customer recency and frequency, and the customer base described."""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_array_equal

from conftest import Q1_2023, THREE_CUSTOMERS
from lapsewise.data.summary import summarize


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
