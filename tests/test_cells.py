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


# ---------------------------------------------------------------- amounts and dates in the forms systems export

from decimal import Decimal  # noqa: E402

from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

from lapsewise.files.cells import parse_amounts, parse_dates  # noqa: E402


def _grouped(digits: str, separator: str) -> str:
    """'1234567' as '1,234,567' (with ``separator`` between groups of three from the right)."""
    head = len(digits) % 3 or 3
    return separator.join([digits[:head]] + [digits[i : i + 3] for i in range(head, len(digits), 3)])


@st.composite
def written_amounts(draw, decimal_comma: bool):
    """An amount with two decimals, and how an export might write it: grouping, currency, sign style."""
    value = draw(st.decimals(min_value=Decimal("-999999999.99"), max_value=Decimal("999999999.99"), places=2, allow_nan=False, allow_infinity=False))
    whole, cents = f"{abs(value):.2f}".split(".")
    groups = [".", " ", "\u00a0", "'", ""] if decimal_comma else [",", " ", "\u00a0", "'", ""]
    number = _grouped(whole, draw(st.sampled_from(groups))) + ("," if decimal_comma else ".") + cents
    currency = draw(st.sampled_from(["", "$", "\u20ac", "\u00a3", "EUR ", "USD", " CHF", " \u20ac"]))
    written = currency + number if currency.strip() in ("$", "\u00a3", "EUR") and not currency.startswith(" ") else number + currency
    if value < 0:
        style = draw(st.sampled_from(["minus", "parentheses", "trailing minus", "minus before currency"]))
        written = {"minus": "-" + written, "parentheses": f"({written})", "trailing minus": written + "-", "minus before currency": "-" + written}[style]
    return written, float(value)


@settings(max_examples=300, deadline=None)
@given(data=st.data(), decimal_comma=st.booleans())
def test_amounts_in_export_forms_parse_to_the_value_they_were_made_from(data, decimal_comma):
    """Each written amount, read with its decimal mark named, is the value it was written from (float of the decimal)."""
    written, value = data.draw(written_amounts(decimal_comma))
    values, blank = parse_amounts("f.csv", "amount", pd.Series([written]), True, decimal_comma)
    assert not blank[0]
    assert values[0] == value, (written, values[0], value)


@settings(max_examples=100, deadline=None)
@given(data=st.data(), decimal_comma=st.booleans())
def test_the_decimal_mark_is_found_from_amounts_with_cents(data, decimal_comma):
    """Amounts written with cents show their decimal mark, so a column of them is read right without the option."""
    pairs = data.draw(st.lists(written_amounts(decimal_comma), min_size=1, max_size=6))
    values, _ = parse_amounts("f.csv", "amount", pd.Series([w for w, _ in pairs]), True, None)
    assert values.tolist() == [v for _, v in pairs]


# (strftime format, whether the file's dates need an unambiguous day): the formats a column is recognised in
DATE_FORMS = [
    ("%Y-%m-%d", False),
    ("%m/%d/%Y", True),
    ("%d/%m/%Y", True),
    ("%d.%m.%Y", True),
    ("%m-%d-%Y", True),
    ("%d.%m.%y", True),
    ("%Y%m%d", False),
    ("%d %b %Y", False),
    ("%b %d, %Y", False),
    ("%d-%b-%y", False),
    ("%m/%d/%Y %H:%M", True),
]


@settings(max_examples=200, deadline=None)
@given(
    dates=st.lists(st.datetimes(min_value=dt.datetime(1970, 1, 1), max_value=dt.datetime(2060, 12, 31)), min_size=1, max_size=8),
    form=st.sampled_from(DATE_FORMS),
    named=st.booleans(),
)
def test_dates_in_export_forms_parse_to_the_date_they_were_made_from(dates, form, named):
    """Dates written in a format are read back as written (to the minute the format keeps), with the format named
    by --date-format or, when the column shows which number is the day, found without it."""
    date_format, needs_a_late_day = form
    if needs_a_late_day and not named:
        dates = dates + [dt.datetime(2001, 10, 25, 13, 45)]  # day 25 cannot be a month: the column is unambiguous
    written = [d.strftime(date_format) for d in dates]
    keep = np.ones(len(written), dtype=bool)
    parsed = parse_dates("f.csv", "order_date", pd.Series(written), True, keep, date_format if named else None)
    expected = [dt.datetime.strptime(w, date_format) for w in written]  # the date and time the written form keeps
    assert [pd.Timestamp(p).to_pydatetime() for p in parsed] == expected


def test_dates_that_fit_day_first_and_month_first_are_refused_naming_the_option():
    # 01/02/2023 and 03/04/2023: every day is 12 or less, so either order gives real dates.
    with pytest.raises(InputError, match=r"column order_date: dates such as '01/02/2023' fit both day-first and month-first; pass --date-format"):
        parse_dates("f.csv", "order_date", pd.Series(["01/02/2023", "03/04/2023"]), True, np.ones(2, dtype=bool))


def test_a_typo_among_day_first_dates_is_named_by_its_row():
    # 31/02/2023 is no day in either order; the other dates are day-first. It is on the second data line: row 3.
    with pytest.raises(InputError, match=r"row 3, column order_date: '31/02/2023' is not a date"):
        parse_dates("f.csv", "order_date", pd.Series(["25/01/2023", "31/02/2023"]), True, np.ones(2, dtype=bool))


def test_plain_amounts_and_iso_dates_count_no_conversion():
    """The clean path converts nothing, so it counts nothing."""
    repairs: dict[str, int] = {}
    values, _ = parse_amounts("f.csv", "amount", pd.Series(["12.50", "-3", "1234.5"]), True, None, repairs)
    parse_dates("f.csv", "order_date", pd.Series(["2023-01-15", "2023-02-01"]), True, np.ones(2, dtype=bool), None, repairs)
    assert values.tolist() == [12.5, -3.0, 1234.5]
    assert repairs == {}
