"""The stop-rule program against outside results (the breakeven rule, the margin multiple), its plain twin,
and its restriction to the states asked about."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.data.histories import mailed_silent_histories
from lapsewise.decide.decisions import decide
from lapsewise.decide.program import decision_process, solve
from lapsewise.errors import InputError
from lapsewise.model.churn import ChurnFit
from lapsewise.model.posterior import posterior
from lapsewise.model.process import Process

DISCOUNT = 1.10**-0.25


FIT = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)


def silent_states(rho, count=60, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.integers(0, 8, count)
    t_x = x + rng.integers(0, 6, count)
    k = rng.integers(0, 10, count)
    process = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, rho)
    hist = mailed_silent_histories(x, t_x, k)
    post = posterior(process, hist)
    return process, t_x + k, x, post.alive_now[hist.inverse], post.p_buy[hist.inverse]


@pytest.mark.parametrize("margin", [3.0, 8.0, 20.0])
def test_horizon_one_is_the_breakeven_rule(margin):
    # Common practice, no source: mail exactly when P(order) x margin >= piece cost.
    process, n, x, alive, p_buy = silent_states(0.0)
    program = solve(process, margin, 0.9, DISCOUNT, 1, n_max=int(n.max()), b_max=0)
    decision = decide(program, n, x, np.zeros_like(n), alive)
    np.testing.assert_array_equal(decision.mail, p_buy * margin >= 0.9)
    # The value of mailing is the discounted one-quarter difference.
    assert_allclose(decision.value_of_mailing, DISCOUNT * (p_buy * margin - 0.9), rtol=1e-12, atol=1e-12)


def test_horizon_one_with_unprompted_orders_counts_only_the_orders_the_piece_adds():
    # With held customers ordering at rho times the rate, the piece adds (1 - rho) P(order).
    process, n, x, alive, p_buy = silent_states(0.3)
    program = solve(process, 8.0, 0.9, DISCOUNT, 1, n_max=int(n.max()), b_max=0)
    decision = decide(program, n, x, np.zeros_like(n), alive)
    np.testing.assert_array_equal(decision.mail, (1 - 0.3) * p_buy * 8.0 >= 0.9)


@pytest.mark.parametrize("p, theta", [(0.3, 0.1), (0.6, 0.25), (0.15, 0.05)])
def test_free_mailing_of_a_single_customer_type_gives_the_margin_multiple(p, theta):
    # Gupta & Lehmann (2003), "Customers as Assets", J. Interactive Marketing 17(1):
    # value of a customer alive now = m * r / (1 + i - r), with m = p * margin per quarter,
    # r = 1 - theta the retention rate and i the quarterly discount rate.
    concentration = 1e7  # Beta distributions this tight make everyone the same type
    process = Process(p * concentration, (1 - p) * concentration, theta * concentration, (1 - theta) * concentration, 0.0)
    margin, horizon = 20.0, 120
    program = solve(process, margin, 0.0, DISCOUNT, horizon, n_max=0, b_max=0)
    decision = decide(program, np.array([0]), np.array([0]), np.array([0]), np.array([1.0]))
    i, r = 1 / DISCOUNT - 1, 1 - theta
    truncation = 1 - (r / (1 + i)) ** horizon  # the sum stops after the horizon
    assert_allclose(decision.value[0], p * margin * r / (1 + i - r) * truncation, rtol=1e-5)


def test_with_rho_zero_the_policy_is_a_stopping_rule():
    # Holding teaches nothing when held customers cannot order: once dropped, never mailed again.
    process = Process(FIT.alpha, FIT.beta, FIT.gamma, FIT.delta, 0.0)
    program = solve(process, 12.0, 0.9, DISCOUNT, 20, n_max=40, b_max=25)
    for x, t_x in [(0, 0), (2, 5), (6, 9)]:
        decisions = []
        b = 0
        for k in range(25):
            hist = mailed_silent_histories(np.array([x]), np.array([t_x]), np.array([k]))
            alive = posterior(process, hist).alive_now[0]
            decisions.append(bool(decide(program, np.array([t_x + k]), np.array([x]), np.array([b]), np.array([alive])).mail[0]))
        first_hold = decisions.index(False) if False in decisions else len(decisions)
        assert all(decisions[:first_hold]) and not any(decisions[first_hold:])


@pytest.mark.parametrize("rho", [0.0, 0.3])
def test_program_solved_only_for_later_quarters_gives_the_same_decisions(rho):
    # The program computes only the states reachable from n >= n_min (customer values use this per spend band);
    # on those states it must agree with the program solved for every n (the brute-force tests above check that one).
    process = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=rho)
    horizon, n_min, n_max = 12, 7, 15
    full = solve(process, 25.0, 1.5, DISCOUNT, horizon, n_max=n_max, b_max=4, n_min=0, x_max=9)
    part = solve(process, 25.0, 1.5, DISCOUNT, horizon, n_max=n_max, b_max=4, n_min=n_min, x_max=9)
    n, x, b = np.meshgrid(np.arange(n_min, n_max + 1), np.arange(0, 10), np.arange(0, 5), indexing="ij")
    n, x, b = n.ravel(), x.ravel(), b.ravel()
    valid = x + b <= n
    n, x, b = n[valid], x[valid], b[valid]
    alive = np.linspace(0.2, 1.0, len(n))
    expected, got = decide(full, n, x, b, alive), decide(part, n, x, b, alive)
    assert_allclose(got.mail_value, expected.mail_value, rtol=1e-12, atol=1e-12)
    assert_allclose(got.hold_value, expected.hold_value, rtol=1e-12, atol=1e-12)


def test_program_refuses_a_state_below_the_quarters_it_was_solved_for():
    # The tables keep only the quarters reachable from n_min..n_max (and one quarter earlier, which the
    # hold value's step reaches); a state before that would read another quarter's value, so it is refused.
    process = Process(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=0.3)
    program = solve(process, 25.0, 1.5, DISCOUNT, 6, n_max=10, b_max=2, n_min=5, x_max=4)
    decide(program, np.array([5, 10]), np.array([1, 4]), np.array([0, 2]), np.array([0.5, 0.5]))  # inside: answered
    with pytest.raises(ValueError):
        decide(program, np.array([3]), np.array([1]), np.array([0]), np.array([0.5]))


# ---------------------------------------------------------------- the fast program against its plain twin


@pytest.mark.parametrize("seed", range(6))
def test_solve_equals_the_plain_recursion_state_by_state(seed):
    # The fast solve (banded tables, running products, two threads) against PlainProgram, which evaluates the
    # recursion of the program's docstring one state at a time with the likelihood's own p-moments.
    from lapsewise.decide.reference import PlainProgram

    rng = np.random.default_rng(seed)
    rho = [0.0, 0.3, 0.6][seed % 3]
    process = Process(*rng.uniform([0.5, 1.0, 0.4, 2.0], [2.0, 4.0, 1.5, 6.0]), rho)
    margin, cost, horizon = rng.uniform(8, 30), rng.uniform(0.5, 3.0), 5
    n_min, n_max, b_max, x_max = 2, 6, 2, 4
    program = solve(process, margin, cost, DISCOUNT, horizon, n_max=n_max, b_max=b_max, n_min=n_min, x_max=x_max)
    plain = PlainProgram(process, margin, cost, DISCOUNT)
    for h in range(horizon):
        # The states reachable with h quarters left from the states asked about.
        ahead = horizon - h
        for n in range(max(n_min + ahead - 1, 0), n_max + ahead + 1):
            for x in range(0, min(n, x_max + ahead) + 1):
                for b in range(0, min(n - x, b_max + ahead if rho > 0 else b_max) + 1):
                    assert_allclose(program.after_purchase_at(h, b, x, n), plain.after_purchase(h, n, x, b), rtol=1e-10, atol=1e-12)
                    assert_allclose(program.hold_throughout_at(h, b, x, n), plain.hold_throughout(h, n, x, b), rtol=1e-10, atol=1e-12)
    # Decisions at silent states, and the value of two versions, against the plain ones.
    n = rng.integers(n_min, n_max + 1, 20)
    x = np.minimum(rng.integers(0, x_max + 1, 20), n)
    b = np.minimum(rng.integers(0, b_max + 1, 20), n - x)
    alive = rng.uniform(0.1, 1.0, 20)
    decisions = decide(program, n, x, b, alive)
    for i in range(20):
        args = (horizon, int(n[i]), int(x[i]), int(b[i]), float(alive[i]))
        assert_allclose(decisions.mail_value[i], plain.mail_value(*args), rtol=1e-10, atol=1e-12)
        assert_allclose(decisions.hold_value[i], plain.hold_value(*args), rtol=1e-10, atol=1e-12)
    from lapsewise.decide.decisions import version_mail_value

    for response, piece in ((0.7, 0.5), (1.0, cost)):
        ours = version_mail_value(program, n, x, b, alive, response, piece)
        theirs = [plain.version_mail_value(horizon, int(n[i]), int(x[i]), int(b[i]), float(alive[i]), response, piece) for i in range(20)]
        assert_allclose(ours, theirs, rtol=1e-10, atol=1e-12)


def test_a_program_too_large_for_the_free_memory_is_refused_before_any_work(monkeypatch):
    from lapsewise.decide import program as program_module
    from lapsewise.errors import InputError

    needed = program_module.program_bytes(40, 80, 0, 0, 40, rho=0.3)
    monkeypatch.setattr(program_module, "available_memory", lambda: needed // 2)
    with pytest.raises(InputError, match="looking 40 quarters ahead .* needs about .* GB of memory"):
        solve(FIT, 16.0, 0.9, DISCOUNT, 40, n_max=80, b_max=0, n_min=0, x_max=40)


def test_the_memory_estimate_is_what_the_program_takes():
    # Reference: Python's own accounting of the arrays numpy allocates (tracemalloc), at a modest size.
    import tracemalloc

    from lapsewise.decide.program import program_bytes

    tracemalloc.start()
    solve(FIT, 16.0, 0.9, DISCOUNT, 20, n_max=40, b_max=0, n_min=0, x_max=20)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    estimate = program_bytes(20, 40, 0, 0, 20, rho=0.3)
    assert 0.8 * peak <= estimate <= 1.5 * peak


def test_decision_process_without_rho():
    fit = ChurnFit(alpha=1.1, beta=2.4, gamma=0.7, delta=4.5, rho=None)
    # No mailings file: a held customer is taken never to order (rho 0), as the README says.
    assert decision_process(fit).rho == 0.0
    # Fitted on a mailings file that mailed every quarter: rho was not estimable, so the policy must give it.
    with pytest.raises(InputError, match=r"^season.toml: unmailed_response is required: .*could not be estimated"):
        decision_process(fit, None, rho_estimable=False, policy_source="season.toml")
    assert decision_process(fit, 0.25, rho_estimable=False, policy_source="season.toml").rho == 0.25
    # A model whose rho was estimated is never refused.
    assert decision_process(ChurnFit(1.1, 2.4, 0.7, 4.5, rho=0.4), None, rho_estimable=False).rho == 0.4
