"""The value of mailing each customer: the band-wide programs against a program solved for one customer alone."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from builders import PROCESS, SPEND, small_panel
from lapsewise.budget.values import band_values, customer_order_values, value_chances, valued_states
from lapsewise.data.histories import compress
from lapsewise.data.summary import summarize
from lapsewise.decide.decisions import decide
from lapsewise.decide.order_values import spend_bands
from lapsewise.decide.program import solve, solve_with
from lapsewise.files.policy_file import Economics, Policy, Segments, Version
from lapsewise.model.posterior import posterior


@pytest.mark.parametrize("versions", [(Version("full", 0.9),), (Version("full", 0.9), Version("card", 0.4, 0.6))], ids=["one", "two"])
def test_each_state_is_valued_as_a_program_solved_for_it_alone(versions):
    panel = small_panel()
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6)
    policy = Policy(economics, versions, Segments(), "test")
    histories, summary = compress(panel), summarize(panel)
    bands = spend_bands(SPEND, economics, 3)
    states = valued_states(histories, bands, customer_order_values(SPEND, policy, summary))
    alive = posterior(PROCESS, histories).alive_now
    rng = np.random.default_rng(0)
    for band in range(3):
        members = states.in_band(band)
        program = solve_with(value_chances(PROCESS, policy, states, members), policy.economics.margin(bands[band].order_value))
        values = band_values(program, policy, states, members, alive[states.history[members]])
        for row in rng.choice(np.flatnonzero(members), 5, replace=False):
            n, x, b = int(states.n[row]), int(states.x[row]), int(states.b[row])
            alone = solve(PROCESS, economics.margin(bands[band].order_value), 0.9, economics.discount, 6, n_max=n, b_max=b, n_min=n, x_max=x)
            expected = decide(alone, [n], [x], [b], [alive[states.history[row]]]).value_of_mailing[0]
            position = int(np.flatnonzero(np.flatnonzero(members) == row)[0])
            # The full piece at the economics' piece cost is the program's own mail/hold comparison.
            assert_allclose(values[position, 0], expected, rtol=1e-10, atol=1e-12)


def test_customers_sharing_a_history_and_a_band_share_a_state():
    panel = small_panel()
    policy = Policy(Economics(0.45, 4.0, 0.9, 0.10, 6), (Version("full", 0.9),), Segments(), "test")
    histories, summary = compress(panel), summarize(panel)
    bands = spend_bands(SPEND, policy.economics, 3)
    order_values = customer_order_values(SPEND, policy, summary)
    states = valued_states(histories, bands, order_values)
    key = histories.inverse * 10 + np.searchsorted([b.low for b in bands[1:]], order_values, side="right")
    # Same (history, band) key, same state; different keys, different states.
    assert len(np.unique(key)) == len(states.history)
    assert len(set(zip(key.tolist(), states.inverse.tolist()))) == len(states.history)
