"""The fitted model and its file: round trip, keys, and damaged or impossible files refused."""

import json
from dataclasses import replace

import numpy as np
import pytest

from builders import simulated_panel
from lapsewise.data.histories import compress
from lapsewise.errors import InputError
from lapsewise.model.churn import ChurnFit, fit_churn
from lapsewise.model.fitted import Model, fit_model, load_model


def test_model_file_round_trip_and_keys(tmp_path):
    panel = simulated_panel(5_000, seed=8)
    model = fit_model(panel)
    data = model.to_dict()
    # The keys the model file promises (issue text: churn parameters with published names, spend, fit facts).
    assert set(data["churn"]) == {"alpha", "beta", "gamma", "delta", "rho", "seasons", "std_errors", "covariance"}
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
        ('{"format": "lapsewise-model", "churn": {}}', "of version null"),
        ('{"format": "lapsewise-model", "version": 1, "churn": {}}', "churn.alpha = null is not a number"),
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


def test_every_quarter_mailed_leaves_rho_out_of_the_model(tmp_path):
    # A mailings file that mails every customer in every quarter (simulated with the every-quarter rule).
    panel = simulated_panel(3_000, seed=9, lapse_after=None)
    assert panel.mailing_history and panel.mailed[:, 1:].sum() == panel.n.sum()
    model = fit_model(panel)
    assert model.churn.rho is None and not model.rho_estimable and model.mailing_history
    assert "rho" not in model.churn.std_errors
    assert model.mailing_check.unmailed_quarters == 0 and not model.mailing_check.followed_rules
    assert any(w.startswith("rho cannot be estimated") for w in model.warnings)
    assert not any("not identified" in w for w in model.warnings)
    # alpha to delta are the churn fit's own: with no unmailed quarter rho does not enter the likelihood.
    churn = fit_churn(compress(panel), True)
    plain = fit_model(panel, seasons=False).churn
    assert (plain.alpha, plain.beta, plain.gamma, plain.delta) == (churn.alpha, churn.beta, churn.gamma, churn.delta)
    # With seasons (fitted by default) rho stays out of the seasonal fit as well.
    assert model.churn.seasons is not None and "rho" not in model.churn.std_errors
    path = tmp_path / "model.json"
    path.write_text(json.dumps(model.to_dict(), allow_nan=False))
    again = load_model(path)
    assert again.churn.rho is None and not again.rho_estimable and again.mailing_history
    assert again.to_dict() == model.to_dict()


def test_model_files_before_the_mailing_check_still_load(tmp_path):
    data = fit_model(simulated_panel(2_000, seed=8)).to_dict()
    assert data["mailing_check"]["followed_rules"] is True  # mailed while silent under 2 quarters, a quarter of the rest
    del data["mailing_check"], data["rho_estimable"]
    path = tmp_path / "model.json"
    path.write_text(json.dumps(data))
    model = load_model(path)
    assert model.mailing_check is None and model.rho_estimable and model.mailing_history


@pytest.mark.parametrize(
    "change, message",
    [
        ({"rho_estimable": "no"}, "rho_estimable"),
        ({"mailing_check": [1]}, "mailing_check is missing or is not a table"),
        ({"mailing_check": {"customer_quarters": 10, "unmailed_quarters": 11}}, "mailing_check.unmailed_quarters is more than"),
        ({"mailing_check": {"customer_quarters": 10, "unmailed_quarters": 1, "base_rate_accuracy": 0.9, "rule_accuracy": 1.5}}, "mailing_check.rule_accuracy = 1.5"),
    ],
)
def test_load_model_rejects_a_damaged_mailing_check(tmp_path, change, message):
    data = {**fit_model(simulated_panel(1_000, seed=8)).to_dict(), **change}
    path = tmp_path / "model.json"
    path.write_text(json.dumps(data))
    with pytest.raises(InputError, match=message):
        load_model(path)


def test_without_a_mailings_file_there_is_no_check_and_rho_stays_unset():
    panel = simulated_panel(2_000, seed=8)
    columns = np.arange(panel.mailed.shape[1])[None, :]
    everything = ((columns >= 1) & (columns <= panel.n[:, None])).astype(np.uint8)
    model = fit_model(replace(panel, mailed=everything, mailing_history=False))
    assert model.mailing_check is None and model.rho_estimable and not model.mailing_history and model.churn.rho is None
    assert not any("rho cannot be estimated" in w for w in model.warnings)


def test_mailing_that_followed_only_the_calendar_is_left_to_the_seasonal_model():
    # Mailing by the quarter of the year alone (everyone in the peak quarter, 30% at random otherwise) follows a rule,
    # but one the seasonal model accounts for: with seasons fitted, fit says so instead of warning that rho may be
    # biased; without seasons it warns. The fitted rho lands near the truth (0.6) with seasons.
    from builders import seasonal_panel

    def by_calendar(seen):
        if seen.quarter % 4 == 0:
            return seen.in_play.copy()
        return seen.in_play & (seen.rng.random(len(seen.in_play)) < 0.3)

    panel = seasonal_panel(6_000, seed=13, rule=by_calendar)
    seasonal = fit_model(panel)
    assert seasonal.mailing_check.followed_rules and seasonal.mailing_check.strongest_predictor == "quarter_of_year"
    assert any(w.startswith("mailing followed the quarter of the year") for w in seasonal.warnings)
    assert not any("rather than chance" in w for w in seasonal.warnings)
    assert abs(seasonal.churn.rho - 0.6) < 4 * seasonal.churn.std_errors["rho"]
    plain = fit_model(panel, seasons=False)
    assert any("rather than chance" in w for w in plain.warnings)
