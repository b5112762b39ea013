"""The p-moments and survival terms: against Gauss-Jacobi quadrature, and the program's grid against the likelihood's sums."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special

from lapsewise.model.moments import log_alive_ahead, log_moment_grid, log_p_moments, log_survival
from lapsewise.model.process import Process


def test_p_moments_equal_gauss_jacobi_quadrature():
    # Reference: Gauss-Jacobi quadrature (scipy.special.roots_jacobi) is exact for these polynomials
    # once it has degree // 2 + 1 nodes.
    triples = np.array([[0, 0, 0], [3, 2, 5], [7, 0, 11], [1, 9, 4], [12, 6, 14]])
    alpha, beta, rho = 0.8, 1.9, 0.27
    nodes, weights = special.roots_jacobi(int(triples.sum(axis=1).max()) // 2 + 1, beta - 1, alpha - 1)
    p = (1 + nodes) / 2
    expected = [np.log(np.sum(weights * p**x * (1 - p) ** a * (1 - rho * p) ** b) / weights.sum()) for x, a, b in triples]
    assert_allclose(log_p_moments(triples, alpha, beta, rho), expected, rtol=1e-11)


@pytest.mark.parametrize("rho", [0.0, 0.35, 1.0])
def test_the_programs_grid_equals_the_likelihoods_sums(rho):
    # The program builds M(x, a, b) by the recursion M(x, a, b+1) = M(x, a+1, b) + (1 - rho) M(x+1, a, b);
    # the likelihood sums b + 1 Beta-function ratios. Both are E[p^x (1-p)^a (1-rho p)^b]: they must agree.
    process = Process(alpha=0.8, beta=1.9, gamma=1.0, delta=1.0, rho=rho)
    n_max, b_max = 14, 6
    grid = log_moment_grid(process, n_max, b_max)  # [b, x, n] with a = n - x - b
    b, x, n = np.meshgrid(np.arange(b_max + 1), np.arange(grid.shape[1]), np.arange(n_max + 1), indexing="ij")
    valid = x + b <= n
    triples = np.column_stack([x[valid], (n - x - b)[valid], b[valid]])
    assert_allclose(grid[valid], log_p_moments(triples, process.alpha, process.beta, rho), rtol=1e-11, atol=1e-12)
    # States that cannot exist (x + b > n) are off the grid.
    assert np.all(np.isneginf(grid[~valid]))


def test_alive_ahead_is_the_ratio_of_survival_terms():
    # P(alive through n + i | alive through n) = E[(1-theta)^(n+i)] / E[(1-theta)^n] (FHB 2010's survival term).
    gamma, delta = 0.7, 4.5
    table = log_alive_ahead(gamma, delta, quarters=12, steps=5)
    n, i = np.meshgrid(np.arange(12), np.arange(6), indexing="ij")
    assert_allclose(table, log_survival(gamma, delta, n + i) - log_survival(gamma, delta, n), rtol=1e-12, atol=1e-14)


def test_survival_is_the_expectation_over_the_beta_distribution():
    # Reference: SciPy's numerical integration of (1 - theta)^t against the Beta(gamma, delta) density.
    from scipy import integrate, stats

    gamma, delta = 1.3, 3.2
    for t in (0, 1, 5, 17):
        expected, _ = integrate.quad(lambda theta: (1 - theta) ** t * stats.beta.pdf(theta, gamma, delta), 0, 1, epsabs=1e-14)
        assert_allclose(np.exp(log_survival(gamma, delta, np.array(t))), expected, rtol=1e-9)
