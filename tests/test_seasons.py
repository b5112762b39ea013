"""The seasonal likelihood: exact against direct integration, equal to the plain one without seasons, its gradient,
its quadrature nodes, the posterior with seasons, and recovery of rho and the seasons from peak-targeted mailing."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, special, stats

from builders import SEASONAL_TRUTH, seasonal_panel, simulated_panel
from lapsewise.data.histories import compress, compress_arrays, history_arrays
from lapsewise.model.churn import evaluate, expand, fit_churn
from lapsewise.model.posterior import dert, expected_orders, posterior
from lapsewise.model.process import Process
from lapsewise.model.seasons import beta_nodes, evaluate_seasonal, expand_seasonal, fit_seasons

PROCESS = Process(0.9, 2.6, 0.7, 3.5, 0.45, (0.8, 1.0, 0.55, 0.7))


def _one_history(purchased, mailed, phase):
    purchased = np.array([purchased], dtype=np.uint8)
    mailed = np.array([mailed], dtype=np.uint8)
    n = np.array([purchased.shape[1] - 1])
    return compress_arrays(history_arrays(purchased, mailed, n, np.array([phase])))


def _direct_likelihood(process, purchased, mailed, phase):
    """The model's definition integrated numerically with SciPy's quad: the sum over the last quarter alive tau of
    E_theta[(1-theta)^tau theta^(tau<n)] * E_p[prod_{t<=tau} (c_t p if bought else 1 - c_t p)], p and theta being
    independent Beta variables; each expectation is quad with the Beta density's algebraic end-point singularities
    as its weight (QUADPACK's QAWS, weight='alg')."""
    n = len(purchased) - 1
    t_x = max([t for t in range(1, n + 1) if purchased[t]], default=0)
    c = [process.season((phase + t) % 4) * (1.0 if mailed[t] else process.rho) for t in range(n + 1)]

    def expectation(function, a, b):
        value, _ = integrate.quad(function, 0, 1, weight="alg", wvar=(a - 1, b - 1), epsabs=0, epsrel=1e-12, limit=200)
        return value / special.beta(a, b)

    total = 0.0
    for tau in range(t_x, n + 1):
        churn = expectation(lambda theta: (1 - theta) ** tau * (theta if tau < n else 1.0), process.gamma, process.delta)
        purchases = expectation(lambda p: math.prod(c[t] * p if purchased[t] else 1 - c[t] * p for t in range(1, tau + 1)), process.alpha, process.beta)
        total += churn * purchases
    return total


@pytest.mark.parametrize(
    "purchased, mailed, phase",
    [
        ([1, 0, 1, 0, 0, 1, 0, 0], [0, 1, 1, 0, 1, 1, 0, 1], 1),
        ([1, 1, 0, 0, 0], [0, 0, 1, 1, 0], 3),
        ([1, 0, 0, 0, 0, 0], [0, 1, 0, 1, 1, 1], 0),
    ],
)
def test_seasonal_likelihood_equals_direct_integration(purchased, mailed, phase):
    # Reference: SciPy's quad of the model's definition (module docstring of lapsewise.model.seasons).
    histories = _one_history(purchased, mailed, phase)
    row, _ = evaluate_seasonal(expand_seasonal(histories), PROCESS)
    assert_allclose(math.exp(row[0]), _direct_likelihood(PROCESS, purchased, mailed, phase), rtol=1e-10)


def test_seasonal_likelihood_reduces_to_the_plain_one_with_every_season_at_one():
    # With s = (1, 1, 1, 1) the seasonal likelihood is today's, history by history (the plain one is exact too).
    panel = simulated_panel(3_000, seed=4)
    plain = compress(panel)
    seasonal = compress(panel, seasons=True)
    process = Process(1.1, 2.7, 0.8, 4.2, 0.35)
    plain_rows = evaluate(expand(plain), process)[0][plain.inverse]
    seasonal_rows = evaluate_seasonal(expand_seasonal(seasonal), dataclasses.replace(process, seasons=(1.0,) * 4))[0][seasonal.inverse]
    assert_allclose(seasonal_rows, plain_rows, rtol=1e-10)
    # The gradient by alpha..rho agrees with the plain exact gradient (alpha and beta by central differences, 1e-7).
    _, _, plain_gradient = evaluate(expand(plain), process, gradient=True)
    _, _, seasonal_gradient = evaluate_seasonal(expand_seasonal(seasonal), dataclasses.replace(process, seasons=(1.0,) * 4), gradient=True)
    assert_allclose(seasonal_gradient[:5], plain_gradient, rtol=1e-7)


def test_seasonal_gradient_equals_differences_of_the_likelihood():
    panel = seasonal_panel(2_000, seed=3)
    histories = compress(panel, seasons=True)
    expansion = expand_seasonal(histories)

    def total(process):
        return float(np.dot(histories.count, evaluate_seasonal(expansion, process)[0]))

    _, _, gradient = evaluate_seasonal(expansion, PROCESS, gradient=True)
    step = 1e-6
    differences = []
    for name in ("alpha", "beta", "gamma", "delta", "rho"):
        up = dataclasses.replace(PROCESS, **{name: getattr(PROCESS, name) + step})
        down = dataclasses.replace(PROCESS, **{name: getattr(PROCESS, name) - step})
        differences.append((total(up) - total(down)) / (2 * step))
    for q in range(4):
        up, down = list(PROCESS.seasons), list(PROCESS.seasons)
        up[q] += step
        down[q] -= step
        differences.append((total(dataclasses.replace(PROCESS, seasons=tuple(up))) - total(dataclasses.replace(PROCESS, seasons=tuple(down)))) / (2 * step))
    assert_allclose(gradient, differences, rtol=1e-5, atol=1e-3)


@pytest.mark.parametrize("alpha, beta", [(0.8, 3.0), (0.05, 0.3), (25.0, 400.0), (1e4, 1e4), (3.0, 0.02)])
def test_quadrature_nodes_integrate_beta_moments_exactly(alpha, beta):
    # Reference: E[p^k (1-p)^j] = B(alpha + k, beta + j) / B(alpha, beta) (SciPy betaln); J nodes are exact to degree 2J - 1.
    nodes = 30
    p, log_weights = beta_nodes(alpha, beta, nodes)
    assert_allclose(np.exp(log_weights).sum(), 1.0, rtol=1e-12)
    for k, j in [(0, 0), (1, 0), (5, 7), (30, 29), (0, 59)]:
        exact = special.betaln(alpha + k, beta + j) - special.betaln(alpha, beta)
        quadrature = special.logsumexp(log_weights + k * np.log(p) + j * np.log1p(-p))
        assert abs(quadrature - exact) < 1e-8 * max(1.0, abs(exact)), (k, j)


def test_posterior_with_seasons_at_one_equals_the_plain_posterior_and_dert_sums_its_terms():
    panel = simulated_panel(2_000, seed=9)
    plain, seasonal = compress(panel), compress(panel, seasons=True)
    process = Process(1.1, 2.7, 0.8, 4.2, 0.35)
    flat = dataclasses.replace(process, seasons=(1.0, 1.0, 1.0, 1.0 - 1e-12))  # seasonal path, multipliers 1 to 1e-12
    a, b = posterior(process, plain), posterior(flat, seasonal)
    assert_allclose(b.p_alive[seasonal.inverse], a.p_alive[plain.inverse], rtol=1e-8)
    assert_allclose(b.p_buy[seasonal.inverse], a.p_buy[plain.inverse], rtol=1e-8)
    assert_allclose(dert(flat, b, 0.024)[seasonal.inverse], dert(process, a, 0.024)[plain.inverse], rtol=1e-8)
    # With real seasons: DERT and expected orders against the plain sums of their terms,
    # P(buy in n + h) = s_(quarter of n + h) * buy factor * E[(1-theta)^(n+h)] (the posterior module's definition).
    seasonal_process = dataclasses.replace(process, seasons=(0.6, 1.0, 0.3, 0.8))
    post = posterior(seasonal_process, seasonal)
    h = np.arange(1, 4001)
    rows = np.arange(min(40, seasonal.size))
    survival = np.exp(special.betaln(process.gamma, process.delta + seasonal.n[rows, None] + h) - special.betaln(process.gamma, process.delta))
    multiplier = np.asarray(seasonal_process.seasons)[(seasonal.phase[rows, None] + seasonal.n[rows, None] + h) % 4]
    terms = np.exp(post.log_buy_factor[rows, None]) * survival * multiplier
    assert_allclose(dert(seasonal_process, post, 0.024)[rows], (terms / 1.024**h).sum(axis=1), rtol=1e-9)
    assert_allclose(expected_orders(seasonal_process, post, 4)[rows], terms[:, :4].sum(axis=1), rtol=1e-12)
    assert_allclose(post.p_buy[rows], terms[:, 0], rtol=1e-12)


def test_peak_targeted_mailing_in_a_seasonal_world_is_recovered_with_seasons_and_biased_without():
    # Simulation recovery, fixed seed: true rho 0.6 and demand 1.6 / 0.8 / 0.6 / 1.0 by quarter of the year (scaled
    # to a largest of 1), mailing aimed at the peak and at recent buyers. With seasons the fit lands within four
    # standard errors of every true value; without them rho falls far below the truth (the bias the seasons remove).
    panel = seasonal_panel(6_000, seed=11)
    plain = fit_churn(compress(panel), True)
    assert plain.rho < 0.5
    fitted = fit_seasons(compress(panel, seasons=True), True, plain)
    assert abs(fitted.rho - SEASONAL_TRUTH["rho"]) < 4 * fitted.std_errors["rho"]
    for q, truth in enumerate(SEASONAL_TRUTH["seasons"]):
        error = fitted.std_errors[f"season_{q + 1}"]
        if error is None:  # the reference quarter, fixed at 1
            assert fitted.seasons[q] == 1.0 and truth == 1.0
        else:
            assert abs(fitted.seasons[q] - truth) < 4 * error, q
    for name in ("alpha", "beta", "gamma", "delta"):
        assert abs(getattr(fitted, name) - SEASONAL_TRUTH[name]) < 4 * fitted.std_errors[name], name
    assert fitted.season_test["p_value"] < 1e-6 and fitted.season_test["degrees_of_freedom"] == 3


def test_seasons_without_evidence_are_not_significant():
    # Data with no seasons: the likelihood-ratio statistic is chi-square with 3 degrees of freedom under the null,
    # so it is below its 99.9% point (16.27) with overwhelming probability.
    panel = simulated_panel(4_000, seed=12)
    plain = fit_churn(compress(panel), True)
    fitted = fit_seasons(compress(panel, seasons=True), True, plain)
    assert fitted.season_test["statistic"] < stats.chi2.ppf(0.999, 3)
    assert fitted.log_likelihood >= plain.log_likelihood - 1e-6


@pytest.mark.parametrize("phase", [0, 1, 2, 3])
def test_the_seasonal_likelihoods_of_every_possible_history_sum_to_one(phase):
    # A probability model: over all 2^6 purchase patterns of quarters 1..6 (quarter 0 is the first purchase), with a
    # fixed mail pattern, the likelihoods of the histories must sum to 1 (the law of total probability).
    import itertools

    mailed = [0, 1, 0, 1, 1, 0, 1]
    patterns = np.array([[1, *bits] for bits in itertools.product([0, 1], repeat=6)], dtype=np.uint8)
    histories = compress_arrays(history_arrays(patterns, np.tile(np.array(mailed, dtype=np.uint8), (len(patterns), 1)), np.full(len(patterns), 6), np.full(len(patterns), phase)))
    rows, _ = evaluate_seasonal(expand_seasonal(histories), PROCESS)
    assert histories.size == 64
    assert_allclose(np.exp(rows).sum(), 1.0, rtol=1e-12)


def test_the_fast_expansion_equals_the_definition_customer_by_customer():
    # The plain twin of expand_seasonal and evaluate_seasonal: each customer's likelihood from the model's definition,
    # quarter by quarter (_direct_likelihood: SciPy quad, no packing, no shared states), on 60 customers of a simulated
    # seasonal panel with peak-targeted mailing; the fast path compresses them and evaluates each distinct history.
    panel = seasonal_panel(60, seed=17, quarters=12)
    histories = compress(panel, seasons=True)
    rows, _ = evaluate_seasonal(expand_seasonal(histories), PROCESS)
    fast = np.exp(rows[histories.inverse])
    plain = [
        _direct_likelihood(PROCESS, panel.purchased[i, : panel.n[i] + 1], panel.mailed[i, : panel.n[i] + 1], int(panel.first_quarter[i] % 4))
        for i in range(panel.customers)
    ]
    assert_allclose(fast, plain, rtol=1e-9)
