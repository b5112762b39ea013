"""Cells into values: ids trimmed or left out, dates read or refused by row, amounts read or refused by row."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest

from builders import typed_orders, write_parquet
from conftest import orders_text, repair_count
from lapsewise.errors import InputError
from lapsewise.files.inputs import load_orders


def ids_of(loaded) -> list[str]:
    return [str(i) for i in loaded.frame["customer_id"]]


def dates_of(loaded, column: str = "order_date") -> list[str]:
    return [str(d) for d in loaded.frame[column]]


@pytest.mark.parametrize(
    "text, message",
    [
        # B2's line is the second data line: row 3.
        (orders_text("A1,2023-01-15,10", "B2,,5"), r"row 3, column order_date: the date is blank"),
        # Year 1000 cannot be held as datetime64[ns]; it must not wrap around into another century.
        (orders_text("A1,2023-01-15,10", "A1,1000-01-15,5"), r"row 3, column order_date: '1000-01-15' is outside the years"),
        (orders_text("A1,2023-01-15,1e400"), r"row 2, column amount: the amount is infinite"),
        (orders_text(",2023-01-15,10", "  ,2023-02-01,5"), r"no usable order rows"),
    ],
    ids=["blank-date", "date-out-of-range", "infinite-amount", "only-blank-ids"],
)
def test_unreadable_cells_are_refused_by_row(write_file, text, message):
    path = write_file("orders.csv", text)
    with pytest.raises(InputError, match=message) as caught:
        load_orders(path)
    assert str(caught.value).startswith(str(path))


def test_blank_ids_are_left_out_and_counted(write_file):
    rows = ["A1,2023-01-15,10", ",2023-01-16,20", "   ,2023-01-17,30", "NULL,2023-01-18,40"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # Empty, all-space and NULL ids are blank: three rows out, and none of them counts as a padded id.
    assert repair_count(loaded.repairs, "blank customer id") == 3
    assert repair_count(loaded.repairs, "surrounding spaces") == 0
    assert ids_of(loaded) == ["A1"]


def test_padded_ids_are_trimmed_and_counted(write_file):
    rows = ["A1,2023-01-15,10", " A1 ,2023-02-15,20", "B2  ,2023-03-15,30"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # " A1 " and "B2  " have spaces around them; " A1 " is then the same customer as "A1".
    assert repair_count(loaded.repairs, "surrounding spaces") == 2
    assert ids_of(loaded) == ["A1", "A1", "B2"]
    assert sorted(loaded.frame["customer_id"].cat.categories) == ["A1", "B2"]


def test_timestamps_keep_their_date_and_are_counted(write_file):
    rows = ["A1,2023-03-31 23:59:59,10", "A1,2023-04-01T00:00:01,20", "B2,2023-02-01,5"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # Two of the three dates carry a time of day; the last second of March stays in March.
    assert repair_count(loaded.repairs, "time of day") == 2
    assert dates_of(loaded) == ["2023-03-31 23:59:59", "2023-04-01 00:00:01", "2023-02-01 00:00:00"]


def test_blank_amount_is_left_out_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", orders_text("A1,2023-01-15,10", "B2,2023-02-01,", "C3,2023-03-01,  ")))
    # B2's amount is empty and C3's only spaces: two rows out.
    assert repair_count(loaded.repairs, "blank amount") == 2
    assert ids_of(loaded) == ["A1"]


def test_an_implausibly_large_amount_is_refused(write_file):
    # Above 1e12 an amount is an export error, and would overflow the panel's float32 spend.
    with pytest.raises(InputError, match="row 2, column amount: 1e\\+38 is implausibly large"):
        load_orders(write_file("orders.csv", orders_text("A1,2023-01-15,1e38")))


def test_parquet_with_text_dates_and_integer_ids_loads(tmp_path):
    frame = pd.DataFrame({"customer_id": [101, 102], "order_date": ["2023-01-15", "2023-02-01"], "amount": [3, 4]})
    loaded = load_orders(write_parquet(tmp_path / "orders.parquet", frame))
    # Integer ids become text ids; text dates are parsed as in a CSV.
    assert ids_of(loaded) == ["101", "102"]
    assert dates_of(loaded) == ["2023-01-15 00:00:00", "2023-02-01 00:00:00"]


def test_parquet_blank_id_and_missing_amount_are_counted(tmp_path):
    frame = typed_orders()
    frame.loc[1, "customer_id"] = None
    frame.loc[2, "amount"] = np.nan
    loaded = load_orders(write_parquet(tmp_path / "orders.parquet", frame))
    # Row 2 has no id, row 3 no amount: only row 1 is left.
    assert repair_count(loaded.repairs, "blank customer id") == 1
    assert repair_count(loaded.repairs, "blank amount") == 1
    assert ids_of(loaded) == ["A1"]


def test_parquet_missing_date_names_its_row(tmp_path):
    frame = typed_orders()
    frame.loc[1, "order_date"] = pd.NaT
    # Parquet rows are numbered from 1: the second row is row 2.
    with pytest.raises(InputError, match=r"row 2, column order_date: the date is blank"):
        load_orders(write_parquet(tmp_path / "orders.parquet", frame))


def test_parquet_date_outside_the_supported_years_is_refused(tmp_path):
    frame = typed_orders().astype({"order_date": "datetime64[s]"})
    frame.loc[0, "order_date"] = pd.Timestamp(dt.datetime(1000, 1, 15)).as_unit("s")
    with pytest.raises(InputError, match=r"row 1, column order_date: .*outside the years"):
        load_orders(write_parquet(tmp_path / "orders.parquet", frame))


# ---------------------------------------------------------------- ids in one canonical form


@pytest.mark.parametrize(
    "written, canonical",
    [
        (["1.0", "42.00", "007", "1.5"], ["1", "42", "007", "1.5"]),  # whole numbers written as decimals; leading zeros kept
        ([" A1 ", "A1\t"], ["A1", "A1"]),  # surrounding spaces
        (["Jose\u0301", "Jos\u00e9"], ["Jos\u00e9", "Jos\u00e9"]),  # decomposed (NFD) and composed (NFC) accents: one id
    ],
    ids=["decimal-numbers", "padded", "unicode-forms"],
)
def test_ids_are_read_in_one_canonical_form(write_file, written, canonical):
    rows = [f"{customer},2023-0{i + 1}-15,10" for i, customer in enumerate(written)]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    assert ids_of(loaded) == canonical


def test_float_and_integer_id_columns_read_as_plain_whole_numbers(tmp_path):
    # A Parquet export that typed the ids as floats (1.0, 2.0) or integers (1, 2) gives the text ids "1", "2".
    for ids in ([1.0, 2.0], [1, 2]):
        frame = typed_orders().iloc[:2].assign(customer_id=ids)
        assert ids_of(load_orders(write_parquet(tmp_path / "orders.parquet", frame))) == ["1", "2"]


def test_an_id_that_cannot_be_an_id_is_refused_with_its_row(write_file):
    with pytest.raises(InputError, match="row 3, column customer_id: an id of 300 characters"):
        load_orders(write_file("orders.csv", orders_text("A1,2023-01-15,10", "x" * 300 + ",2023-01-15,10")))
