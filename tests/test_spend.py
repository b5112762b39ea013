"""Tests of the gamma-gamma order-value model (lapsewise.model.spend).

The closed forms are checked against direct numerical integration with SciPy of
the model as it is stated: a customer's order values are Gamma(shape p, rate nu)
and nu is Gamma(shape q, rate gamma) across customers. The fit is checked by
recovering known parameters from simulated customers.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, stats
from scipy.special import digamma

from lapsewise.errors import InputError
from lapsewise.model.spend import SpendFit, expected_order_value, fit_spend, spend_log_likelihood


def per_customer_gradient(p: float, q: float, gamma: float, x: np.ndarray, m_x: np.ndarray) -> np.ndarray:
    """Derivative of the summed log-likelihood with respect to (p, q, gamma), customer by customer: the plain
    form the fit's per-x sums must equal."""
    px = p * x
    log_total = np.log(gamma + m_x * x)
    common = digamma(px + q)
    d_p = x * (common - digamma(px) + np.log(m_x) + np.log(x) - log_total)
    d_q = common - digamma(q) + np.log(gamma) - log_total
    d_gamma = q / gamma - (px + q) / (gamma + m_x * x)
    return np.array([d_p.sum(), d_q.sum(), d_gamma.sum()])


# (p, q, gamma, x, m_x): a typical customer, a one-purchase customer with p < 1,
# a heavy-tailed population (q < 1), and a frequent buyer far above the population mean.
CASES = [
    (6.0, 4.0, 22.5, 3, 40.0),
    (0.8, 2.5, 5.0, 1, 3.0),
    (2.0, 0.9, 10.0, 7, 12.0),
    (3.0, 5.0, 40.0, 12, 95.0),
]

TRUE_P, TRUE_Q, TRUE_GAMMA = 6.0, 4.0, 22.5


def simulate(seed: int, customers: int, p: float, q: float, gamma: float, dependence: float = 0.0):
    """Customers with x drawn from 1..10 and m_x from the model.

    The mean of x Gamma(p, rate nu) order values is Gamma(shape p x, rate nu x).
    With ``dependence > 0`` each customer's nu is divided by ``x ** dependence``, so
    frequent buyers spend more per order (a violation of the model's assumption).
    """
    rng = np.random.default_rng(seed)
    x = rng.integers(1, 11, customers)
    nu = rng.gamma(q, 1.0 / gamma, customers) / x**dependence
    m_x = rng.gamma(p * x, 1.0 / (nu * x))
    return x, m_x


def density_by_integration(p: float, q: float, gamma: float, x: int, m_x: float) -> float:
    """Density of m_x: the Gamma(p x, rate nu x) density integrated against Gamma(q, rate gamma) over nu."""

    def integrand(nu: float) -> float:
        return stats.gamma.pdf(m_x, a=p * x, scale=1.0 / (nu * x)) * stats.gamma.pdf(nu, a=q, scale=1.0 / gamma)

    value, _ = integrate.quad(integrand, 0, np.inf, epsabs=0, epsrel=1e-11, limit=200)
    return value


@pytest.fixture(scope="module")
def recovery():
    """20,000 simulated customers from p = 6, q = 4, gamma = 22.5 and their fit."""
    x, m_x = simulate(seed=20050401, customers=20_000, p=TRUE_P, q=TRUE_Q, gamma=TRUE_GAMMA)
    return x, m_x, fit_spend(x, m_x)


# ---------------------------------------------------------------- the closed forms


@pytest.mark.parametrize("p, q, gamma, x, m_x", CASES)
def test_density_equals_the_gamma_mixture_integrated_over_nu(p, q, gamma, x, m_x):
    # Source: SciPy. scipy.integrate.quad of scipy.stats.gamma densities, the model as stated.
    expected = density_by_integration(p, q, gamma, x, m_x)
    assert_allclose(np.exp(spend_log_likelihood(p, q, gamma, np.array([x]), np.array([m_x]))), [expected], rtol=1e-8)


@pytest.mark.parametrize("p, q, gamma, x, m_x", CASES)
def test_density_integrates_to_one_over_mean_value(p, q, gamma, x, m_x):
    # Source: a density integrates to 1; the integral by scipy.integrate.quad.
    def density(m: float) -> float:
        return float(np.exp(spend_log_likelihood(p, q, gamma, np.array([x]), np.array([m])))[0])

    # Split at m_x so quad sees both the body and the tail of the density.
    total = integrate.quad(density, 0, m_x, limit=200)[0] + integrate.quad(density, m_x, np.inf, limit=200)[0]
    assert_allclose(total, 1.0, rtol=1e-7)


