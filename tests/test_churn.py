"""The mailing-aware hidden-churn likelihood: exactness, equivalence to BG/BB, derivatives, recovery of known parameters."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, special

from lapsewise.data.histories import compress_arrays, history_arrays
from lapsewise.model.churn import ChurnFit, expand, fit_churn, history_log_likelihood, total_gradient, total_hessian, total_log_likelihood
from lapsewise.model.process import Process
from simulate_histories import simulate, simulate_histories


def one_history(purchased, mailed):
    """Histories of one customer from explicit quarter-by-quarter sequences (quarter 0 first)."""
    purchased = np.array([purchased], dtype=np.uint8)
    mailed = np.array([mailed], dtype=np.uint8)
    return compress_arrays(history_arrays(purchased, mailed, np.array([purchased.shape[1] - 1])))


def direct_likelihood(purchases, mails, alpha, beta, gamma, delta, rho):
    """The likelihood straight from the model's definition, integrated numerically over p and theta with SciPy.

    Sums over the last quarter tau the customer was alive, multiplying quarter by quarter.
    """
    n = len(purchases) - 1
    t_x = max(i for i, y in enumerate(purchases) if y or i == 0)

    def integrand(p, theta):
        total = 0.0
        for tau in range(t_x, n + 1):
            survive = (1 - theta) ** tau * (theta if tau < n else 1.0)
            chance = 1.0
            for q in range(1, tau + 1):
                buy = p * (1.0 if mails[q] else rho)
                chance *= buy if purchases[q] else 1 - buy
            total += survive * chance
        density = p ** (alpha - 1) * (1 - p) ** (beta - 1) * theta ** (gamma - 1) * (1 - theta) ** (delta - 1)
        return total * density / (special.beta(alpha, beta) * special.beta(gamma, delta))

    value, _ = integrate.dblquad(integrand, 0, 1, 0, 1, epsabs=1e-13, epsrel=1e-10)
    return value


@pytest.mark.parametrize(
    "purchases, mails",
    [
        ([1, 0, 1, 0, 0], [0, 1, 1, 0, 1]),
        ([1, 1, 0, 0, 1, 0], [0, 0, 1, 1, 1, 0]),
        ([1, 0, 0, 0], [0, 1, 0, 1]),
        ([1, 0, 1, 1, 0, 0, 0], [0, 1, 1, 0, 1, 1, 0]),
    ],
)
def test_likelihood_equals_direct_numerical_integration(purchases, mails):
    params = (1.7, 2.3, 1.4, 3.1, 0.35)  # smooth densities so scipy.integrate.dblquad converges tightly
    ours = np.exp(history_log_likelihood(expand(one_history(purchases, mails)), Process(*params)))[0]
    # Reference: SciPy's adaptive quadrature of the model's definition.
    assert_allclose(ours, direct_likelihood(purchases, mails, *params), rtol=1e-7)


@pytest.mark.parametrize("rho", [0.0001, 0.3, 0.9])
def test_mailing_aware_likelihood_is_bgbb_when_every_quarter_is_mailed(rho):
    # With every quarter mailed, rho never enters: the model is BG/BB (FHB 2010).
    purchased, mailed, n = simulate(400, 1.1, 2.0, 0.8, 3.5, 0.3, seed=3)
    hist = compress_arrays(history_arrays(purchased, mailed, n))
    expansion = expand(hist)
    bgbb = history_log_likelihood(expansion, Process(1.1, 2.0, 0.8, 3.5, None))
    aware = history_log_likelihood(expansion, Process(1.1, 2.0, 0.8, 3.5, rho))
    assert_allclose(aware, bgbb, rtol=1e-11)


def test_compressed_likelihood_equals_sum_over_customers():
    purchased, mailed, n = simulate(300, 1.0, 2.5, 0.7, 4.0, 0.3, lapse_after=2, winback_share=0.3, seed=5)
    params = (1.0, 2.5, 0.7, 4.0, 0.3)
    compressed = total_log_likelihood(expand(compress_arrays(history_arrays(purchased, mailed, n))), Process(*params))
    one_by_one = sum(
        history_log_likelihood(expand(compress_arrays(history_arrays(purchased[i : i + 1], mailed[i : i + 1], n[i : i + 1]))), Process(*params))[0]
        for i in range(len(n))
    )
    assert_allclose(compressed, one_by_one, rtol=1e-12)


def test_gradient_matches_finite_differences():
    hist = simulate_histories(2000, 1.0, 2.5, 0.7, 4.0, 0.3, lapse_after=2, winback_share=0.3, seed=11)
    expansion = expand(hist)
    point = np.array([0.9, 2.2, 0.8, 3.6, 0.4])
    _, grad = total_gradient(expansion, Process(*point))
    numeric = []
    for i in range(5):
        step = 1e-6 * point[i]
        up, down = point.copy(), point.copy()
        up[i] += step
        down[i] -= step
        numeric.append((total_log_likelihood(expansion, Process(*up)) - total_log_likelihood(expansion, Process(*down))) / (2 * step))
    assert_allclose(grad, numeric, rtol=1e-5)


@pytest.mark.parametrize("rho", [0.4, None])
def test_hessian_matches_central_differences_of_the_gradient(rho):
    # Reference: central differences of the exact gradient (itself checked against differences of the likelihood above).
    hist = simulate_histories(2000, 1.0, 2.5, 0.7, 4.0, 0.3, lapse_after=2, winback_share=0.3, seed=11)
    expansion = expand(hist)
    point = [0.9, 2.2, 0.8, 3.6, rho]
    value, grad, curvature = total_hessian(expansion, Process(*point))
    assert value == pytest.approx(total_log_likelihood(expansion, Process(*point)), rel=1e-12)
    assert_allclose(grad, total_gradient(expansion, Process(*point))[1], rtol=1e-12)
    free = 5 if rho is not None else 4
    numeric = np.zeros((free, free))
    for i in range(free):
        step = 1e-5 * point[i]
        up, down = list(point), list(point)
        up[i] += step
        down[i] -= step
        numeric[:, i] = (total_gradient(expansion, Process(*up))[1][:free] - total_gradient(expansion, Process(*down))[1][:free]) / (2 * step)
    assert_allclose(curvature[:free, :free], numeric, rtol=1e-5, atol=1e-6 * np.abs(numeric).max())
    if rho is None:
        assert not curvature[4].any() and not curvature[:, 4].any()


TRUTH = {"alpha": 1.2, "beta": 2.5, "gamma": 0.7, "delta": 4.0, "rho": 0.3}


def _covers(fit: ChurnFit, names):
    for name in names:
        estimate, error = getattr(fit, name), fit.std_errors[name]
        assert error is not None and error > 0, name
        # A 99.9% interval (3.3 standard errors): a correct fit misses with probability 1e-3 per parameter.
        assert abs(estimate - TRUTH[name]) < 3.3 * error, (name, estimate, error)


def test_recovers_known_parameters_when_every_quarter_is_mailed():
    hist = simulate_histories(20_000, *TRUTH.values(), seed=2024)
    fit = fit_churn(hist, mailing_history=False)
    assert fit.converged and fit.rho is None
    _covers(fit, ["alpha", "beta", "gamma", "delta"])


def test_recovers_known_parameters_and_rho_with_unmailed_quarters():
    hist = simulate_histories(20_000, *TRUTH.values(), lapse_after=2, winback_share=0.25, seed=77)
    fit = fit_churn(hist, mailing_history=True)
    assert fit.converged
    _covers(fit, ["alpha", "beta", "gamma", "delta", "rho"])
    # The standard error of rho must be small enough to tell it from "mailing makes no difference".
    assert fit.rho + 3.3 * fit.std_errors["rho"] < 1.0


def test_rho_is_flagged_when_no_quarter_is_unmailed():
    hist = simulate_histories(3000, *TRUTH.values(), seed=4)
    fit = fit_churn(hist, mailing_history=True)
    assert fit.std_errors["rho"] is None
    assert any("rho is not identified" in w for w in fit.warnings)
