"""The value of mailing each customer at their own order value, against programs solved at that order value alone.

The outside check here is the program itself solved at each customer's own margin (an exact solve, state by state
the same recursion as :mod:`lapsewise.decide.reference`): the values read between solved margins must equal it
within their certified bound, and the bound must meet the issue's tolerance (1% of the value or 0.01 currency
units, whichever is larger) where it is asked to.
"""

import dataclasses

import numpy as np
import pytest
from numpy.testing import assert_allclose

from builders import PROCESS, SPEND, small_panel
from lapsewise.budget.values import customer_order_values, state_value_parts, state_values, value_chances, valued_states
from lapsewise.data.histories import compress
from lapsewise.data.summary import summarize
from lapsewise.decide.decisions import Between, decide
from lapsewise.decide.own_margins import margin_grid, own_margin_values
from lapsewise.decide.program import chances, solve, solve_with
from lapsewise.files.policy_file import Economics, Policy, Segments, Version
from lapsewise.model.churn import fit_churn
from lapsewise.model.posterior import posterior

ECONOMICS = Economics(0.45, 4.0, 0.9, 0.10, 6)
# A card whose response (0.2) is below rho (0.3) gives a belief part a negative weight: the bounds swap there.
VERSIONS = {
    "one": (Version("full", 0.9),),
    "two": (Version("full", 0.9), Version("card", 0.4, 0.6)),
    "below rho": (Version("full", 0.9), Version("card", 0.3, 0.2)),
}


def _setting(versions, economics=ECONOMICS, customers=400):
    panel = small_panel(customers)
    policy = Policy(economics, versions, Segments(), "test")
    histories, summary = compress(panel), summarize(panel)
    states = valued_states(histories, economics.margin(customer_order_values(SPEND, policy, summary)))
    alive = posterior(PROCESS, histories).alive_now
    return policy, states, alive, value_chances(PROCESS, policy, states)


def _exact(prepared, policy, states, alive, rows) -> np.ndarray:
    """The value of mailing each version at each row's own margin, from a program solved at that margin."""
    out = []
    for row in rows:
        mail, hold = state_value_parts(solve_with(prepared, float(states.margin[row])), policy, states, np.array([row]), alive[states.history[[row]]])
        out.append(mail[0] - hold[0])
    return np.array(out)


@pytest.mark.parametrize("name", list(VERSIONS))
def test_refined_values_are_within_the_tolerance_of_a_solve_at_each_customers_own_margin(name):
    policy, states, alive, prepared = _setting(VERSIONS[name])
    assert len(np.unique(states.margin)) > 100  # the spend model gives nearly every customer their own margin
    valued = state_values(prepared, policy, states, lambda: alive, refine=True)
    assert valued.certified().all()
    rows = np.random.default_rng(0).choice(len(states.margin), 25, replace=False)
    exact = _exact(prepared, policy, states, alive, rows)
    error = np.abs(valued.values[rows] - exact)
    # Within the certified bound (rounding aside), and so within the tolerance.
    assert (error.max(axis=1) <= valued.bound[rows] + 1e-9).all()
    assert (error <= np.maximum(0.01, 0.01 * np.abs(exact)) + 1e-9).all()


def test_the_default_grid_brackets_every_value_and_meets_the_tolerance_on_a_sample():
    # Without refinement not every bound meets the tolerance, but every bound holds, and on the sample the values do.
    policy, states, alive, prepared = _setting(VERSIONS["two"], Economics(0.45, 4.0, 0.9, 0.10, 12), customers=1500)
    valued = state_values(prepared, policy, states, lambda: alive)
    rows = np.random.default_rng(1).choice(len(states.margin), 30, replace=False)
    exact = _exact(prepared, policy, states, alive, rows)
    error = np.abs(valued.values[rows] - exact)
    assert (error.max(axis=1) <= valued.bound[rows] + 1e-9).all()
    assert (error <= np.maximum(0.01, 0.01 * np.abs(exact))).all(), error.max()