def test_log_likelihood_is_vectorized_over_customers():
    # Source: each element equals the scalar call (the CASES above, one array).
    p, q, gamma = 2.0, 3.0, 15.0
    x = np.array([case[3] for case in CASES])
    m_x = np.array([case[4] for case in CASES])
    one_by_one = [spend_log_likelihood(p, q, gamma, np.array([xi]), np.array([mi]))[0] for xi, mi in zip(x, m_x)]
    assert_allclose(spend_log_likelihood(p, q, gamma, x, m_x), one_by_one, rtol=1e-14)


def test_gradient_matches_finite_differences_of_the_log_likelihood():
    # Source: central differences of the summed log-likelihood (relative step 1e-6, error of order 1e-10).
    x, m_x = simulate(seed=7, customers=200, p=TRUE_P, q=TRUE_Q, gamma=TRUE_GAMMA)
    x = x.astype(float)
    point = np.array([5.0, 3.5, 20.0])
    numeric = []
    for j in range(3):
        step = np.zeros(3)
        step[j] = 1e-6 * point[j]
        up = spend_log_likelihood(*(point + step), x, m_x).sum()
        down = spend_log_likelihood(*(point - step), x, m_x).sum()
        numeric.append((up - down) / (2 * step[j]))
    assert_allclose(per_customer_gradient(*point, x, m_x), numeric, rtol=1e-6)


@pytest.mark.parametrize("p, q, gamma, x, m_x", CASES)
def test_conditional_expectation_equals_the_posterior_mean_by_integration(p, q, gamma, x, m_x):
    # Source: Bayes' rule by scipy.integrate.quad: E[p / nu | m_x] = integral of (p / nu) f(m_x | nu) g(nu)
    # divided by integral of f(m_x | nu) g(nu), with f the Gamma(p x, rate nu x) density and g the
    # Gamma(q, rate gamma) prior.
    def joint(nu: float) -> float:
        return stats.gamma.pdf(m_x, a=p * x, scale=1.0 / (nu * x)) * stats.gamma.pdf(nu, a=q, scale=1.0 / gamma)

    numerator = integrate.quad(lambda nu: p / nu * joint(nu), 0, np.inf, epsabs=0, epsrel=1e-11, limit=200)[0]
    denominator = integrate.quad(joint, 0, np.inf, epsabs=0, epsrel=1e-11, limit=200)[0]
    fit = SpendFit(p=p, q=q, gamma=gamma)
    assert_allclose(expected_order_value(fit, np.array([x]), np.array([m_x])), [numerator / denominator], rtol=1e-8)


def test_customers_without_repeat_purchases_get_the_population_mean():
    # Source: E[p / nu] under the Gamma(q = 4, rate gamma = 22.5) prior by scipy.integrate.quad,
    # which is p gamma / (q - 1) = 6 * 22.5 / 3 = 45.
    prior = stats.gamma(a=TRUE_Q, scale=1.0 / TRUE_GAMMA)
    population = integrate.quad(lambda nu: TRUE_P / nu * prior.pdf(nu), 0, np.inf, epsabs=0, epsrel=1e-11)[0]
    assert_allclose(population, 45.0, rtol=1e-9)
    fit = SpendFit(p=TRUE_P, q=TRUE_Q, gamma=TRUE_GAMMA)
    assert_allclose(fit.population_mean, population, rtol=1e-12)
    # x = 0, a NaN mean, a non-positive mean: none carries information, all get the population mean.
    values = expected_order_value(fit, np.array([0, 2, 3]), np.array([np.nan, np.nan, 0.0]))
    assert_allclose(values, [population] * 3, rtol=1e-12)


def test_expected_order_value_is_undefined_where_the_posterior_mean_is_infinite():
    # Source: the posterior of nu is Gamma(q + p x, rate gamma + x m_x); E[1 / nu] is finite
    # only when q + p x > 1. With p = 0.3, q = 0.5: x = 0 and x = 1 (0.8) are undefined, x = 2 (1.1) is
    # (10 + 2 * 4) * 0.3 / 0.1 = 54.
    fit = SpendFit(p=0.3, q=0.5, gamma=10.0)
    values = expected_order_value(fit, np.array([0, 1, 2]), np.array([np.nan, 4.0, 4.0]))
    assert np.isnan(values[0]) and np.isnan(values[1])
    assert_allclose(values[2], 54.0, rtol=1e-12)
    assert math.isnan(fit.population_mean)


# ---------------------------------------------------------------- fitting


