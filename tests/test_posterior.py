"""Posterior quantities: next-quarter purchases predicted in simulation, lapse curves that are probabilities and fade."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from lapsewise.data.histories import compress_arrays, history_arrays
from lapsewise.model.posterior import lapse_curve, posterior
from lapsewise.model.process import Process
from simulate_histories import simulate

TRUTH = {"alpha": 1.2, "beta": 2.5, "gamma": 0.7, "delta": 4.0, "rho": 0.3}


def test_posterior_predicts_next_quarter_purchases_in_simulation():
    # Simulate 9 quarters after quarter 0, fit nothing (true parameters), condition on the first 8
    # and predict who buys in the 9th among the customers the lapse rule mailed then.
    purchased, mailed, n = simulate(40_000, *TRUTH.values(), quarters=(9, 9), lapse_after=3, winback_share=0.2, seed=9)
    hist = compress_arrays(history_arrays(purchased[:, :9], mailed[:, :9], n - 1))
    post = posterior(Process(**TRUTH), hist)
    predicted = post.p_buy[hist.inverse]
    was_mailed = mailed[:, 9] == 1
    actual = purchased[was_mailed, 9].sum()
    expected = predicted[was_mailed].sum()
    variance = (predicted[was_mailed] * (1 - predicted[was_mailed])).sum()
    # Independent Bernoulli outcomes given the history: a correct model is within 4 SD with overwhelming probability.
    assert abs(actual - expected) < 4 * np.sqrt(variance)


@settings(max_examples=40, deadline=None)
@given(
    x=st.integers(0, 8),
    extra=st.integers(0, 6),
    alpha=st.floats(0.2, 5),
    beta=st.floats(0.2, 5),
    gamma=st.floats(0.2, 5),
    delta=st.floats(0.2, 8),
)
def test_lapse_curve_is_a_probability_and_fades(x, extra, alpha, beta, gamma, delta):
    fit = Process(alpha=alpha, beta=beta, gamma=gamma, delta=delta, rho=None)
    p_alive, p_buy = lapse_curve(fit, x, x + extra, 12)
    assert np.all((p_alive >= 0) & (p_alive <= 1 + 1e-12))
    assert np.all((p_buy >= 0) & (p_buy <= p_alive + 1e-12))
    # Every further mailed quarter without a purchase can only lower the hope of a return.
    assert np.all(np.diff(p_alive) <= 1e-12)
    assert np.all(np.diff(p_buy) <= 1e-12)


def test_dert_series_summed_term_by_term_equals_scipys_hypergeometric_function():
    # Reference: scipy.special.hyp2f1, where it is finite. The plain sum is used where it is not (very large gamma).
    from scipy import special

    from lapsewise.model.posterior import _survival_series

    process = Process(1.2, 2.5, 0.7, 4.0, 0.3)
    n = np.arange(0, 30.0)
    expected = special.hyp2f1(1.0, process.delta + n + 1, process.gamma + process.delta + n + 1, 1 / 1.05)
    np.testing.assert_allclose(_survival_series(process, n, 0.05), expected, rtol=1e-12)
    # With gamma = 1e5 SciPy gives NaN; the terms fall at once and the sum is barely above 1.
    extreme = Process(1e-4, 1e5, 1e5, 1e-4, None)
    assert np.isnan(special.hyp2f1(1.0, 1e-4 + 4, 1e5 + 1e-4 + 4, 1 / 1.05))
    value = _survival_series(extreme, np.array([3.0]), 0.05)[0]
    assert 1.0 <= value < 1.0 + 1e-3
