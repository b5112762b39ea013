"""The backtest: unbiased quarter-by-quarter predictions under a reactive lapse rule, consistent totals."""

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

from builders import TRUTH, seasonal_panel, simulated_panel
from lapsewise.data.panel import select
from lapsewise.errors import InputError
from lapsewise.evaluate.backtest import holdout_predictions, run_backtest
from lapsewise.model.process import Process


def test_backtest_prediction_is_unbiased_under_a_reactive_lapse_rule():
    # The lapse rule mails again right after a purchase; with the true parameters the
    # quarter-by-quarter prediction must match the actual count within sampling error.
    panel = simulated_panel(30_000, seed=31)
    calibration_end, holdout = panel.end_quarter - 4, 4
    known = select(panel, panel.first_quarter <= calibration_end - 2)
    predicted = holdout_predictions(Process(**TRUTH), known, calibration_end, holdout)
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


def test_backtest_tracks_the_seasonal_pattern_that_a_plain_fit_misses():
    # A seasonal world (builders.SEASONAL_TRUTH, peak-targeted mailing; invented): the holdout quarters run through the
    # whole year. A quarter's count is a sum of Bernoulli outcomes, so its standard deviation is below sqrt(predicted).
    # With seasons every quarter is within 4 of those of its prediction; the plain fit, which spreads the peak over the
    # year, misses some quarter by more than 6 (by about 35% of the count: a bias, not noise).
    panel = seasonal_panel(12_000, seed=21, quarters=28)
    seasonal = run_backtest(panel, 4)
    plain = run_backtest(panel, 4, seasons=False)
    assert sorted(seasonal.by_quarter["quarter_of_year"]) == [1, 2, 3, 4]
    gap = lambda result: ((result.by_quarter["predicted"] - result.by_quarter["actual"]).abs() / np.sqrt(result.by_quarter["predicted"]))  # noqa: E731
    assert gap(seasonal).max() < 4
    assert gap(plain).max() > 6
