"""Decisions at silent states and the value of a version, against brute force over every mail/hold sequence."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.data.histories import compress_arrays, history_arrays
from lapsewise.decide.decisions import decide, version_mail_value
from lapsewise.decide.program import solve
from lapsewise.model.churn import expand, history_log_likelihood
from lapsewise.model.posterior import posterior
from lapsewise.model.process import Process

DISCOUNT = 1.10**-0.25


def belief_of(process: Process, purchased, mailed):
    """(n, x, b, P(alive through n), P(buy next | mailed)) of one explicit history."""
    p = np.array([purchased], dtype=np.uint8)
    m = np.array([mailed], dtype=np.uint8)
    n = np.array([len(purchased) - 1])
    hist = compress_arrays(history_arrays(p, m, n))
    post = posterior(process, hist)
    x = int(p[0, 1:].sum())
    b = int(((1 - p[0, 1:]) * (1 - m[0, 1:])).sum())
    return int(n[0]), x, b, float(post.alive_now[0]), float(post.p_buy[0])


def brute_force(process, purchased, mailed, horizon, margin, cost):
    """Exact optimal values of mailing and holding now, by backward induction over every future history.

    Every node's belief is recomputed from its full explicit history with the model's
    likelihood, so nothing here relies on the program's state compression or plan class.
    """

    def value(purchased, mailed, left):
        if left == 0:
            return 0.0
        return max(q(purchased, mailed, left, 1), q(purchased, mailed, left, 0))

    def q(purchased, mailed, left, mail):
        chance = belief_of(process, purchased, mailed)[4] * (1.0 if mail else process.rho)
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
    process = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=rho)
    purchased, mailed = history
    horizon = 4
    n, x, b, alive, _ = belief_of(process, list(purchased), list(mailed))
    program = solve(process, margin, cost, DISCOUNT, horizon, n_max=n, b_max=b)
    decision = decide(program, np.array([n]), np.array([x]), np.array([b]), np.array([alive]))
    mail, hold = brute_force(process, list(purchased), list(mailed), horizon, margin, cost)
    assert_allclose(decision.mail_value[0], mail, rtol=1e-9, atol=1e-9)
    assert_allclose(decision.hold_value[0], hold, rtol=1e-9, atol=1e-9)


def brute_force_version(process, purchased, mailed, horizon, margin, cost, response, version_cost):
    """Mail a version (response x p, its own piece cost) now, then act optimally with the full piece: by full enumeration."""
    _, _, _, _, p_buy = belief_of(process, purchased, mailed)
    chance = p_buy * response

    def value(purchased, mailed, left):
        if left == 0:
            return 0.0
        return max(brute_force(process, purchased, mailed, left, margin, cost))

    # The explicit history after silence records the quarter as mailed with response < 1: the tree
    # below recomputes beliefs by weighting the two ways silence can arise (a mailed quarter with
    # response r is, for the likelihood, (1 - r p) = lam (1 - p) + (1 - lam)(1 - rho p)).
    lam = (response - process.rho) / (1 - process.rho)
    silent_mailed = belief_weight(process, purchased + [0], mailed + [1])
    silent_held = belief_weight(process, purchased + [0], mailed + [0])
    weight_mailed = lam * silent_mailed / (lam * silent_mailed + (1 - lam) * silent_held)
    after_silence = weighted_value(process, purchased, mailed, horizon - 1, margin, cost, weight_mailed)
    buy = value(purchased + [1], mailed + [1], horizon - 1)
    return DISCOUNT * (chance * margin - version_cost) + DISCOUNT * (chance * buy + (1 - chance) * after_silence)


def belief_weight(process, purchased, mailed):
    """The likelihood of an explicit history (for mixing two beliefs)."""
    p = np.array([purchased], dtype=np.uint8)
    m = np.array([mailed], dtype=np.uint8)
    hist = compress_arrays(history_arrays(p, m, np.array([len(purchased) - 1])))
    return float(np.exp(history_log_likelihood(expand(hist), process)[0]))


def weighted_value(process, purchased, mailed, left, margin, cost, weight_mailed):
    """Best value from a belief that mixes 'last quarter mailed and silent' and 'last quarter held and silent'.

    Enumerates every mail/hold sequence of the remaining quarters as a tree on both
    component histories at once: a policy sees only the shared observable outcomes.
    """
    if left == 0:
        return 0.0
    histories = [(purchased + [0], mailed + [1]), (purchased + [0], mailed + [0])]
    weights = [weight_mailed, 1 - weight_mailed]

    def best(paths, weights, left):
        if left == 0:
            return 0.0
        options = []
        for mail in (1, 0):
            chances = [belief_of(process, p, m)[4] * (1.0 if mail else process.rho) for p, m in paths]
            chance = sum(w * c for w, c in zip(weights, chances))
            total = DISCOUNT * (chance * margin - cost * mail)
            if chance > 0:
                buy_weights = [w * c / chance for w, c in zip(weights, chances)]
                total += DISCOUNT * chance * best([(p + [1], m + [mail]) for p, m in paths], buy_weights, left - 1)
            if chance < 1:
                silent_weights = [w * (1 - c) / (1 - chance) for w, c in zip(weights, chances)]
                total += DISCOUNT * (1 - chance) * best([(p + [0], m + [mail]) for p, m in paths], silent_weights, left - 1)
            options.append(total)
        return max(options)

    return best(histories, weights, left)


@pytest.mark.parametrize("rho", [0.0, 0.35])
@pytest.mark.parametrize("response, version_cost", [(0.6, 0.4), (0.85, 0.7)])
def test_value_of_a_version_matches_brute_force(rho, response, version_cost):
    process = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=rho)
    purchased, mailed = [1, 0, 1, 0, 0], [0, 1, 1, 1, 1]
    horizon, margin, cost = 4, 18.0, 0.9
    n, x, b, alive, _ = belief_of(process, purchased, mailed)
    program = solve(process, margin, cost, DISCOUNT, horizon, n_max=n, b_max=b)
    ours = version_mail_value(program, np.array([n]), np.array([x]), np.array([b]), np.array([alive]), response, version_cost)[0]
    expected = brute_force_version(process, purchased, mailed, horizon, margin, cost, response, version_cost)
    assert_allclose(ours, expected, rtol=1e-9, atol=1e-9)


def test_the_best_plan_in_blocks_equals_the_maximum_of_the_summed_plan_values(monkeypatch):
    """The fast best_plan (blocks of rows, no states x plans array for all states) against its plain twin."""
    from lapsewise.decide import decisions

    process = Process(1.2, 2.5, 0.7, 4.0, 0.3)
    program = solve(process, 20.0, 0.9, DISCOUNT, 6, n_max=12, b_max=4, n_min=2, x_max=8)
    rng = np.random.default_rng(4)
    size = 1000
    n = rng.integers(3, 13, size)
    x = np.minimum(rng.integers(0, 9, size), n - 1)
    b = np.minimum(rng.integers(0, 5, size), n - x)
    alive, total = rng.uniform(0.05, 1.0, size), rng.uniform(0.5, 1.0, size)
    held = rng.uniform(0.0, 0.5, size)
    monkeypatch.setattr(decisions, "BEST_PLAN_ROWS", 77)  # many blocks, the last one short
    plain = decisions.stretch_plan_values(program, n, x, b, alive, total, 5) + decisions.stretch_plan_values(program, n, x, b + 1, held, np.zeros(size), 5)
    fast = decisions.best_plan(program, 5, (n, x, b, alive, total), (n, x, b + 1, held, np.zeros(size)))
    assert_allclose(fast, plain.max(axis=1), rtol=1e-13, atol=1e-13)
    one = decisions.best_plan(program, 5, (n, x, b, alive, total), first=1)
    assert_allclose(one, decisions.stretch_plan_values(program, n, x, b, alive, total, 5)[:, 1:].max(axis=1), rtol=1e-13, atol=1e-13)