def test_fit_recovers_simulated_parameters(recovery):
    # Source: simulation from the model with p = 6, q = 4, gamma = 22.5 (seed 20050401, 20,000 customers).
    # Each true value lies within 3.3 standard errors (a 99.9% interval) of its estimate.
    _, _, fit = recovery
    assert fit.converged
    assert fit.customers == 20_000
    assert fit.warnings == ()
    for name, truth in {"p": TRUE_P, "q": TRUE_Q, "gamma": TRUE_GAMMA}.items():
        estimate, error = getattr(fit, name), fit.std_errors[name]
        assert error is not None and error > 0
        assert abs(estimate - truth) <= 3.3 * error, (name, estimate, error)
    # Source: the true population mean p gamma / (q - 1) = 6 * 22.5 / 3 = 45.
    assert_allclose(fit.population_mean, 45.0, rtol=0.03)


def test_fit_is_the_maximum_of_the_log_likelihood(recovery):
    # Source: at a maximum, no small step in any parameter raises the log-likelihood.
    x, m_x, fit = recovery
    assert_allclose(fit.log_likelihood, spend_log_likelihood(fit.p, fit.q, fit.gamma, x, m_x).sum(), rtol=1e-12)
    for j in range(3):
        for factor in (0.999, 1.001):
            moved = np.array([fit.p, fit.q, fit.gamma])
            moved[j] *= factor
            assert spend_log_likelihood(*moved, x, m_x).sum() < fit.log_likelihood


def test_standard_errors_invert_the_observed_information(recovery):
    # Source: the observed information by second differences of the log-likelihood's values (not its
    # gradient), step 1e-4 of each estimate, inverted with numpy; its diagonal gives the squared errors.
    x, m_x, fit = recovery
    estimates = np.array([fit.p, fit.q, fit.gamma])
    steps = 1e-4 * estimates

    def log_likelihood(theta: np.ndarray) -> float:
        return float(spend_log_likelihood(*theta, x, m_x).sum())

    information = np.empty((3, 3))
    for i in range(3):
        for j in range(3):
            e_i, e_j = np.eye(3)[i] * steps[i], np.eye(3)[j] * steps[j]
            second = (
                log_likelihood(estimates + e_i + e_j)
                - log_likelihood(estimates + e_i - e_j)
                - log_likelihood(estimates - e_i + e_j)
                + log_likelihood(estimates - e_i - e_j)
            ) / (4 * steps[i] * steps[j])
            information[i, j] = -second
    expected = np.sqrt(np.diag(np.linalg.inv(information)))
    reported = [fit.std_errors[name] for name in ("p", "q", "gamma")]
    assert_allclose(reported, expected, rtol=1e-3)


def test_fit_ignores_customers_without_repeat_spend(recovery):
    # Source: only customers with x >= 1 and finite m_x > 0 enter the likelihood, so adding others
    # changes nothing (the first 3,000 simulated customers, fitted with and without extra rows).
    x, m_x, _ = recovery
    x, m_x = x[:3000], m_x[:3000]
    alone = fit_spend(x, m_x)
    padded = fit_spend(np.concatenate([x, [0, 0, 2, 3, 1]]), np.concatenate([m_x, [np.nan, 15.0, np.nan, 0.0, -4.0]]))
    assert padded.customers == alone.customers == 3000
    assert_allclose([padded.p, padded.q, padded.gamma], [alone.p, alone.q, alone.gamma], rtol=1e-12)


def test_fit_scales_with_the_currency(recovery):
    # Source: the density's form; spend in units 1,000 times smaller multiplies gamma by 1,000 and leaves
    # p and q unchanged, and each customer's log density falls by log(1000).
    x, m_x, _ = recovery
    x, m_x = x[:3000], m_x[:3000]
    in_units = fit_spend(x, m_x)
    in_thousandths = fit_spend(x, m_x * 1000)
    assert_allclose([in_thousandths.p, in_thousandths.q], [in_units.p, in_units.q], rtol=1e-5)
    assert_allclose(in_thousandths.gamma, in_units.gamma * 1000, rtol=1e-5)
    assert_allclose(in_units.log_likelihood - in_thousandths.log_likelihood, 3000 * math.log(1000), rtol=1e-9)


def test_no_repeat_customers_is_an_input_error():
    # Source: the specified one-line message for a file with no repeat spend.
    message = (
        "no customer has a repeat purchase with positive spend; "
        "the spend model needs repeat customers, or set order_value in the policy file"
    )
    with pytest.raises(InputError) as caught:
        fit_spend(np.array([0, 0, 2]), np.array([np.nan, np.nan, 0.0]))
    assert str(caught.value) == message