def test_the_chord_and_the_tangents_bracket_the_exact_value_on_a_coarse_grid():
    # Two solved margins far apart leave wide brackets: the exact value lies inside each.
    policy, states, alive, prepared = _setting(VERSIONS["below rho"], Economics(0.45, 4.0, 0.9, 0.10, 12))
    parts = lambda program, rows: state_value_parts(program, policy, states, rows, alive[states.history[rows]])  # noqa: E731
    low, high = np.quantile(states.margin, [0.05, 0.95])
    first, second = solve_with(prepared, low, slopes=True), solve_with(prepared, high, slopes=True)
    rows = np.random.default_rng(2).choice(np.flatnonzero((states.margin > low) & (states.margin < high)), 40, replace=False)
    nodes = (first.slopes(), first, second, second.slopes())
    below = parts(Between(nodes, states.margin[rows], "below"), rows)
    above = parts(Between(nodes, states.margin[rows], "above"), rows)
    chord = parts(Between(nodes, states.margin[rows], "chord"), rows)
    for row, position in zip(rows, range(len(rows))):
        mail, hold = parts(solve_with(prepared, float(states.margin[row])), np.array([row]))
        assert (below[0][position] <= mail[0] + 1e-9).all() and (mail[0] <= above[0][position] + 1e-9).all()
        assert below[1][position] <= hold[0] + 1e-9 <= above[1][position] + 2e-9
        assert (below[0][position] <= chord[0][position] + 1e-12).all() and (chord[0][position] <= above[0][position] + 1e-12).all()
    assert (above[0] - below[0]).max() > 1e-3  # the brackets are not trivially tight


def test_at_a_solved_margin_the_reading_is_the_program_itself():
    policy, states, alive, prepared = _setting(VERSIONS["two"])
    low, high = 5.0, 15.0
    first, second = solve_with(prepared, low, slopes=True), solve_with(prepared, high, slopes=True)
    rows = np.arange(30)
    for margin, program in ((low, first), (high, second)):
        own = np.full(len(rows), margin)
        for side in ("chord", "below", "above"):
            mail, hold = state_value_parts(Between((first.slopes(), first, second, second.slopes()), own, side), policy, states, rows, alive[states.history[rows]])
            exact_mail, exact_hold = state_value_parts(program, policy, states, rows, alive[states.history[rows]])
            assert_allclose(mail, exact_mail, rtol=1e-12, atol=1e-12)
            assert_allclose(hold, exact_hold, rtol=1e-12, atol=1e-12)


def test_the_slope_tables_are_the_derivative_of_the_value_tables_in_the_margin():
    # Slow twin of the slopes kept in the recursion: a central difference of two plain solves. Every table is
    # piecewise linear in the margin, so away from a kink the difference is the slope to rounding.
    prepared = chances(PROCESS, 0.9, 0.976, 8, n_max=6, b_max=3, n_min=2, x_max=4)
    margin, step = 11.3, 1e-5
    program = solve_with(prepared, margin, slopes=True)
    up, down = solve_with(prepared, margin + step), solve_with(prepared, margin - step)
    for h in range(1, 8):
        for ours, high, low in ((program.after_purchase_slope[h], up.after_purchase[h], down.after_purchase[h]), (program.hold_throughout_slope[h], up.hold_throughout[h], down.hold_throughout[h])):
            assert_allclose(ours, (high - low) / (2 * step), rtol=1e-5, atol=1e-7)
    # A plain solve has no slope tables; the values are the same with and without them.
    assert_allclose(program.after_purchase[7], solve_with(prepared, margin).after_purchase[7], rtol=0, atol=0)


def test_a_handful_of_distinct_margins_are_each_solved_exactly():
    # A fixed order value in the policy gives one margin: one program, and values equal to a solve for each state alone.
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6, order_value=60.0)
    policy, states, alive, prepared = _setting(VERSIONS["one"], economics)
    valued = state_values(prepared, policy, states, lambda: alive)
    assert valued.solved == 1 and (valued.bound == 0).all()
    for row in np.random.default_rng(0).choice(len(states.margin), 5, replace=False):
        n, x, b = int(states.n[row]), int(states.x[row]), int(states.b[row])
        alone = solve(PROCESS, economics.margin(60.0), 0.9, economics.discount, 6, n_max=n, b_max=b, n_min=n, x_max=x)
        expected = decide(alone, [n], [x], [b], [alive[states.history[row]]]).value_of_mailing[0]
        assert_allclose(valued.values[row, 0], expected, rtol=1e-10, atol=1e-12)


