"""The pipeline: the stages run side by side give what they give one after another."""

import numpy as np
import pandas as pd
from numpy.testing import assert_allclose

from builders import MODEL, POLICY, SPEND, small_panel
from lapsewise.app import pipeline
from lapsewise.budget.integer_program import make_plan
from lapsewise.budget.values import customer_order_values, customer_values, state_values, value_chances, valued_states
from lapsewise.data.histories import compress
from lapsewise.data.summary import summarize
from lapsewise.decide.program import decision_process
from lapsewise.decide.stop_table import build_stop_table
from lapsewise.files.policy_file import Economics, Policy, Segments
from lapsewise.model.posterior import posterior


def test_customer_values_side_by_side_equal_the_stages_in_turn():
    panel = small_panel()
    ours = pipeline.value_customers(MODEL, panel, POLICY)
    process = decision_process(MODEL.churn, None)
    histories, summary = compress(panel), summarize(panel)
    post = posterior(process, histories)
    states = valued_states(histories, POLICY.economics.margin(customer_order_values(SPEND, POLICY, summary)))
    valued = state_values(value_chances(process, POLICY, states), POLICY, states, lambda: post.alive_now)
    theirs = customer_values(panel.customer_ids, summary, POLICY, histories, post, valued.values[states.inverse])
    assert_allclose(ours.values, theirs.values, rtol=0, atol=0)
    assert (ours.segment == theirs.segment).all() and np.array_equal(ours.p_buy, theirs.p_buy)
    assert ours.precision.programs == valued.solved and not ours.precision.refined


def test_stop_table_and_plan_side_by_side_equal_them_in_turn():
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6)
    together = pipeline.stop_table(MODEL, Policy(economics, POLICY.versions, Segments(), "test"))
    in_turn = build_stop_table(MODEL.churn, SPEND, economics, 3, each=map, versions=POLICY.versions)
    pd.testing.assert_frame_equal(together.rows, in_turn.rows)
    values = pipeline.value_customers(MODEL, small_panel(), POLICY)
    side_by_side, one_by_one = pipeline.plan(values, POLICY, 60.0), make_plan(values, POLICY, 60.0)
    assert side_by_side.solution.objective == one_by_one.solution.objective
    assert side_by_side.shadow_price == one_by_one.shadow_price
    np.testing.assert_array_equal(side_by_side.assignment, one_by_one.assignment)


def test_the_recurring_budget_price_is_a_fixed_point_and_falls_as_the_budget_rises():
    # The price settles where re-solving with it reproduces it (within the stated tolerance), and a larger budget
    # binds less: its price is no higher.
    panel = small_panel()
    values = pipeline.value_customers(MODEL, panel, POLICY)
    prices = []
    for budget in (15.0, 40.0, 80.0):
        result = pipeline.recurring_budget_plan(MODEL, panel, POLICY, budget, values)
        assert result.settled, result.prices
        again = pipeline.plan(pipeline.value_customers(MODEL, panel, POLICY, budget_price=result.price), POLICY, budget)
        assert abs(again.shadow_price - result.price) <= max(pipeline.PRICE_TOLERANCE * result.price, 0.001) + 0.02 * result.price
        prices.append(result.price)
    assert prices[0] >= prices[1] - 1e-9 >= prices[2] - 2e-9 and prices[0] > prices[2]


def test_a_recurring_budget_needs_a_budget():
    from lapsewise.errors import InputError

    inputs = pipeline.PlanInputs(MODEL, POLICY, small_panel(), pipeline.value_customers(MODEL, small_panel(), POLICY), None)
    import pytest

    with pytest.raises(InputError, match="--recurring-budget: a budget that binds every quarter needs --budget"):
        pipeline.budget_plan(inputs, None, recurring=True)
