"""The loaders: what a clean file gives, what they repair and count, and what they refuse.

Every file is written by the test into a temporary folder; the expected values follow from its few rows.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings, strategies as st

from conftest import (
    ANY_FILE,
    ANY_FILE_SETTINGS,
    GOOD_ORDERS,
    MAILINGS_HEADER,
    ORDERS_HEADER,
    csv_text,
    file_holding,
    mailings_text,
    orders_text,
    repair_count,
)
from lapsewise.errors import InputError
from lapsewise.load import duplicate_rows, load_id_list, load_mailings, load_orders, load_orders_and_mailings
from lapsewise.panel import build_panel, panel_from_files


def ids_of(loaded) -> list[str]:
    return [str(i) for i in loaded.frame["customer_id"]]


def dates_of(loaded, column: str = "order_date") -> list[str]:
    return [str(d) for d in loaded.frame[column]]


# ---------------------------------------------------------------- a clean file


def test_clean_orders_file_is_read_as_written(write_file):
    loaded = load_orders(write_file("orders.csv", GOOD_ORDERS))
    # GOOD_ORDERS holds three rows, A1, B2, A1, in that order, and needs no repair.
    assert ids_of(loaded) == ["A1", "B2", "A1"]
    assert dates_of(loaded) == ["2023-01-15 00:00:00", "2023-02-01 00:00:00", "2023-05-02 00:00:00"]
    assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]
    assert isinstance(loaded.frame["customer_id"].dtype, pd.CategoricalDtype)
    assert loaded.repairs == {}


# ---------------------------------------------------------------- fatal problems


def test_bad_input_raises_input_error(bad_input, tmp_path):
    """Each fatal case (see conftest.BAD_INPUTS) raises InputError naming the file, row or column and the fix."""
    orders, mailings = bad_input.make(tmp_path)
    with pytest.raises(InputError) as caught:
        panel_from_files(str(orders), str(mailings) if mailings else None, **bad_input.library_kwargs())
    for fragment in bad_input.expected(orders, mailings):
        assert fragment in str(caught.value)


@pytest.mark.parametrize(
    "old, new, keyword",
    [("customer_id", "client", "id_column"), ("order_date", "date", "date_column"), ("amount", "value", "amount_column")],
)
def test_column_options_accept_other_column_names(write_file, old, new, keyword):
    path = write_file("orders.csv", GOOD_ORDERS.replace(old, new, 1))
    loaded = load_orders(path, **{keyword: new})
    # The same three rows as GOOD_ORDERS, under the standard names.
    assert list(loaded.frame.columns) == ["customer_id", "order_date", "amount"]
    assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]


@pytest.mark.parametrize(
    "text, message",
    [
        # B2's line is the second data line: row 3.
        (orders_text("A1,2023-01-15,10", "B2,,5"), r"row 3, column order_date: the date is blank"),
        # Year 1000 cannot be held as datetime64[ns]; it must not wrap around into another century.
        (orders_text("A1,2023-01-15,10", "A1,1000-01-15,5"), r"row 3, column order_date: '1000-01-15' is outside the years"),
        (orders_text("A1,2023-01-15,1e400"), r"row 2, column amount: the amount is infinite"),
        # "1,250.00" unquoted splits into two fields, one more than the header; reading only "1" would be wrong.
        # When only the second data line (file line 3) has the surplus field, the CSV reader itself stops there;
        (orders_text("A1,2023-01-15,10", "B2,2023-02-01,1,250.00"), r"Expected 3 fields in line 3, saw 4"),
        # when every data line has it, pandas alone would take the first column as row labels; row 2 is the first.
        (orders_text("A1,2023-01-15,1,250.00", "B2,2023-02-01,2,000.00"), r"row 2: 4 fields but the header has 3"),
        # " amount" becomes "amount" once trimmed: two columns of that name.
        (csv_text(ORDERS_HEADER + ", amount", "A1,2023-01-15,10,11"), r"the column 'amount' appears more than once"),
        (orders_text(",2023-01-15,10", "  ,2023-02-01,5"), r"no usable order rows"),
    ],
    ids=["blank-date", "date-out-of-range", "infinite-amount", "surplus-field-one-row", "surplus-field-every-row",
         "column-twice", "only-blank-ids"],
)
def test_more_unusable_orders_files_are_refused(write_file, text, message):
    path = write_file("orders.csv", text)
    with pytest.raises(InputError, match=message) as caught:
        load_orders(path)
    assert str(caught.value).startswith(str(path))


# ---------------------------------------------------------------- repaired and counted


def test_byte_order_mark_is_removed_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", b"\xef\xbb\xbf" + GOOD_ORDERS.encode("utf-8")))
    # The mark would otherwise be glued to the first column name and hide customer_id.
    assert repair_count(loaded.repairs, "byte-order mark") == 1
    assert ids_of(loaded) == ["A1", "B2", "A1"]


def test_windows_line_endings_are_read_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", GOOD_ORDERS.replace("\n", "\r\n")))
    assert repair_count(loaded.repairs, "Windows line endings") == 1
    # No carriage return is left on the last column: the amounts parse exactly.
    assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]


def test_exact_duplicate_rows_are_dropped_and_counted(write_file):
    rows = ["A1,2023-01-15,10", "A1,2023-01-15,10", "A1,2023-01-15,10", "A1,2023-01-15,11"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # Rows 2 and 3 repeat row 1 exactly; row 4 differs in the amount and stays.
    assert repair_count(loaded.repairs, "duplicate") == 2
    assert loaded.frame["amount"].tolist() == [10.0, 11.0]


def test_returns_are_kept_and_counted(write_file):
    rows = ["A1,2023-01-15,40", "A1,2023-01-20,-15", "B2,2023-02-01,5", "B2,2023-02-03,-5"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # Two negative amounts: both are returns, kept for netting.
    assert repair_count(loaded.repairs, "return") == 2
    assert loaded.frame["amount"].tolist() == [40.0, -15.0, 5.0, -5.0]


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


def test_extra_columns_are_ignored_and_counted(write_file):
    text = csv_text(ORDERS_HEADER + ",channel,note", "A1,2023-01-15,10,web,first", "B2,2023-02-01,5,phone,")
    loaded = load_orders(write_file("orders.csv", text))
    # channel and note are two columns the orders do not use.
    assert repair_count(loaded.repairs, "extra columns ignored (channel, note)") == 2
    assert list(loaded.frame.columns) == ["customer_id", "order_date", "amount"]


def test_trailing_commas_are_read_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", csv_text(ORDERS_HEADER, "A1,2023-01-15,10,", "B2,2023-02-01,5,")))
    # Both data rows end in one empty extra field; the columns must not shift (A1 stays an id, not a label).
    assert repair_count(loaded.repairs, "trailing commas") == 2
    assert ids_of(loaded) == ["A1", "B2"]
    assert loaded.frame["amount"].tolist() == [10.0, 5.0]


def test_timestamps_keep_their_date_and_are_counted(write_file):
    rows = ["A1,2023-03-31 23:59:59,10", "A1,2023-04-01T00:00:01,20", "B2,2023-02-01,5"]
    loaded = load_orders(write_file("orders.csv", orders_text(*rows)))
    # Two of the three dates carry a time of day; the last second of March stays in March.
    assert repair_count(loaded.repairs, "time of day") == 2
    assert dates_of(loaded) == ["2023-03-31 23:59:59", "2023-04-01 00:00:01", "2023-02-01 00:00:00"]


def test_quoted_fields_with_commas_are_read_whole(write_file):
    text = csv_text(
        ORDERS_HEADER + ",note",
        '"Smith, J",2023-01-15,"1250.00","gift, wrapped"',
        'B2,"2023-02-01",5,"say ""thanks"", please"',
    )
    loaded = load_orders(write_file("orders.csv", text))
    # The commas inside quotes do not split fields: the id is "Smith, J", the amount 1250, and only note is extra.
    assert ids_of(loaded) == ["Smith, J", "B2"]
    assert loaded.frame["amount"].tolist() == [1250.0, 5.0]
    assert loaded.repairs == {"extra columns ignored (note)": 1}


def test_blank_amount_is_left_out_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", orders_text("A1,2023-01-15,10", "B2,2023-02-01,", "C3,2023-03-01,  ")))
    # B2's amount is empty and C3's only spaces: two rows out.
    assert repair_count(loaded.repairs, "blank amount") == 2
    assert ids_of(loaded) == ["A1"]


def test_orders_after_the_as_of_date_are_counted(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", "A1,2023-07-02,20", "A1,2023-08-09,30"))
    panel = panel_from_files(str(path), as_of="2023-06-30")
    # The July and August orders fall after the as-of quarter (April to June).
    assert repair_count(panel.counts, "orders after the as-of quarter") == 2
    assert panel.spend.sum() == 10.0


def test_mailings_for_unknown_customers_are_counted(write_file):
    orders = write_file("orders.csv", GOOD_ORDERS)
    mailings = write_file("mailings.csv", mailings_text("A1,2023-04-10", "Z9,2023-04-10", "Z9,2023-07-10", "Y8,2023-04-10"))
    panel = panel_from_files(str(orders), str(mailings))
    # Z9 and Y8 have no orders: their three rows are left out; A1's row is used.
    assert repair_count(panel.counts, "mailing rows for customers not in the orders") == 3
    assert panel.mailing_history


def test_mailings_file_is_read_with_its_version_column(write_file):
    text = csv_text(MAILINGS_HEADER + ",version,cost", " A1 ,2023-04-10,spring,0.6", "B2,2023-07-01 09:30,summer,0.6")
    loaded = load_mailings(write_file("mailings.csv", text))
    # version is a known optional column (recognised, not carried: the model needs only mailed quarters);
    # cost is extra; " A1 " is padded.
    assert ids_of(loaded) == ["A1", "B2"]
    assert "version" not in loaded.frame.columns
    assert dates_of(loaded, "mail_date") == ["2023-04-10 00:00:00", "2023-07-01 09:30:00"]
    assert loaded.repairs == {"extra columns ignored (cost)": 1, "ids with surrounding spaces trimmed": 1}


def test_orders_and_mailings_read_side_by_side_match_each_read_alone(write_file):
    orders = write_file("orders.csv", GOOD_ORDERS)
    mailings = write_file("mailings.csv", mailings_text(" A1 ,2023-04-10", "B2,2023-07-01"))
    pair = load_orders_and_mailings(orders, mailings)
    pd.testing.assert_frame_equal(pair[0].frame, load_orders(orders).frame)
    pd.testing.assert_frame_equal(pair[1].frame, load_mailings(mailings).frame)
    assert pair[1].repairs == {"ids with surrounding spaces trimmed": 1}
    assert load_orders_and_mailings(orders, None)[1] is None
    # ``then`` works on the orders while the mailings load, and its result stands in their place.
    rows, loaded_mailings = load_orders_and_mailings(orders, mailings, then=lambda loaded: len(loaded.frame))
    assert rows == 3 and len(loaded_mailings.frame) == 2


def test_side_by_side_read_reports_the_orders_problem_first(write_file):
    # Both files are broken; the orders file's problem is the one reported, as when they are read in turn.
    orders = write_file("orders.csv", csv_text("customer_id,order_date", "A1,2023-01-15"))
    mailings = write_file("mailings.csv", csv_text("customer_id", "A1"))
    with pytest.raises(InputError, match="orders.csv: no column 'amount'"):
        load_orders_and_mailings(orders, mailings)


def test_id_list_keeps_each_id_once(write_file):
    loaded = load_id_list(write_file("suppress.csv", csv_text("customer_id,reason", "A1,moved", " A1,moved", ",deceased", "B2,")))
    # A1 twice (once padded), one row with a blank id, B2: two distinct ids.
    assert ids_of(loaded) == ["A1", "B2"]
    assert repair_count(loaded.repairs, "blank customer id") == 1


# ---------------------------------------------------------------- Parquet


def write_parquet(path: Path, frame: pd.DataFrame) -> Path:
    frame.to_parquet(path, index=False)
    return path


def typed_orders() -> pd.DataFrame:
    """GOOD_ORDERS as typed columns: text ids, timestamps, floats."""
    return pd.DataFrame(
        {
            "customer_id": ["A1", "B2", "A1"],
            "order_date": pd.to_datetime(["2023-01-15", "2023-02-01", "2023-05-02"]),
            "amount": [10.0, 25.5, 12.0],
        }
    )


def test_parquet_orders_load_like_the_same_csv(tmp_path, write_file):
    from_parquet = load_orders(write_parquet(tmp_path / "orders.parquet", typed_orders()))
    from_csv = load_orders(write_file("orders.csv", GOOD_ORDERS))
    # The same three orders, whatever the format.
    assert ids_of(from_parquet) == ids_of(from_csv)
    assert dates_of(from_parquet) == dates_of(from_csv)
    assert from_parquet.frame["amount"].tolist() == from_csv.frame["amount"].tolist()
    assert from_parquet.repairs == {}


def test_parquet_with_text_dates_and_integer_ids_loads(tmp_path):
    frame = pd.DataFrame({"customer_id": [101, 102], "order_date": ["2023-01-15", "2023-02-01"], "amount": [3, 4]})
    loaded = load_orders(write_parquet(tmp_path / "orders.parquet", frame))
    # Integer ids become text ids; text dates are parsed as in a CSV.
    assert ids_of(loaded) == ["101", "102"]
    assert dates_of(loaded) == ["2023-01-15 00:00:00", "2023-02-01 00:00:00"]


def test_parquet_missing_column_is_refused_and_the_option_fixes_it(tmp_path):
    path = write_parquet(tmp_path / "orders.parquet", typed_orders().rename(columns={"amount": "value"}))
    with pytest.raises(InputError, match=r"orders.parquet: no column 'amount' .*--amount-column"):
        load_orders(path)
    assert load_orders(path, amount_column="value").frame["amount"].tolist() == [10.0, 25.5, 12.0]


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


def test_parquet_without_rows_is_refused(tmp_path):
    path = write_parquet(tmp_path / "orders.parquet", typed_orders().iloc[:0])
    with pytest.raises(InputError, match=r"orders.parquet: has columns but no rows"):
        load_orders(path)


def test_damaged_parquet_is_refused(tmp_path):
    path = tmp_path / "orders.parquet"
    path.write_bytes(b"PAR1" + b"\x01\x02not really parquet")
    with pytest.raises(InputError, match=r"orders.parquet: not a readable Parquet file"):
        load_orders(path)


# ---------------------------------------------------------------- any file at all

@ANY_FILE_SETTINGS
@given(content=ANY_FILE)
def test_load_orders_accepts_or_refuses_any_file(content):
    """Whatever the bytes: a tidy result or an InputError, never another exception."""
    with file_holding(content) as path:
        try:
            loaded = load_orders(path)
        except InputError as exc:
            assert str(exc).startswith(str(path))
            return
        # A tidy result has the three standard columns, no blank or padded id and only finite amounts.
        assert list(loaded.frame.columns) == ["customer_id", "order_date", "amount"]
        ids = [str(i) for i in loaded.frame["customer_id"]]
        assert all(i == i.strip() and i != "" for i in ids)
        assert np.isfinite(loaded.frame["amount"].to_numpy()).all()
        assert all(count > 0 for count in loaded.repairs.values())
        try:
            build_panel(loaded)
        except InputError:
            pass


def test_an_implausibly_large_amount_is_refused(write_file):
    # Above 1e12 an amount is an export error, and would overflow the panel's float32 spend.
    with pytest.raises(InputError, match="row 2, column amount: 1e\\+38 is implausibly large"):
        load_orders(write_file("orders.csv", orders_text("A1,2023-01-15,1e38")))


@settings(max_examples=80, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.sampled_from(["A1", "B2", "C3", ""]),
            st.sampled_from([0.0, -0.0, 1.5, float("nan"), 10.0]),
            st.sampled_from(["2024-01-01", "2024-01-02"]),
            st.integers(min_value=0, max_value=2),
        ),
        max_size=40,
    )
)
def test_duplicate_rows_agree_with_pandas(rows):
    # Reference: pandas DataFrame.duplicated(keep="first"), which duplicate_rows computes faster.
    frame = pd.DataFrame(rows, columns=["customer_id", "amount", "order_date", "count"])
    frame["order_date"] = pd.to_datetime(frame["order_date"])
    assert duplicate_rows(frame).tolist() == frame.duplicated(keep="first").tolist()
