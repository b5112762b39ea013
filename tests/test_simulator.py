"""The one simulator of the process: its churn, purchase and mailing steps against the model's own formulas.

Simulation tests: fixed seeds, sample sizes at which a correct simulator passes with overwhelming probability
(each check allows four standard errors).
"""

import numpy as np
import pytest
from scipy import special

from lapsewise.evaluate.simulator import StreamedUniforms, TabledUniforms, draw_traits, every_quarter, lapse_rule, run_process
from lapsewise.model.process import Process

PROCESS = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)


def test_survival_follows_the_beta_geometric_formula():
    # FHB 2010's survival term: P(alive through t) = B(gamma, delta + t) / B(gamma, delta).
    rng = np.random.default_rng(1)
    customers, quarters = 60_000, 9
    traits = draw_traits(PROCESS, customers, rng)
    uniforms = TabledUniforms.draw(rng, customers, quarters)
    alive_through = []
    for t in range(1, quarters):
        result = run_process(PROCESS, traits, t + 1, every_quarter, uniforms)
        alive_through.append(result.alive.mean())
    t = np.arange(1, quarters)
    expected = np.exp(special.betaln(PROCESS.gamma, PROCESS.delta + t) - special.betaln(PROCESS.gamma, PROCESS.delta))
    assert np.all(np.abs(np.array(alive_through) - expected) < 4 * np.sqrt(expected * (1 - expected) / customers))


def test_purchases_follow_p_when_mailed_and_rho_p_when_held():
    # Nobody leaves (theta is tiny), half the quarters are mailed at random: the purchase rate is E[p] = alpha /
    # (alpha + beta) in mailed quarters and rho E[p] in held ones.
    process = Process(alpha=2.0, beta=3.0, gamma=0.01, delta=1e6, rho=0.4)
    rng = np.random.default_rng(2)
    customers, quarters = 40_000, 6
    traits = draw_traits(process, customers, rng)
    coin = lambda seen: seen.in_play & (seen.rng.random(len(seen.in_play)) < 0.5)  # noqa: E731
    result = run_process(process, traits, quarters, coin, StreamedUniforms(rng, customers), rng=rng)
    mailed = result.mailed[:, 1:].astype(bool)
    bought = result.purchased[:, 1:].astype(bool)
    for share, expected in ((bought[mailed].mean(), 0.4), (bought[~mailed].mean(), 0.4 * 0.4)):
        assert abs(share - expected) < 4 * np.sqrt(expected * (1 - expected) / mailed.sum() * 4)


def test_the_lapse_rule_mails_recent_buyers_and_a_winback_share_of_the_rest():
    rng = np.random.default_rng(3)
    customers, quarters, lapse_after, share = 30_000, 12, 2, 0.25
    traits = draw_traits(PROCESS, customers, rng)
    result = run_process(PROCESS, traits, quarters, lapse_rule(lapse_after, share), StreamedUniforms(rng, customers), rng=rng)
    last = np.zeros(customers, dtype=int)
    lapsed_mailed, lapsed = 0, 0
    for quarter in range(1, quarters):
        recent = quarter - 1 - last < lapse_after
        assert result.mailed[recent, quarter].all()  # every recent buyer is mailed
        lapsed_mailed += result.mailed[~recent, quarter].sum()
        lapsed += (~recent).sum()
        last = np.where(result.purchased[:, quarter] == 1, quarter, last)
    assert abs(lapsed_mailed / lapsed - share) < 4 * np.sqrt(share * (1 - share) / lapsed)


def test_customers_are_in_play_only_between_their_first_and_last_quarter():
    rng = np.random.default_rng(4)
    customers, quarters = 2_000, 10
    first = rng.integers(0, 5, customers)
    last = first + rng.integers(0, 5, customers)
    traits = draw_traits(PROCESS, customers, rng)
    result = run_process(PROCESS, traits, quarters, every_quarter, StreamedUniforms(rng, customers), first=first, last=last)
    column = np.arange(quarters)[None, :]
    outside = (column < first[:, None]) | (column > last[:, None])
    assert not result.purchased[outside].any() and not result.mailed[outside].any()
    assert (result.purchased[np.arange(customers), first] == 1).all()  # the first purchase
    assert not result.mailed[np.arange(customers), first].any()


def test_tabled_uniforms_give_every_rule_the_same_customers():
    # Common random numbers: whoever is mailed, the same customers leave in the same quarters.
    rng = np.random.default_rng(5)
    customers, quarters = 5_000, 8
    traits = draw_traits(PROCESS, customers, rng)
    uniforms = TabledUniforms.draw(rng, customers, quarters)
    never = run_process(PROCESS, traits, quarters, lambda seen: np.zeros_like(seen.in_play), uniforms)
    always = run_process(PROCESS, traits, quarters, every_quarter, uniforms)
    np.testing.assert_array_equal(never.alive, always.alive)
    # Mailing only adds purchases (p >= rho p with the same uniform draw).
    assert (always.purchased >= never.purchased).all() and always.purchased.sum() > never.purchased.sum()


@pytest.mark.parametrize("seed", [0, 1])
def test_the_same_seed_gives_the_same_customers(seed):
    def draw():
        rng = np.random.default_rng(seed)
        traits = draw_traits(PROCESS, 500, rng)
        return run_process(PROCESS, traits, 6, lapse_rule(2, 0.3), StreamedUniforms(rng, 500), rng=rng)

    first, second = draw(), draw()
    np.testing.assert_array_equal(first.purchased, second.purchased)
    np.testing.assert_array_equal(first.mailed, second.mailed)
