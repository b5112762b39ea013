"""The stop table: every state covered, stop points that move the right way with costs and margins."""

import dataclasses

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


# ---------------------------------------------------------------- the calendar program's table

from lapsewise.decide.stop_table import calendar_changes  # noqa: E402
from lapsewise.files.policy_file import Version  # noqa: E402

FLAT = Economics(0.45, 4.0, 0.9, 0.10, 12, order_value=45.0)
STANDARD = (Version("full", 0.9),)
SEASONAL_FIT = ChurnFit(
    alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3, seasons=(1.0, 0.5, 0.375, 0.625),
    std_errors={f"season_{q}": 0.01 for q in range(1, 5)},
)


def test_one_piece_and_no_seasons_give_todays_table_exactly():
    today = build_stop_table(FIT, None, FLAT)
    with_versions = build_stop_table(FIT, None, FLAT, versions=STANDARD)
    assert not with_versions.calendar
    for column in ("stop_after", "breakeven_stop_after"):
        np.testing.assert_array_equal(with_versions.rows[column], today.rows[column])
    np.testing.assert_array_equal(with_versions.cells["value_of_mailing"], today.cells["value_of_mailing"])
    # The actions say the same as the stop point: the piece until it, then hold.
    for row in with_versions.rows.itertuples():
        stop = len(row.actions) if row.stop_after < 0 else row.stop_after
        assert row.actions == ("piece",) * stop + ("hold",) * (len(row.actions) - stop)


def test_the_calendar_program_with_one_piece_and_no_seasons_finds_todays_stop_points():
    # Forced through the calendar program, where it is not needed: the stop points agree (measured: all 79 rows
    # at a horizon of 12; the test allows 5% of rows one quarter off, the program's grid in P(alive)).
    today = build_stop_table(FIT, None, FLAT)
    forced = build_stop_table(FIT, None, FLAT, versions=STANDARD, calendar=True)
    assert forced.calendar and not forced.seasonal
    mine, theirs = forced.rows["stop_after"].to_numpy(), today.rows["stop_after"].to_numpy()
    assert np.mean(mine == theirs) >= 0.95
    assert np.all(np.abs(np.where(mine < 0, 13, mine) - np.where(theirs < 0, 13, theirs)) <= 1)


def test_a_dear_quarter_is_skipped_and_mailing_resumes_after_it():
    # Quarter 4's piece costs 50: no plan mails in it, and plans that would have mailed through it hold there and
    # mail again after it (the single-piece program can only stop).
    economics = Economics(0.45, 4.0, 0.9, 0.10, 12, order_value=45.0, quarters=((), (), (), (("piece_cost", 50.0),)))
    standard = (Version("full", 0.9, quarter_piece_costs=(None, None, None, 50.0)),)
    table = build_stop_table(FIT, None, economics, versions=standard)
    assert table.calendar and table.seasonal
    for row in table.rows.itertuples():
        quarters = (row.last_purchase_season + np.arange(len(row.actions))) % 4  # 0-3 of each planned quarter
        assert all(action == "hold" for action, q in zip(row.actions, quarters) if q == 3)
    (change,) = calendar_changes(table)
    assert change.hold_between > 0 and change.step_down == 0


def test_a_postcard_extends_plans_before_they_stop():
    versions = (Version("full", 0.9), Version("postcard", 0.25, response=0.6))  # adds 0.3 over holding to the full piece's 0.7, at under a third of its cost
    table = build_stop_table(FIT, None, FLAT, versions=versions)
    assert table.calendar and not table.seasonal
    (change,) = calendar_changes(table)
    # Measured: 77 of 79 plans step down, 76 stop later (2.5 quarters on average), none earlier.
    assert change.step_down > 0.9 * change.plans and change.later > 0.9 * change.plans and change.earlier == 0
    # The postcard comes after the full piece, never before it, in a silent stretch.
    for actions in table.rows["actions"]:
        pieces = [a for a in actions if a != "hold"]
        if "postcard" in pieces and "full" in pieces:
            assert max(i for i, a in enumerate(actions) if a == "full") < min(i for i, a in enumerate(actions) if a == "postcard")


def test_supported_seasons_give_a_row_per_quarter_of_the_last_order():
    table = build_stop_table(SEASONAL_FIT, None, FLAT, versions=STANDARD)
    assert table.calendar and table.seasonal
    assert sorted(set(table.rows["last_purchase_season"])) == [1, 2, 3, 4]
    assert len(table.rows) == 4 * len(table.blind.rows)
    one = table.in_season(2)
    assert len(one.rows) == len(table.blind.rows)
    # Seasons within two standard errors of 1 are not followed: the single-piece table.
    loose = build_stop_table(dataclasses.replace(SEASONAL_FIT, std_errors={f"season_{q}": 0.5 for q in range(1, 5)}), None, FLAT, versions=STANDARD)
    assert not loose.calendar
    # Nor seasons within 5% of 1, however sure (a million customers' standard errors are a few thousandths).
    flat = build_stop_table(dataclasses.replace(SEASONAL_FIT, seasons=(1.0, 0.97, 0.96, 0.98), std_errors={f"season_{q}": 0.001 for q in range(1, 5)}), None, FLAT, versions=STANDARD)
    assert not flat.calendar
