"""The order values the program is solved at: spend bands at the gamma-gamma population's quantiles."""

import numpy as np
from numpy.testing import assert_allclose

from lapsewise.decide.order_values import spend_bands
from lapsewise.files.policy_file import Economics
from lapsewise.model.spend import SpendFit


def test_spend_bands_cut_the_gamma_gamma_population_at_its_quantiles():
    # The mean order value of a gamma-gamma customer is p / nu with nu ~ Gamma(q, rate gamma), so its u-quantile
    # is p / (the (1 - u)-quantile of nu); the reference quantile is SciPy's gamma distribution.
    from scipy import stats

    # Parameter values of the size Fader, Hardie & Lee (2005) report (from memory); any with q > 1 would do.
    spend = SpendFit(p=6.25, q=3.74, gamma=15.44, std_errors={}, log_likelihood=0.0, customers=1, converged=True)
    bands = spend_bands(spend, Economics(0.45, 4.0, 0.9, 0.10, 8), 3)

    def quantile(u):
        return 6.25 / stats.gamma.ppf(1.0 - u, 3.74, scale=1.0 / 15.44)

    assert [b.label for b in bands] == ["low", "middle", "high"]
    assert bands[0].low == 0.0 and bands[-1].high == np.inf
    assert_allclose([b.high for b in bands[:-1]], [quantile(1 / 3), quantile(2 / 3)], rtol=1e-10)
    assert_allclose([b.order_value for b in bands], [quantile(1 / 6), quantile(1 / 2), quantile(5 / 6)], rtol=1e-10)