# ---------------------------------------------------------------- the assumption and the warnings


def test_correlation_is_near_zero_on_independent_data(recovery):
    # Source: x and m_x are simulated independently of nu; with 20,000 customers the sample correlation
    # has a standard deviation of about 1 / sqrt(20,000) = 0.007, so |r| < 0.03 is over four of them.
    x, m_x, fit = recovery
    assert_allclose(fit.frequency_value_correlation, np.corrcoef(x, m_x)[0, 1], rtol=1e-12)
    assert abs(fit.frequency_value_correlation) < 0.03


def test_correlation_is_reported_and_warned_on_dependent_data():
    # Source: simulation where nu is divided by x, so a customer's mean order value grows in proportion
    # to x (seed 11, 2,000 customers); the correlation is far above the 0.3 warning level.
    x, m_x = simulate(seed=11, customers=2000, p=TRUE_P, q=TRUE_Q, gamma=TRUE_GAMMA, dependence=1.0)
    fit = fit_spend(x, m_x)
    assert fit.frequency_value_correlation > 0.4
    assert any("correlated" in warning for warning in fit.warnings)


def test_thin_sample_is_warned():
    # Source: the stated threshold of 30 repeat customers; 20 simulated customers (seed 3).
    x, m_x = simulate(seed=3, customers=20, p=TRUE_P, q=TRUE_Q, gamma=TRUE_GAMMA)
    fit = fit_spend(x, m_x)
    assert fit.customers == 20
    assert any("only 20 repeat customers" in warning for warning in fit.warnings)


def test_heavy_tailed_spend_with_q_below_one_is_warned():
    # Source: simulation with q = 0.7 (p = 2, gamma = 10; seed 5, 5,000 customers). Its standard error is
    # about 0.013, so the estimate falls below 1 and the population mean is undefined.
    x, m_x = simulate(seed=5, customers=5000, p=2.0, q=0.7, gamma=10.0)
    fit = fit_spend(x, m_x)
    assert fit.q < 1
    assert abs(fit.q - 0.7) <= 3.3 * fit.std_errors["q"]
    assert any(warning.startswith("q = ") and "at most 1" in warning for warning in fit.warnings)
    assert math.isnan(fit.population_mean)
    values = expected_order_value(fit, np.array([0, 4]), np.array([np.nan, 30.0]))
    assert np.isnan(values[0]) and np.isfinite(values[1])


# ---------------------------------------------------------------- serialisation


def test_to_dict_round_trips_through_json(recovery):
    # Source: to_dict is JSON-safe (allow_nan=False) and from_dict inverts it.
    _, _, fit = recovery
    data = fit.to_dict()
    assert set(data) == {
        "p", "q", "gamma", "std_errors", "log_likelihood", "customers",
        "converged", "frequency_value_correlation", "warnings", "covariance",
    }
    text = json.dumps(data, allow_nan=False)
    again = SpendFit.from_dict(json.loads(text))
    assert again == fit
    assert again.to_dict() == data


def test_undefined_numbers_serialise_as_none():
    # Source: one customer gives no correlation (NaN) and p and q on the edge of the search range
    # (no standard error); both must become null in JSON and come back as NaN and None.
    fit = fit_spend(np.array([2]), np.array([25.0]))
    data = fit.to_dict()
    text = json.dumps(data, allow_nan=False)
    assert data["frequency_value_correlation"] is None
    assert data["std_errors"]["p"] is None
    again = SpendFit.from_dict(json.loads(text))
    assert math.isnan(again.frequency_value_correlation)
    assert again.std_errors["p"] is None
    assert again.to_dict() == data


def test_summed_likelihood_by_distinct_x_equals_the_per_customer_sum():
    # The fit evaluates the likelihood through per-x sums; they must equal the plain per-customer sums.
    from lapsewise.model.spend import SpendSums

    rng = np.random.default_rng(17)
    x = rng.integers(1, 12, 5000).astype(float)
    m_x = rng.gamma(3.0, 15.0, 5000)
    for p, q, gamma in [(6.0, 4.0, 22.5), (0.7, 1.3, 3.0), (25.0, 9.0, 140.0)]:
        value, gradient = SpendSums.of(x, m_x).value_and_gradient(p, q, gamma)
        assert np.isclose(value, spend_log_likelihood(p, q, gamma, x, m_x).sum(), rtol=1e-11)
        np.testing.assert_allclose(gradient, per_customer_gradient(p, q, gamma, x, m_x), rtol=1e-9)
