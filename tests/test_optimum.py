"""The shared maximum-likelihood search: it finds a known maximum, and its standard errors are the textbook ones.

The reference problem is the normal distribution's likelihood, whose maximum and observed information have
closed forms (any statistics handbook; here from memory): the estimates are the sample mean and the root mean
squared deviation, with standard errors sigma / sqrt(n) for the mean and sigma / sqrt(2 n) for sigma.
"""

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.model import optimum


def normal_objective(values: np.ndarray):
    """Negative log-likelihood per observation of N(mu, sigma^2) in coordinates (mu, log sigma), with its gradient."""

    def objective(point):
        mu, log_sigma = point
        sigma = math.exp(log_sigma)
        residual = values - mu
        value = log_sigma + 0.5 * np.mean(residual**2) / sigma**2 + 0.5 * math.log(2 * math.pi)
        gradient = np.array([-np.mean(residual) / sigma**2, 1.0 - np.mean(residual**2) / sigma**2])
        return value, gradient

    return objective


def normal_hessian(values: np.ndarray):
    """The exact Hessian of :func:`normal_objective` in (mu, log sigma)."""

    def hessian(point):
        mu, log_sigma = point
        sigma2 = math.exp(2 * log_sigma)
        residual = values - mu
        return np.array([[1 / sigma2, 2 * np.mean(residual) / sigma2], [2 * np.mean(residual) / sigma2, 2 * np.mean(residual**2) / sigma2]])

    return hessian


BOUNDS = [(-100.0, 100.0), (-10.0, 10.0)]
STARTS = [np.array([0.0, 0.0]), np.array([5.0, 2.0])]


@pytest.mark.parametrize("exact", [False, True], ids=["differenced-hessian", "exact-hessian"])
def test_minimize_finds_the_closed_form_maximum_and_its_standard_errors(exact):
    values = np.random.default_rng(3).normal(12.0, 3.0, 5_000)
    best = optimum.minimize(
        normal_objective(values), STARTS, BOUNDS, customers=len(values), scout_steps=3, exact_hessian=normal_hessian(values) if exact else None
    )
    mu, sigma = values.mean(), values.std()  # the maximum-likelihood estimates in closed form
    assert best.converged
    assert_allclose([best.x[0], math.exp(best.x[1])], [mu, sigma], rtol=1e-7)
    errors = optimum.standard_errors(best.hessian, best.x, len(values), logged=[False, True], free=[True, True])
    assert_allclose(errors, [sigma / math.sqrt(len(values)), sigma / math.sqrt(2 * len(values))], rtol=1e-4)


def test_a_stand_in_for_the_scouting_does_not_move_the_answer():
    # The search scouts on a sample's likelihood and finishes on the full one: the optimum is the full data's.
    values = np.random.default_rng(4).normal(-3.0, 0.5, 30_000)
    best = optimum.minimize(normal_objective(values), STARTS, BOUNDS, len(values), 3, stand_in=normal_objective(values[:500]))
    assert_allclose([best.x[0], math.exp(best.x[1])], [values.mean(), values.std()], rtol=1e-7)


def test_differenced_hessian_matches_the_exact_one():
    values = np.random.default_rng(5).normal(1.0, 2.0, 1_000)
    point = np.array([0.7, 0.4])
    _, gradient = normal_objective(values)(point)
    assert_allclose(optimum.hessian(normal_objective(values), point, gradient, BOUNDS), normal_hessian(values)(point), rtol=1e-4)


def test_standard_errors_are_none_where_the_information_is_not_positive_definite():
    curvature = np.array([[1.0, 2.0], [2.0, 1.0]])  # indefinite
    assert optimum.standard_errors(curvature, np.zeros(2), 100, logged=[False, False], free=[True, True]) == [None, None]
    # A coordinate that is not free gets none; the other is read from its own block.
    errors = optimum.standard_errors(np.diag([4.0, 1.0]), np.zeros(2), 100, logged=[False, False], free=[True, False])
    assert errors[1] is None and errors[0] == pytest.approx(1 / math.sqrt(400))
