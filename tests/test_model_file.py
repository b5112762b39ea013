"""The model file: read, recognised by its format key, and its parameters checked at the edge."""

import json

import pytest

from lapsewise.errors import InputError
from lapsewise.files.model_file import MODEL_FORMAT, read_model_file


def write(tmp_path, data) -> str:
    path = tmp_path / "model.json"
    path.write_text(json.dumps(data) if not isinstance(data, str) else data)
    return str(path)


def test_a_model_file_is_read_with_its_name(tmp_path):
    path = write(tmp_path, {"format": MODEL_FORMAT, "churn": {"alpha": 1.0, "rho": None}})
    data, name = read_model_file(path)
    assert data["churn"]["alpha"] == 1.0 and name == path


@pytest.mark.parametrize(
    "data, message",
    [
        ("not json", "not JSON"),
        ({"a": 1}, "not a lapsewise model file"),
        ({"format": MODEL_FORMAT, "churn": {"alpha": -1.0}}, "churn.alpha = -1.0 is not a positive number"),
        ({"format": MODEL_FORMAT, "churn": {"alpha": 1.0, "rho": 1.5}}, r"churn.rho = 1.5 is outside \[0, 1\]"),
    ],
    ids=["not-json", "foreign", "negative-alpha", "rho-above-one"],
)
def test_damaged_or_foreign_files_are_refused_with_the_key(tmp_path, data, message):
    path = write(tmp_path, data)
    with pytest.raises(InputError, match=message) as caught:
        read_model_file(path)
    assert str(caught.value).startswith(path)


def test_a_missing_model_file_says_how_to_make_one(tmp_path):
    with pytest.raises(InputError, match="lapsewise fit"):
        read_model_file(tmp_path / "nowhere.json")
