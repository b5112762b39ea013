"""Per-customer scores and lapse curves of a fitted model."""

import numpy as np
from numpy.testing import assert_allclose

from builders import TRUTH, simulated_panel
from lapsewise.data.summary import summarize
from lapsewise.model.churn import ChurnFit
from lapsewise.model.fitted import Model
from lapsewise.model.scores import lapse_curves, quarterly_rate, score_customers


def test_scores_are_probabilities_and_dert_exceeds_one_quarter():
    panel = simulated_panel(3_000, seed=12)
    model = Model(churn=ChurnFit(**TRUTH), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=panel.customers)
    scores = score_customers(model, panel, horizon=4, annual_discount_rate=0.1)
    assert len(scores) == panel.customers
    assert scores["p_alive"].between(0, 1).all() and scores["p_buy"].between(0, 1).all()
    assert (scores["p_buy"] <= scores["p_alive"]).all()
    # Expected purchases over 4 quarters exceed next quarter's chance, and DERT (infinite horizon,
    # discounted) exceeds the discounted next-quarter chance.
    assert (scores["expected_orders"] >= scores["p_buy"]).all()
    assert (scores["dert"] >= scores["p_buy"] / (1 + quarterly_rate(0.1)) - 1e-12).all()


def test_quarterly_rate_compounds_to_the_annual_rate():
    # (1 + r_q)^4 = 1 + r_annual (compound interest, handbook identity).
    assert_allclose((1 + quarterly_rate(0.10)) ** 4, 1.10)


def test_lapse_curves_cover_each_present_band():
    panel = simulated_panel(3_000, seed=13)
    model = Model(churn=ChurnFit(**TRUTH), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=panel.customers)
    curves = lapse_curves(model, summarize(panel), max_silent=6)
    assert set(curves["k"]) == set(range(7))
    assert (curves.groupby("band")["p_buy"].apply(lambda s: np.all(np.diff(s.to_numpy()) <= 1e-12))).all()


def test_dert_at_a_zero_discount_rate_is_refused_when_it_is_infinite_and_given_when_finite():
    # sum_h B(gamma, delta + n + h) / B(gamma, delta) behaves like sum_h h^-gamma: finite only for gamma > 1.
    import pytest

    from lapsewise.errors import InputError

    panel = simulated_panel(500, seed=14)
    infinite = Model(churn=ChurnFit(**{**TRUTH, "gamma": 0.7}), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=500)
    with pytest.raises(InputError, match="DERT is infinite for this model"):
        score_customers(infinite, panel, annual_discount_rate=0.0)
    finite = Model(churn=ChurnFit(**{**TRUTH, "gamma": 2.5}), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=500)
    scores = score_customers(finite, panel, annual_discount_rate=0.0)
    assert np.isfinite(scores["dert"]).all()
    # Undiscounted, DERT is at least the expected orders over any finite stretch.
    assert (scores["dert"] >= score_customers(finite, panel, horizon=40, annual_discount_rate=0.0)["expected_orders"] - 1e-9).all()


def test_a_model_without_rho_refuses_to_score_unmailed_quarters():
    # A model fitted on a file that mailed every quarter has no rho; scoring a panel whose customers were held in
    # some quarters would count those quarters as mailed, so it is refused (one line); the all-mailed panel scores.
    import dataclasses

    import pytest

    from lapsewise.errors import InputError
    from lapsewise.evaluate.backtest import run_backtest
    from lapsewise.model.fitted import fit_model

    all_mailed = simulated_panel(2_000, seed=4, lapse_after=None)
    model = fit_model(all_mailed, seasons=False)
    assert not model.rho_estimable
    assert len(score_customers(model, all_mailed)) == all_mailed.customers
    held = simulated_panel(2_000, seed=4)
    with pytest.raises(InputError, match=r"could not estimate rho .* unmailed"):
        score_customers(model, held)
    # The backtest's calibration quarters all mailed, a holdout quarter with held customers: refused too.
    mailed = all_mailed.mailed.copy()
    rows = np.arange(all_mailed.customers)
    mailed[rows[::3], all_mailed.n[::3]] = 0  # a third of the customers held in their last quarter
    with pytest.raises(InputError, match="--holdout-quarters 1: the model could not estimate rho"):
        run_backtest(dataclasses.replace(all_mailed, mailed=mailed), 1, seasons=False)
