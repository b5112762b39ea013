"""The policy file: the example files load, overrides replace file values, bad keys and values are named."""

import math
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from lapsewise.errors import InputError
from lapsewise.files.policy_file import load_policy

POLICIES = Path(__file__).parent.parent / "policies"


ECONOMICS = """
[economics]
gross_margin = 0.45
order_cost = 4.00
piece_cost = 0.90
annual_discount_rate = 0.10
horizon_quarters = 40
"""


def write(tmp_path, text, name="policy.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.mark.parametrize("name", sorted(p.name for p in POLICIES.glob("*.toml")))
def test_example_policy_files_load(name):
    policy = load_policy(POLICIES / name)
    assert policy.economics.horizon_quarters >= 1
    assert len(policy.versions) >= 1


def test_overrides_replace_file_values(tmp_path):
    policy = load_policy(write(tmp_path, ECONOMICS), {"piece_cost": 1.10, "order_value": 80.0, "gross_margin": None})
    assert policy.economics.piece_cost == 1.10
    assert policy.economics.order_value == 80.0
    assert policy.economics.gross_margin == 0.45


@pytest.mark.parametrize(
    "change, message",
    [
        (("piece_cost = 0.90", "piece_cost = -0.5"), "piece_cost"),
        (("gross_margin = 0.45", "gross_margin = 1.4"), "gross_margin"),
        (("order_cost = 4.00", "order_cost = 4.00\nshipping = 2"), "unknown key 'shipping'"),
        (("horizon_quarters = 40", ""), "missing 'horizon_quarters'"),
        (("horizon_quarters = 40", "horizon_quarters = 2.5"), "horizon_quarters"),
        (("piece_cost = 0.90", 'piece_cost = "cheap"'), "piece_cost"),
        (("[economics]", "[economics"), "not valid TOML"),
    ],
)
def test_bad_policy_files_name_the_key(tmp_path, change, message):
    with pytest.raises(InputError, match=message):
        load_policy(write(tmp_path, ECONOMICS.replace(*change)))


def test_bad_override_names_the_key(tmp_path):
    with pytest.raises(InputError, match="piece_cost"):
        load_policy(write(tmp_path, ECONOMICS), {"piece_cost": -1.0})


def test_versions_replace_the_economics_piece_cost(tmp_path):
    text = ECONOMICS + '\n[[versions]]\nname = "slim"\npiece_cost = 0.5\nresponse = 0.8\nsetup_cost = 100\nmin_quantity = 500\n'
    policy = load_policy(write(tmp_path, text))
    assert [v.name for v in policy.versions] == ["slim"]
    assert policy.versions[0].piece_cost == 0.5 and policy.versions[0].min_quantity == 500
    bad = ECONOMICS + '\n[[versions]]\nname = "slim"\npiece_cost = 0.5\ncolour = "red"\n'
    with pytest.raises(InputError, match="unknown key 'colour'"):
        load_policy(write(tmp_path, bad))


# ---------------------------------------------------------------- a hostile corpus


@pytest.mark.parametrize(
    "text, message",
    [
        ("economics = 3", "economics must be a table of keys"),
        ("economics = [1, 2]", "economics must be a table of keys"),
        ('segments = "all"\n' + ECONOMICS, "segments must be a table of keys"),
        ("versions = 5\n" + ECONOMICS, "versions must be \\[\\[versions\\]\\] tables"),
        (ECONOMICS.replace("piece_cost = 0.90", "piece_cost = 1e308"), "piece_cost = 1e\\+308 is above"),
        (ECONOMICS.replace("piece_cost = 0.90", "piece_cost = inf"), "piece_cost = inf is not a number"),
        (ECONOMICS.replace("piece_cost = 0.90", "piece_cost = nan"), "piece_cost = nan is not a number"),
        (ECONOMICS.replace("order_cost = 4.00", "order_cost = true"), "order_cost = True is not a number"),
        (ECONOMICS.replace("horizon_quarters = 40", "horizon_quarters = 120"), "horizon_quarters = 120 is above 80; the stop-rule program's memory"),
        (ECONOMICS + "order_value = 1e15\n", "order_value = 1e\\+15 is above"),
        (ECONOMICS + '\n[[versions]]\nname = "slim"\npiece_cost = 0.5\nsetup_cost = 1e308\n', "slim.setup_cost = 1e\\+308 is above"),
        (ECONOMICS + '\n[[versions]]\nname = 7\npiece_cost = 0.5\n', "has name = 7; write the name in quotes"),
        (ECONOMICS + '\n[[versions]]\nname = "x"\npiece_cost = 0.5\nmin_quantity = 1e12\n', "x.min_quantity = 1e\\+12 is above"),
        (ECONOMICS + '\n[segments]\nfrequency_bands = [0, 1, 99999]\n', "frequency_bands must be a list of up to 20 whole numbers"),
        (ECONOMICS + '\n[segments]\nmin_share = { "1 repeat, 0 silent" = 0.8 }\nmax_share = { "1 repeat, 0 silent" = 0.5 }\n',
         "segment '1 repeat, 0 silent' has min_share 0.8 above its max_share 0.5"),
        ("a = " + "[" * 5000 + "]" * 5000, "nested too deeply|not valid TOML"),
    ],
    ids=["economics-number", "economics-list", "segments-text", "versions-number", "huge-piece-cost", "infinite-cost", "nan-cost",
         "boolean-cost", "horizon-above-max", "huge-order-value", "huge-setup-cost", "numeric-version-name", "huge-print-run",
         "huge-band", "shares-contradict", "deep-nesting"],
)
def test_hostile_policy_files_are_refused_naming_the_key(tmp_path, text, message):
    path = write(tmp_path, text)
    with pytest.raises(InputError, match=message) as caught:
        load_policy(path)
    assert str(caught.value).startswith(str(path)) and "\n" not in str(caught.value)


def test_a_fifo_or_a_device_is_refused_as_a_policy_file(tmp_path):
    import os

    fifo = tmp_path / "policy.toml"
    os.mkfifo(fifo)
    with pytest.raises(InputError, match="not a regular file"):
        load_policy(fifo)
    with pytest.raises(InputError, match="not a regular file"):
        load_policy("/dev/zero")


TOML_VALUES = st.one_of(
    st.integers(min_value=-(10**20), max_value=10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(alphabet="abc =+\"", max_size=6),
    st.lists(st.integers(min_value=-3, max_value=50), max_size=4),
    st.dictionaries(st.sampled_from(["a", "1 repeat, 0 silent"]), st.floats(min_value=-1, max_value=2), max_size=2),
)
POLICY_KEYS = {
    "economics": ["gross_margin", "order_cost", "piece_cost", "annual_discount_rate", "horizon_quarters", "order_value", "unmailed_response", "colour"],
    "segments": ["frequency_bands", "silent_bands", "spend_bands", "min_share", "max_share"],
    "versions": ["name", "piece_cost", "response", "setup_cost", "min_quantity"],
}


def toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return "nan" if value != value else ("inf" if value == float("inf") else "-inf" if value == float("-inf") else repr(value))
    if isinstance(value, str):
        return '"' + value.replace('"', '\\"') + '"'
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{ " + ", ".join(f'"{k}" = {toml_value(v)}' for k, v in value.items()) + " }"
    return str(value)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(edits=st.lists(st.tuples(st.sampled_from(["economics", "segments", "versions"]), st.integers(0, 7), TOML_VALUES), max_size=4))
def test_any_policy_file_is_read_whole_or_refused_in_one_line(tmp_path, edits):
    """Whatever the values: a policy whose every figure is finite and in range, or an InputError naming the file."""
    economics = {"gross_margin": 0.45, "order_cost": 4.0, "piece_cost": 0.9, "annual_discount_rate": 0.1, "horizon_quarters": 8}
    sections = {"economics": dict(economics), "segments": {}, "versions": {"name": "full", "piece_cost": 0.9}}
    for section, index, value in edits:
        keys = POLICY_KEYS[section]
        sections[section][keys[index % len(keys)]] = value
    text = "".join(
        [f"[{name}]\n" + "".join(f"{key} = {toml_value(value)}\n" for key, value in sections[name].items()) for name in ("economics", "segments")]
        + ["[[versions]]\n" + "".join(f"{key} = {toml_value(value)}\n" for key, value in sections["versions"].items())]
    )
    path = write(tmp_path, text)
    try:
        policy = load_policy(path)
    except InputError as exc:
        assert str(exc).startswith(str(path)) and "\n" not in str(exc)
        return
    numbers = [value for key, value in vars(policy.economics).items() if value is not None and key != "quarters"]
    numbers += [value for pairs in policy.economics.quarters for _, value in pairs]
    numbers += [value for version in policy.versions for value in (version.piece_cost, version.response, version.setup_cost, version.min_quantity)]
    numbers += list(policy.segments.min_share.values()) + list(policy.segments.max_share.values())
    assert all(math.isfinite(value) and value >= 0 for value in numbers)
    assert 1 <= policy.economics.horizon_quarters <= 80 and 0 <= policy.economics.gross_margin <= 1


SEASONAL = ECONOMICS + """
[economics.quarter_4]
piece_cost = 2.10
gross_margin = 0.38

[[versions]]
name = "full"
piece_cost = 1.60

[versions.quarter_4]
piece_cost = 2.40

[[versions]]
name = "postcard"
piece_cost = 0.40
response = 0.45
"""


def test_a_quarter_of_the_year_overrides_its_costs_and_margin(tmp_path):
    policy = load_policy(write(tmp_path, SEASONAL))
    economics = policy.economics
    assert economics.seasonal
    assert economics.in_quarter(3).piece_cost == 2.10 and economics.in_quarter(3).gross_margin == 0.38
    assert economics.in_quarter(3).order_cost == 4.00  # not overridden
    assert economics.in_quarter(0).piece_cost == 0.90 and economics.in_quarter(7).piece_cost == 2.10  # modulo 4
    full, postcard = policy.versions
    assert [full.piece_cost_in(q) for q in range(4)] == [1.60, 1.60, 1.60, 2.40]
    assert [postcard.piece_cost_in(q) for q in range(4)] == [0.40] * 4


def test_without_versions_the_standard_piece_takes_the_quarters_piece_cost(tmp_path):
    policy = load_policy(write(tmp_path, ECONOMICS + "[economics.quarter_2]\npiece_cost = 1.25\n"))
    (standard,) = policy.versions
    assert [standard.piece_cost_in(q) for q in range(4)] == [0.90, 1.25, 0.90, 0.90]


def test_a_flag_holds_in_every_quarter(tmp_path):
    policy = load_policy(write(tmp_path, SEASONAL), {"piece_cost": 1.00})
    assert [policy.economics.in_quarter(q).piece_cost for q in range(4)] == [1.00] * 4
    assert policy.economics.in_quarter(3).gross_margin == 0.38  # the quarter's other overrides stay


@pytest.mark.parametrize(
    "table, named",
    [
        ("[economics.quarter_4]\nhorizon_quarters = 8\n", "unknown key 'horizon_quarters' in [quarter_4]"),
        ("[economics.quarter_4]\ngross_margin = 1.5\n", "quarter_4.gross_margin = 1.5 is above 1"),
        ("[economics.quarter_4]\npiece_cost = -1\n", "quarter_4.piece_cost = -1 is below 0"),
        ("[economics]\nquarter_4 = 2.1\n", "quarter_4 must be a table"),
        ("[economics.quarter_5]\npiece_cost = 1.0\n", "unknown key 'quarter_5' in [economics]"),
        ("[[versions]]\nname = \"full\"\npiece_cost = 1.0\n[versions.quarter_2]\nresponse = 0.5\n", "unknown key 'response' in [full.quarter_2]"),
        ("[[versions]]\nname = \"full\"\npiece_cost = 1.0\n[versions.quarter_2]\npiece_cost = \"dear\"\n", "full.quarter_2.piece_cost = 'dear' is not a number"),
        ("[versions.quarter_2]\npiece_cost = 1.0\n", "versions must be \\[\\[versions\\]\\] tables"),
    ],
)
def test_bad_quarter_overrides_are_named(tmp_path, table, named):
    text = ECONOMICS + table if not table.startswith("[economics]\n") else ECONOMICS.replace("[economics]\n", table)
    pattern = named if "\\[" in named else named.replace("[", r"\[").replace("]", r"\]").replace(".", r"\.")
    with pytest.raises(InputError, match=pattern):
        load_policy(write(tmp_path, text))
