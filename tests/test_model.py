"""The model file, per-customer scores and the backtest."""

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from lapsewise.backtest import holdout_predictions, run_backtest
from lapsewise.churn import ChurnFit
from lapsewise.errors import InputError
from lapsewise.model import Model, fit_model, load_model, quarterly_rate, return_curves, score_customers
from lapsewise.panel import Panel, select, summarize
from simulate_histories import simulate

TRUTH = {"alpha": 1.2, "beta": 2.5, "gamma": 0.7, "delta": 4.0, "rho": 0.3}


def simulated_panel(customers, seed, lapse_after=2, winback_share=0.25, quarters=(8, 14)):
    """A Panel built straight from simulated arrays (customers joined at different quarters)."""
    purchased, mailed, n = simulate(customers, *TRUTH.values(), quarters=quarters, lapse_after=lapse_after, winback_share=winback_share, seed=seed)
    end = 100
    rng = np.random.default_rng(seed)
    return Panel(
        customer_ids=np.array([f"S{i:06d}" for i in range(customers)]),
        first_quarter=end - n,
        end_quarter=end,
        purchased=purchased,
        spend=purchased * rng.gamma(6.0, 45.0 / 6.0, size=purchased.shape).astype(np.float32),
        mailed=mailed,
        mailing_history=True,
    )


def test_backtest_prediction_is_unbiased_under_a_reactive_lapse_rule():
    # The lapse rule mails again right after a purchase; with the true parameters the
    # quarter-by-quarter prediction must match the actual count within sampling error.
    panel = simulated_panel(30_000, seed=31)
    calibration_end, holdout = panel.end_quarter - 4, 4
    known = select(panel, panel.first_quarter <= calibration_end - 2)
    predicted = holdout_predictions(ChurnFit(**TRUTH), known, calibration_end, holdout)
    columns = (calibration_end - known.first_quarter)[:, None] + 1 + np.arange(holdout)[None, :]
    actual = np.take_along_axis(known.purchased, columns, axis=1)
    for quarter in range(holdout):
        p = predicted[:, quarter]
        # Sum of independent Bernoulli outcomes given the past: within 4 SD with overwhelming probability.
        assert abs(actual[:, quarter].sum() - p.sum()) < 4 * np.sqrt((p * (1 - p)).sum())


def test_run_backtest_reports_consistent_totals():
    panel = simulated_panel(8_000, seed=5)
    result = run_backtest(panel, 3)
    assert result.holdout_quarters == 3
    assert result.actual == result.by_quarter["actual"].sum()
    assert_allclose(result.predicted, result.by_quarter["predicted"].sum())
    assert_allclose(result.predicted, (result.by_frequency["predicted_mean"] * result.by_frequency["customers"]).sum())
    data = result.to_dict()
    for key in ("holdout_quarters", "actual_repeat_purchases", "predicted_repeat_purchases", "by_frequency", "by_quarter"):
        assert key in data
    json.dumps(data, allow_nan=False)
    # The fitted calibration model is close to the truth and the totals agree within 10%.
    assert abs(result.predicted - result.actual) < 0.1 * result.actual


def test_backtest_refuses_a_holdout_longer_than_the_data():
    panel = simulated_panel(500, seed=2)
    with pytest.raises(InputError, match="--holdout-quarters"):
        run_backtest(panel, 20)


def test_model_file_round_trip_and_keys(tmp_path):
    panel = simulated_panel(5_000, seed=8)
    model = fit_model(panel)
    data = model.to_dict()
    # The keys the model file promises (issue text: churn parameters with published names, spend, fit facts).
    assert set(data["churn"]) == {"alpha", "beta", "gamma", "delta", "rho", "std_errors"}
    for key in ("spend", "log_likelihood", "customers", "as_of", "mailing_history"):
        assert key in data
    path = tmp_path / "model.json"
    path.write_text(json.dumps(data, allow_nan=False))
    again = load_model(path)
    assert again.to_dict() == data


@pytest.mark.parametrize(
    "content, message",
    [
        ("not json", "not JSON"),
        ('{"a": 1}', "not a lapsewise model file"),
        ('{"format": "lapsewise-model", "churn": {}}', "damaged"),
    ],
)
def test_load_model_rejects_bad_files(tmp_path, content, message):
    path = tmp_path / "model.json"
    path.write_text(content)
    with pytest.raises(InputError, match=message):
        load_model(path)


def test_load_model_rejects_impossible_parameters(tmp_path):
    model = Model(churn=ChurnFit(alpha=-1.0, beta=1.0, gamma=1.0, delta=1.0, rho=None), spend=None, as_of="2020-12-31", end_quarter=8083, fiscal_year_start=1, customers=1)
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model.to_dict()))
    with pytest.raises(InputError, match="churn.alpha"):
        load_model(path)


def test_scores_are_probabilities_and_dert_exceeds_one_quarter():
    panel = simulated_panel(3_000, seed=12)
    model = Model(churn=ChurnFit(**TRUTH), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=panel.customers)
    scores = score_customers(model, panel, horizon=4, annual_discount_rate=0.1)
    assert len(scores) == panel.customers
    assert scores["p_alive"].between(0, 1).all() and scores["p_buy"].between(0, 1).all()
    assert (scores["p_buy"] <= scores["p_alive"]).all()
    # Expected purchases over 4 quarters exceed next quarter's chance, and DERT (infinite horizon,
    # discounted) exceeds the discounted next-quarter chance.
    assert (scores["expected_purchases"] >= scores["p_buy"]).all()
    assert (scores["dert"] >= scores["p_buy"] / (1 + quarterly_rate(0.1)) - 1e-12).all()


def test_quarterly_rate_compounds_to_the_annual_rate():
    # (1 + r_q)^4 = 1 + r_annual (compound interest, handbook identity).
    assert_allclose((1 + quarterly_rate(0.10)) ** 4, 1.10)


def test_return_curves_cover_each_present_band():
    panel = simulated_panel(3_000, seed=13)
    model = Model(churn=ChurnFit(**TRUTH), spend=None, as_of="x", end_quarter=panel.end_quarter, fiscal_year_start=1, customers=panel.customers)
    curves = return_curves(model, summarize(panel), max_silent=6)
    assert set(curves["k"]) == set(range(7))
    assert (curves.groupby("band")["p_buy"].apply(lambda s: np.all(np.diff(s.to_numpy()) <= 1e-12))).all()


def test_demo_truth_file_matches_the_generator():
    # demo/truth.json documents the generator's defaults; they must not drift apart.
    from pathlib import Path

    from lapsewise.demo import Truth

    recorded = json.loads((Path(__file__).parent.parent / "demo" / "truth.json").read_text())
    for key, value in Truth().as_dict().items():
        assert recorded[key] == value, key
