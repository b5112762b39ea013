"""The policy simulation: the optimal policy matches the program and beats every rule of thumb; seeds repeat."""

import numpy as np
import pytest

from lapsewise.evaluate.policies import simulate_policies
from lapsewise.files.policy_file import Economics
from lapsewise.model.process import Process

FIT = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)


@pytest.mark.parametrize("rho", [0.0, 0.3])
def test_simulated_optimal_policy_matches_the_program_and_beats_every_rule(rho):
    process = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, rho)
    economics = Economics(0.45, 4.0, 0.9, 0.10, 12)
    result = simulate_policies(process, economics, 45.0, customers=40_000, quarters=12, seed=5)
    summary = result.summary.set_index("policy")
    optimal = summary.loc["optimal"]
    # The program's value of a new customer lies within 4 standard errors of the simulated mean.
    assert abs(result.program_value - optimal.mean_profit) < 4 * optimal.profit_std_error
    # No rule of thumb beats the optimal policy by more than 4 standard errors of the paired difference.
    others = summary.drop(index="optimal")
    assert np.all(others.difference_to_optimal < 4 * others.difference_std_error)
    # And the crude rules lose clearly.
    assert others.loc["always mail", "difference_to_optimal"] < -4 * others.loc["always mail", "difference_std_error"]
    assert others.loc["stop after 1", "difference_to_optimal"] < -4 * others.loc["stop after 1", "difference_std_error"]


def test_simulation_is_deterministic_for_a_seed():
    process = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.3)
    economics = Economics(0.45, 4.0, 0.9, 0.10, 6)
    first = simulate_policies(process, economics, 45.0, 2000, 6, seed=9).to_dict()
    second = simulate_policies(process, economics, 45.0, 2000, 6, seed=9).to_dict()
    assert first == second


def test_a_simulation_too_large_for_the_free_memory_is_refused(monkeypatch):
    from lapsewise.errors import InputError
    from lapsewise.evaluate import policies

    monkeypatch.setattr(policies, "available_memory", lambda: 1_000_000)
    with pytest.raises(InputError, match="simulating 100,000 customers over 40 quarters needs about"):
        simulate_policies(FIT, Economics(0.45, 4.0, 0.9, 0.10, 40), 45.0, 100_000, 40, seed=1)


def test_in_a_seasonal_world_the_average_quarter_plan_still_beats_the_rules():
    # Out of the program's world: the customers follow seasons (1, 0.5, 0.4, 0.7 by quarter of the year) on the
    # calendar while the program plans an average quarter (decision_process: beta' = (alpha + beta)/s_bar - alpha).
    # Measured (fixed seeds, 20,000 customers, 12 quarters): the plan still beats every rule of thumb (none better by
    # 4 standard errors; 'always mail' and 'stop after 1' clearly worse). The program's value of the average quarter
    # (14.8) lies above the simulated mean (14.4 +- 0.4), within the noise of this size: not asserted.
    from lapsewise.decide.program import decision_process
    from lapsewise.model.churn import ChurnFit

    seasons = (1.0, 0.5, 0.4, 0.7)
    fit = ChurnFit(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.3, seasons=seasons)
    planner = decision_process(fit)
    world = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.3, seasons)
    economics = Economics(0.45, 4.0, 0.9, 0.10, 12)
    result = simulate_policies(planner, economics, 50.0, customers=20_000, quarters=12, seed=1, world=world, calendar_start=401)
    summary = result.summary.set_index("policy")
    others = summary.drop(index="optimal")
    assert np.all(others.difference_to_optimal < 4 * others.difference_std_error)
    for rule in ("always mail", "stop after 1"):
        assert others.loc[rule, "difference_to_optimal"] < -4 * others.loc[rule, "difference_std_error"]
    assert result.to_dict()["seasons"] == list(seasons)
    # Without seasons the world is the planner's own: the same figures as without a world.
    plain = simulate_policies(planner, economics, 50.0, customers=2_000, quarters=6, seed=3)
    same = simulate_policies(planner, economics, 50.0, customers=2_000, quarters=6, seed=3, world=planner, calendar_start=7)
    assert plain.to_dict() == same.to_dict() and plain.to_dict()["seasons"] is None


# ---------------------------------------------------------------- the calendar program's policy, simulated

from lapsewise.decide.program import decision_process  # noqa: E402
from lapsewise.files.policy_file import Version  # noqa: E402
from lapsewise.model.churn import ChurnFit  # noqa: E402

POSTCARD = (Version("full", 0.9), Version("postcard", 0.25, response=0.6))


def seasonal_simulation(seasons, versions, planned_seasons=None, customers=6000, seed=3):
    """Customers drawn in a seasonal world; the calendar program plans with ``planned_seasons`` (default the world's)."""
    world = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, FIT.rho, seasons)
    planning = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, FIT.rho, planned_seasons or seasons)
    averaged = decision_process(ChurnFit(alpha=FIT.alpha, beta=FIT.beta, gamma=FIT.gamma, delta=FIT.delta, rho=FIT.rho, seasons=seasons))
    economics = Economics(0.45, 4.0, 0.9, 0.10, 16)
    return simulate_policies(averaged, economics, 45.0, customers, 16, seed=seed, world=world, calendar_start=1, versions=versions, planning=planning)


def gain(simulation):
    """The calendar program's mean profit over the single-piece program's (paired), and its standard error."""
    row = simulation.summary.set_index("policy").loc["single piece"]
    return -row.difference_to_optimal, row.difference_std_error


def test_in_a_seasonal_world_with_a_postcard_the_calendar_policy_earns_more_than_the_single_piece():
    # Paired on the same customers and random numbers (fixed seed). Measured: with strong seasons (the peak three
    # times the slow quarters) and a postcard, +0.84 per customer (standard error 0.077) on the single piece's 9.88;
    # with mild seasons and the full piece alone +0.004 (standard error 0.008): no worse.
    strong = seasonal_simulation((1.0, 0.3, 0.3, 0.5), POSTCARD)
    mild = seasonal_simulation((1.0, 0.9, 0.9, 0.95), (Version("full", 0.9),))
    strong_gain, strong_error = gain(strong)
    mild_gain, mild_error = gain(mild)
    assert strong_gain > 5 * strong_error
    assert mild_gain > -2 * mild_error
    assert strong_gain > mild_gain + 2 * (strong_error + mild_error)
    # The program's own value of a new customer lies within three standard errors of its simulated mean.
    optimal = strong.summary.iloc[0]
    assert abs(strong.program_value - optimal.mean_profit) < 3 * optimal.profit_std_error
    # And the rules of thumb stay below it.
    assert (strong.summary["difference_to_optimal"].iloc[1:] < 0).all()
    assert strong.best_rule.policy not in ("optimal", "single piece")


def test_planned_with_seasons_a_little_off_it_still_beats_the_single_piece():
    # Out of the program's world: it plans with seasons estimated too flat (0.45 where the world has 0.3), as a fit on
    # little data might; the world is the seasonal one. Measured: +0.62 (standard error 0.058). Its own value of a
    # new customer (13.7) is then far above what it earns (10.5): the plan is good, the promise is the wrong world's.
    off = seasonal_simulation((1.0, 0.3, 0.3, 0.5), POSTCARD, planned_seasons=(1.0, 0.45, 0.45, 0.6))
    off_gain, off_error = gain(off)
    assert off_gain > 3 * off_error