def test_without_bounds_the_values_are_chords_and_no_slopes_are_solved():
    policy, states, alive, prepared = _setting(VERSIONS["one"])
    parts = lambda program, rows: state_value_parts(program, policy, states, rows, alive[states.history[rows]])  # noqa: E731
    chords = own_margin_values(prepared, states.margin, parts, grid_margins=5, bounds=False)
    assert chords.solved == len(margin_grid(states.margin, 5)) and np.isnan(chords.bound).all()
    bracketed = own_margin_values(prepared, states.margin, parts, grid_margins=5)
    # The chord lies above the middle of the bracket (the value of mailing and of holding are both bracketed, so
    # their difference need not), and both lie within the bracket's half-width of each other.
    assert (np.abs(chords.values - bracketed.values).max(axis=1) <= 2 * bracketed.bound + 1e-9).all()


def test_customers_sharing_a_history_and_a_margin_share_a_state():
    panel = small_panel()
    policy = Policy(ECONOMICS, VERSIONS["one"], Segments(), "test")
    histories, summary = compress(panel), summarize(panel)
    margins = ECONOMICS.margin(customer_order_values(SPEND, policy, summary))
    margins[::2] = 10.0  # many customers share a margin
    states = valued_states(histories, margins)
    pairs = set(zip(histories.inverse.tolist(), margins.tolist()))
    assert len(pairs) == len(states.history)
    assert_allclose(states.margin[states.inverse], margins, rtol=0, atol=0)
    assert np.array_equal(states.history[states.inverse], histories.inverse)


def test_values_over_draws_are_close_to_the_draws_solved_at_each_customers_own_margin():
    # With draws, each draw enters as its difference from the estimates' values on a coarser grid. Against the mean
    # over the draws of programs solved at each sampled customer's own margin, within 0.02 (the figure the output
    # states) or 2% of the value.
    from lapsewise.app import pipeline
    from builders import MODEL
    from lapsewise.decide.program import decision_process
    from lapsewise.model.uncertainty import model_draws

    panel = small_panel()
    policy = Policy(Economics(0.45, 4.0, 0.9, 0.10, 8), VERSIONS["one"], Segments(), "test")
    draws = model_draws(dataclasses.replace(MODEL, churn=fit_churn(compress(panel), True)), 4, 5)
    averaged = pipeline.value_customers(draws.models[0], panel, policy, draws=draws)
    customers = np.random.default_rng(3).choice(panel.customers, 12, replace=False)
    histories, summary = compress(panel), summarize(panel)
    expected = np.zeros(len(customers))
    for drawn in draws.models:
        process = decision_process(drawn.churn, None)
        states = valued_states(histories, policy.economics.margin(customer_order_values(drawn.spend, policy, summary)))
        alive = posterior(process, histories).alive_now
        expected += _exact(value_chances(process, policy, states), policy, states, alive, states.inverse[customers])[:, 0] / len(draws.models)
    error = np.abs(averaged.values[customers, 0] - expected)
    assert (error <= np.maximum(0.02, 0.02 * np.abs(expected))).all(), error.max()
    assert averaged.precision.draw_margins == pipeline.DRAW_GRID_MARGINS


def test_a_grid_whose_programs_do_not_fit_in_memory_is_refused_in_one_line(monkeypatch):
    # The secants read four programs at once; with room for fewer the values are refused, naming what to change.
    from lapsewise.decide import own_margins
    from lapsewise.errors import InputError

    policy, states, alive, prepared = _setting(VERSIONS["one"])
    monkeypatch.setattr(own_margins, "available_memory", lambda: 1000)
    with pytest.raises(InputError, match="reads 4 stop-rule programs at once.*lower horizon_quarters"):
        state_values(prepared, policy, states, lambda: alive)
