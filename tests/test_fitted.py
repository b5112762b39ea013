"""The fitted model and its file: round trip, keys, and damaged or impossible files refused."""

import json

import pytest

from builders import simulated_panel
from lapsewise.errors import InputError
from lapsewise.model.churn import ChurnFit
from lapsewise.model.fitted import Model, fit_model, load_model


def test_model_file_round_trip_and_keys(tmp_path):
    panel = simulated_panel(5_000, seed=8)
    model = fit_model(panel)
    data = model.to_dict()
    # The keys the model file promises (issue text: churn parameters with published names, spend, fit facts).
    assert set(data["churn"]) == {"alpha", "beta", "gamma", "delta", "rho", "seasons", "std_errors"}
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
