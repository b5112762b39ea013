"""The policy file: the example files load, overrides replace file values, bad keys and values are named."""

from pathlib import Path

import pytest

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
