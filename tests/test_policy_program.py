"""The stop-rule program against brute force, the breakeven rule and the margin multiple."""

import itertools

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.churn import ChurnFit, posterior
from lapsewise.panel import compress_arrays, history_arrays
from lapsewise.policy import Beliefs, decide, solve

DISCOUNT = 1.10**-0.25


def belief_of(beliefs: Beliefs, purchased, mailed):
    """(n, x, b, P(alive through n), P(buy next | mailed)) of one explicit history."""
    p = np.array([purchased], dtype=np.uint8)
    m = np.array([mailed], dtype=np.uint8)
    n = np.array([len(purchased) - 1])
    hist = compress_arrays(history_arrays(p, m, n))
    post = posterior(beliefs.churn_fit(), hist)
    x = int(p[0, 1:].sum())
    b = int(((1 - p[0, 1:]) * (1 - m[0, 1:])).sum())
    return int(n[0]), x, b, float(post.alive_now[0]), float(post.p_buy[0])


def brute_force(beliefs, purchased, mailed, horizon, margin, cost):
    """Exact optimal values of mailing and holding now, by backward induction over every future history.

    Every node's belief is recomputed from its full explicit history with the model's
    likelihood, so nothing here relies on the program's state compression or plan class.
    """

    def value(purchased, mailed, left):
        if left == 0:
            return 0.0
        return max(q(purchased, mailed, left, 1), q(purchased, mailed, left, 0))

    def q(purchased, mailed, left, mail):
        chance = belief_of(beliefs, purchased, mailed)[4] * (1.0 if mail else beliefs.rho)
        buy = value(purchased + [1], mailed + [mail], left - 1) if chance > 0 else 0.0
        silent = value(purchased + [0], mailed + [mail], left - 1)
        return DISCOUNT * (chance * margin - cost * mail) + DISCOUNT * (chance * buy + (1 - chance) * silent)

    return q(purchased, mailed, horizon, 1), q(purchased, mailed, horizon, 0)


HISTORIES = [
    ([1, 0, 1, 0, 0], [0, 1, 1, 1, 1]),  # two purchases, two mailed silent quarters
    ([1, 1, 0, 0, 0, 0], [0, 1, 1, 0, 0, 1]),  # an unmailed stretch
    ([1, 0, 0], [0, 1, 1]),
    ([1, 0, 1, 1, 0, 0, 0, 0], [0, 0, 1, 1, 1, 1, 0, 0]),
]


@pytest.mark.parametrize("rho", [0.0, 0.35])
@pytest.mark.parametrize("history", HISTORIES)
@pytest.mark.parametrize("margin, cost", [(18.0, 0.9), (30.0, 4.0), (10.0, 2.5)])
def test_program_matches_brute_force_over_every_mail_hold_sequence(rho, history, margin, cost):
    beliefs = Beliefs(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=rho)
    purchased, mailed = history
    horizon = 4
    n, x, b, alive, _ = belief_of(beliefs, list(purchased), list(mailed))
    program = solve(beliefs, margin, cost, DISCOUNT, horizon, n_max=n, b_max=b)
    decision = decide(program, np.array([n]), np.array([x]), np.array([b]), np.array([alive]))
    mail, hold = brute_force(beliefs, list(purchased), list(mailed), horizon, margin, cost)
    assert_allclose(decision.mail_value[0], mail, rtol=1e-9, atol=1e-9)
    assert_allclose(decision.hold_value[0], hold, rtol=1e-9, atol=1e-9)
