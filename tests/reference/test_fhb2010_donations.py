"""The published donation example of Fader, Hardie & Berger (2010).

Source: Fader, P. S., Hardie, B. G. S., & Berger, P. D. (2010), "Customer-Base
Analysis with Discrete-Time Transaction Data", Marketing Science 29(6): 11,104
donors of one cohort, 6 yearly repeat-donation opportunities, summarised in 22
(x, t_x) patterns, and the BG/BB estimates fitted to them.
"""

import numpy as np
from numpy.testing import assert_allclose
from scipy import special

from lapsewise.data.histories import mailed_silent_histories
from lapsewise.model.churn import expand, fit_churn, history_log_likelihood
from lapsewise.model.posterior import dert, expected_orders, posterior
from lapsewise.model.process import Process

# The 22 (x, t_x, donors) patterns with n = 6 -- from memory; the published
# estimates and log-likelihood below are reproduced by fitting them, which confirms them.
PATTERNS = [
    (6, 6, 1203), (5, 6, 728), (4, 6, 512), (3, 6, 357), (2, 6, 234), (1, 6, 129),
    (5, 5, 335), (4, 5, 284), (3, 5, 225), (2, 5, 173), (1, 5, 119),
    (4, 4, 240), (3, 4, 181), (2, 4, 155), (1, 4, 78),
    (3, 3, 322), (2, 3, 255), (1, 3, 129),
    (2, 2, 613), (1, 2, 277),
    (1, 1, 1091),
    (0, 0, 3464),
]
N = 6


def donation_histories():
    x = np.repeat([p[0] for p in PATTERNS], [p[2] for p in PATTERNS])
    t_x = np.repeat([p[1] for p in PATTERNS], [p[2] for p in PATTERNS])
    return mailed_silent_histories(x, t_x, N - t_x)


def test_pattern_table_holds_all_donors():
    # FHB 2010: 11,104 donors in 22 patterns.
    assert sum(p[2] for p in PATTERNS) == 11_104
    assert donation_histories().size == 22


def test_bgbb_fit_reproduces_published_estimates():
    fit = fit_churn(donation_histories(), mailing_history=False)
    # FHB 2010, BG/BB parameter estimates for the donation data:
    # alpha = 1.204, beta = 0.750, gamma = 0.657, delta = 2.783, LL = -33,225.6.
    assert_allclose([fit.alpha, fit.beta, fit.gamma, fit.delta], [1.204, 0.750, 0.657, 2.783], atol=6e-4)
    assert_allclose(fit.log_likelihood, -33_225.6, atol=0.05)
    assert fit.rho is None and fit.converged


def _published_likelihood(a, b, g, d, x, t_x, n):
    """FHB 2010, the BG/BB individual likelihood written as in the paper (closed form, sum over i)."""
    value = np.exp(special.betaln(a + x, b + n - x) - special.betaln(a, b) + special.betaln(g, d + n) - special.betaln(g, d))
    for i in range(n - t_x):
        value += np.exp(
            special.betaln(a + x, b + t_x - x + i) - special.betaln(a, b) + special.betaln(g + 1, d + t_x + i) - special.betaln(g, d)
        )
    return value


FITTED = Process(alpha=1.204, beta=0.750, gamma=0.657, delta=2.783, rho=None)


def test_likelihood_matches_published_closed_form():
    hist = donation_histories()
    ours = history_log_likelihood(expand(hist), FITTED)
    theirs = [np.log(_published_likelihood(1.204, 0.750, 0.657, 2.783, x, t, n)) for x, t, n in zip(hist.x, hist.t_x, hist.n)]
    assert_allclose(ours, theirs, rtol=1e-12)


def test_p_alive_and_conditional_expectation_match_published_formulas():
    a, b, g, d = 1.204, 0.750, 0.657, 2.783
    hist = donation_histories()
    post = posterior(FITTED, hist)
    horizon = 5
    expected = expected_orders(FITTED, post, horizon)
    for h in range(hist.size):
        x, t, n = int(hist.x[h]), int(hist.t_x[h]), int(hist.n[h])
        likelihood = _published_likelihood(a, b, g, d, x, t, n)
        # FHB 2010: P(alive in n+1) = B(a+x, b+n-x)/B(a,b) * B(g, d+n+1)/B(g,d) / L
        p_alive = np.exp(special.betaln(a + x, b + n - x) - special.betaln(a, b) + special.betaln(g, d + n + 1) - special.betaln(g, d)) / likelihood
        assert_allclose(post.p_alive[h], p_alive, rtol=1e-10)
        # FHB 2010: E[X(n, n+n*)] = B(a+x+1, b+n-x)/B(a,b) * d/(g-1) * Gamma(g+d)/Gamma(1+d)
        #   * [Gamma(1+d+n)/Gamma(g+d+n) - Gamma(1+d+n+n*)/Gamma(g+d+n+n*)] / L
        lead = np.exp(special.betaln(a + x + 1, b + n - x) - special.betaln(a, b) + special.gammaln(g + d) - special.gammaln(1 + d))
        bracket = np.exp(special.gammaln(1 + d + n) - special.gammaln(g + d + n)) - np.exp(
            special.gammaln(1 + d + n + horizon) - special.gammaln(g + d + n + horizon)
        )
        assert_allclose(expected[h], lead * d / (g - 1) * bracket / likelihood, rtol=1e-9)


def test_dert_matches_published_formula_and_the_plain_sum():
    a, b, g, d = 1.204, 0.750, 0.657, 2.783
    rate = 0.10
    hist = donation_histories()
    post = posterior(FITTED, hist)
    ours = dert(FITTED, post, rate)
    for h in range(hist.size):
        x, n = int(hist.x[h]), int(hist.n[h])
        likelihood = _published_likelihood(a, b, g, d, x, int(hist.t_x[h]), n)
        # FHB 2010, DERT: B(a+x+1, b+n-x)/B(a,b) * B(g, d+n+1)/((1+r) B(g,d)) * 2F1(1, d+n+1; g+d+n+1; 1/(1+r)) / L
        published = (
            np.exp(special.betaln(a + x + 1, b + n - x) - special.betaln(a, b) + special.betaln(g, d + n + 1) - special.betaln(g, d))
            / (1 + rate)
            * special.hyp2f1(1, d + n + 1, g + d + n + 1, 1 / (1 + rate))
            / likelihood
        )
        assert_allclose(ours[h], published, rtol=1e-9)
    # The same quantity as a plain discounted sum of next-quarter purchase chances (truncated far out).
    ahead = np.arange(1, 3000)
    chances = np.exp(post.log_buy_factor)[:, None] * np.exp(
        special.betaln(g, d + post.n[:, None] + ahead[None, :]) - special.betaln(g, d)
    )
    assert_allclose(ours, (chances / (1 + rate) ** ahead).sum(axis=1), rtol=1e-6)
