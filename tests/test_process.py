"""The process's derived quantities."""

import pytest

from lapsewise.model.process import Process


def test_means_and_the_unmailed_response():
    process = Process(alpha=1.0, beta=3.0, gamma=2.0, delta=6.0, rho=0.25)
    # The mean of Beta(a, b) is a / (a + b).
    assert process.mean_p == pytest.approx(0.25) and process.mean_theta == pytest.approx(0.25)
    assert process.unmailed_response == 0.25 and process.mailing_history
    # Without a mailing history every quarter counts as mailed: a held quarter is a mailed one.
    bgbb = Process(alpha=1.0, beta=3.0, gamma=2.0, delta=6.0)
    assert bgbb.unmailed_response == 1.0 and not bgbb.mailing_history
