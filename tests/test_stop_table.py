"""The stop table: every state covered, stop points that move the right way with costs and margins."""

import numpy as np
import pytest

from lapsewise.decide.stop_table import build_stop_table
from lapsewise.errors import InputError
from lapsewise.files.policy_file import Economics
from lapsewise.model.churn import ChurnFit

FIT = ChurnFit(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)


def stop_points(table):
    stop = table.rows["stop_after"].to_numpy().astype(float)
    return np.where(stop < 0, np.inf, stop)


def test_stop_point_moves_earlier_as_piece_cost_rises_and_later_as_margin_rises():
    base = dict(gross_margin=0.45, order_cost=4.0, annual_discount_rate=0.10, horizon_quarters=16, order_value=45.0)
    by_cost = [stop_points(build_stop_table(FIT, None, Economics(piece_cost=c, **base))) for c in (0.5, 0.9, 1.5, 2.5)]
    for cheaper, dearer in zip(by_cost, by_cost[1:]):
        assert np.all(dearer <= cheaper)
    assert np.any(by_cost[-1] < by_cost[0])
    base.pop("gross_margin")
    by_margin = [stop_points(build_stop_table(FIT, None, Economics(gross_margin=g, piece_cost=0.9, **base))) for g in (0.35, 0.45, 0.6)]
    for lower, higher in zip(by_margin, by_margin[1:]):
        assert np.all(higher >= lower)
    assert np.any(by_margin[-1] > by_margin[0])


def test_stop_table_covers_every_state_up_to_the_horizon():
    table = build_stop_table(FIT, None, Economics(0.45, 4.0, 0.9, 0.10, 6, order_value=45.0))
    pairs = set(zip(table.rows.frequency, table.rows.last_purchase_quarter))
    # (0, 0) and every 1 <= x <= t_x <= 6: 1 + 6 * 7 / 2 = 22 states.
    assert len(pairs) == 22 and (0, 0) in pairs and (6, 6) in pairs and (1, 6) in pairs
    # A customer is mailed exactly while k < stop_after.
    cells = table.cells.merge(table.rows, on=["spend_band", "frequency", "last_purchase_quarter"])
    stop = np.where(cells.stop_after < 0, np.inf, cells.stop_after)
    np.testing.assert_array_equal(cells["mail"].to_numpy(), cells.silent_quarters.to_numpy() < stop)


def test_stop_table_needs_an_order_value():
    with pytest.raises(InputError, match="order_value"):
        build_stop_table(FIT, None, Economics(0.45, 4.0, 0.9, 0.10, 8))
