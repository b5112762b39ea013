"""The model file: read, recognised by its format and version, and every key checked at the edge.

The corpus of damaged files is made here: a valid model file with one key changed, removed or
replaced by a value of the wrong type or out of range; hypothesis makes more of them.
"""

import copy
import json
import math

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from lapsewise.errors import InputError
from lapsewise.files.model_file import MODEL_FORMAT, read_model_file
from lapsewise.model.churn import ChurnFit
from lapsewise.model.fitted import Model, load_model
from lapsewise.model.spend import SpendFit

VALID = Model(
    ChurnFit(1.1, 2.4, 0.7, 4.5, 0.3, std_errors={"alpha": 0.03, "beta": 0.1, "gamma": 0.02, "delta": 0.2, "rho": 0.01}),
    SpendFit(6.0, 4.0, 22.5, std_errors={"p": 0.2, "q": 0.1, "gamma": 1.0}, log_likelihood=-1.0, customers=10, converged=True, frequency_value_correlation=0.01),
    "2025-12-31",
    8103,
    1,
    20_000,
).to_dict()


def write(tmp_path, data) -> str:
    path = tmp_path / "model.json"
    path.write_text(data if isinstance(data, str) else json.dumps(data))
    return str(path)


def changed(key_path: str, value=None, remove: bool = False) -> dict:
    data = copy.deepcopy(VALID)
    *parents, last = key_path.split(".")
    node = data
    for key in parents:
        node = node[key]
    if remove:
        del node[last]
    else:
        node[last] = value
    return data


def test_a_model_file_written_by_fit_is_read_back(tmp_path):
    data, name = read_model_file(write(tmp_path, VALID))
    assert data == VALID and name.endswith("model.json")
    assert load_model(write(tmp_path, VALID)).to_dict() == VALID


@pytest.mark.parametrize(
    "data, message",
    [
        ("not json", "not JSON"),
        ({"a": 1}, "not a lapsewise model file"),
        ("[" * 100_000 + "]" * 100_000, "nested too deeply"),
        (changed("version", 2), "of version 2, and this lapsewise reads version 1"),
        (changed("version", remove=True), "of version null"),
        (changed("churn.alpha", -1.0), "churn.alpha = -1.0 is outside"),
        (changed("churn.alpha", float("nan")), "churn.alpha = nan is outside"),
        (changed("churn.beta", 1e300), "churn.beta = 1e+300 is outside"),
        (changed("churn.gamma", None), "churn.gamma = null is not a number"),
        (changed("churn.delta", "4.5"), 'churn.delta = "4.5" is not a number'),
        (changed("churn.rho", 1.5), "churn.rho = 1.5 is outside 0 to 1"),
        (changed("churn", [1, 2]), "churn is missing or is not a table"),
        (changed("churn.std_errors.alpha", -0.1), "churn.std_errors.alpha = -0.1"),
        (changed("spend.p", 0.0), "spend.p = 0.0 is outside"),
        (changed("spend.gamma", float("inf")), "spend.gamma = inf is outside"),
        (changed("spend", "lots"), "spend is missing or is not a table"),
        (changed("fiscal_year_start", 13), "fiscal_year_start = 13 is not a whole number from 1 to 12"),
        (changed("end_quarter", 1.5), "end_quarter = 1.5 is not a whole number"),
        (changed("as_of", "last Tuesday"), 'as_of = "last Tuesday" is not a date'),
        (changed("customers", -5), "customers = -5 is not a whole number"),
        (changed("warnings", "none"), "warnings is not a list of texts"),
        (changed("churn.seasons", [1.0, 0.5]), "churn.seasons = .* is not a list of four multipliers"),
        (changed("churn.seasons", [0.5, 0.5, 0.6, 0.7]), "churn.seasons = .* has no multiplier equal to 1"),
        (changed("churn.seasons", [1.0, 1.5, 0.6, 0.7]), "churn.seasons\\[1\\] value = 1.5 is outside"),
        (changed("churn.seasons", [1.0, "x", 0.6, 0.7]), "churn.seasons\\[1\\] value = .* is not a number"),
    ],
    ids=lambda value: None if isinstance(value, (dict, str)) and len(str(value)) > 60 else str(value)[:30],
)
def test_damaged_or_foreign_files_are_refused_naming_the_key(tmp_path, data, message):
    path = write(tmp_path, data)
    with pytest.raises(InputError, match=message.replace("(", r"\(").replace("+", r"\+")) as caught:
        load_model(path)
    assert str(caught.value).startswith(path)


def test_a_missing_model_file_says_how_to_make_one(tmp_path):
    with pytest.raises(InputError, match="lapsewise fit"):
        read_model_file(tmp_path / "nowhere.json")


ODD_VALUES = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(10**30), max_value=10**30),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=10),
    st.lists(st.integers(), max_size=3),
    st.dictionaries(st.text(max_size=3), st.integers(), max_size=2),
)
KEY_PATHS = [
    "version", "churn", "churn.alpha", "churn.beta", "churn.gamma", "churn.delta", "churn.rho", "churn.std_errors",
    "churn.std_errors.rho", "spend", "spend.p", "spend.q", "spend.gamma", "spend.std_errors", "spend.customers",
    "spend.warnings", "spend.converged", "end_quarter", "fiscal_year_start", "as_of", "customers", "warnings", "histories",
]


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.sampled_from(KEY_PATHS), ODD_VALUES, st.booleans()), min_size=1, max_size=3))
def test_any_edited_model_file_is_read_whole_or_refused_in_one_line(tmp_path, edits):
    """Whatever a model file holds: a model whose parameters are all usable, or an InputError naming the file."""
    data = copy.deepcopy(VALID)
    for key_path, value, remove in edits:
        try:
            data = changed_in(data, key_path, value, remove)
        except (KeyError, TypeError, AttributeError):
            continue  # the parent was itself replaced (by a value that is not a table) in an earlier edit
    path = write(tmp_path, json.dumps(data))
    try:
        model = load_model(path)
    except InputError as exc:
        assert str(exc).startswith(path) and "\n" not in str(exc)
        return
    churn = model.churn
    for value in (churn.alpha, churn.beta, churn.gamma, churn.delta):
        assert math.isfinite(value) and value > 0
    assert churn.rho is None or 0 <= churn.rho <= 1
    assert 1 <= model.fiscal_year_start <= 12


def changed_in(data: dict, key_path: str, value, remove: bool) -> dict:
    *parents, last = key_path.split(".")
    node = data
    for key in parents:
        node = node[key]
    if remove:
        node.pop(last, None)
    else:
        node[last] = value
    return data


def test_format_is_the_first_thing_checked(tmp_path):
    assert MODEL_FORMAT == VALID["format"]
    with pytest.raises(InputError, match="no \"format\""):
        read_model_file(write(tmp_path, {**VALID, "format": "something-else"}))
