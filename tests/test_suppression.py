"""The suppression list against the base: ids matched in their canonical form, a list that matches nobody refused."""

import numpy as np
import pytest

from conftest import csv_text, orders_text
from lapsewise.data.panel import panel_from_files
from lapsewise.data.suppression import match_suppression
from lapsewise.errors import InputError
from lapsewise.files.inputs import load_id_list


def base(write_file, ids):
    rows = [f'"{customer}",2023-01-15,10' for customer in ids]
    return panel_from_files(str(write_file("orders.csv", orders_text(*rows))), as_of="2023-03-31")


@pytest.mark.parametrize(
    "orders_ids, listed, suppressed",
    [
        (["1.0", "2.0", "3.0"], ["1", "3"], ["1", "3"]),  # ids stored as floats in the orders, as integers in the list
        (["1", "2", "3"], ["1.0"], ["1"]),  # and the other way round
        (["Jos\u00e9", "Ana"], ["Jose\u0301"], ["Jos\u00e9"]),  # the same accented id in two Unicode forms
        (["A1", "B2"], ["  B2  "], ["B2"]),  # padded in the list
    ],
    ids=["float-ids", "integer-ids", "unicode-forms", "padded"],
)
def test_every_form_of_a_suppressed_id_is_honoured(write_file, orders_ids, listed, suppressed):
    panel = base(write_file, orders_ids)
    suppression = match_suppression(panel, load_id_list(write_file("suppress.csv", csv_text("customer_id", *listed))))
    assert sorted(panel.customer_ids[suppression.flags].tolist()) == sorted(suppressed)
    assert suppression.matched == len(suppressed) and suppression.listed == len(set(suppressed))


def test_a_list_that_matches_nobody_is_refused(write_file):
    panel = base(write_file, ["G000001", "G000002"])
    listed = load_id_list(write_file("suppress.csv", csv_text("customer_id", "1", "2")))
    with pytest.raises(InputError, match="none of its 2 ids is a customer in the orders .*'1'.*'G000001'"):
        match_suppression(panel, listed)


def test_a_list_that_matches_few_is_flagged(write_file):
    panel = base(write_file, ["A1", "B2", "C3"])
    listed = load_id_list(write_file("suppress.csv", csv_text("customer_id", "A1", "X1", "X2")))
    suppression = match_suppression(panel, listed)
    assert suppression.matched == 1 and suppression.few_matched  # 1 of 3 ids, below half
    assert np.array_equal(suppression.flags, panel.customer_ids == "A1")
