"""Reading a table: CSV and Parquet recognised and read as found, what is repaired on the way, what is refused.

Every file is written by the test into a temporary folder; the expected values follow from its few rows.
"""

from __future__ import annotations

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from builders import typed_orders, write_parquet
from conftest import GOOD_ORDERS, ORDERS_HEADER, csv_text, orders_text, repair_count
from lapsewise.errors import InputError
from lapsewise.files.inputs import load_orders
from lapsewise.files.tables import duplicate_rows


def ids_of(loaded) -> list[str]:
    return [str(i) for i in loaded.frame["customer_id"]]


@pytest.mark.parametrize(
    "text, message",
    [
        # "1,250.00" unquoted splits into two fields, one more than the header; reading only "1" would be wrong.
        # When only the second data line (file line 3) has the surplus field, the CSV reader itself stops there;
        (orders_text("A1,2023-01-15,10", "B2,2023-02-01,1,250.00"), r"Expected 3 fields in line 3, saw 4"),
        # when every data line has it, pandas alone would take the first column as row labels; row 2 is the first.
        (orders_text("A1,2023-01-15,1,250.00", "B2,2023-02-01,2,000.00"), r"row 2: 4 fields but the header has 3"),
        # " amount" becomes "amount" once trimmed: two columns of that name.
        (csv_text(ORDERS_HEADER + ", amount", "A1,2023-01-15,10,11"), r"the column 'amount' appears more than once"),
    ],
    ids=["surplus-field-one-row", "surplus-field-every-row", "column-twice"],
)
def test_unreadable_tables_are_refused(write_file, text, message):
    path = write_file("orders.csv", text)
    with pytest.raises(InputError, match=message) as caught:
        load_orders(path)
    assert str(caught.value).startswith(str(path))


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


def test_trailing_commas_are_read_and_counted(write_file):
    loaded = load_orders(write_file("orders.csv", csv_text(ORDERS_HEADER, "A1,2023-01-15,10,", "B2,2023-02-01,5,")))
    # Both data rows end in one empty extra field; the columns must not shift (A1 stays an id, not a label).
    assert repair_count(loaded.repairs, "trailing commas") == 2
    assert ids_of(loaded) == ["A1", "B2"]
    assert loaded.frame["amount"].tolist() == [10.0, 5.0]


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


def test_parquet_without_rows_is_refused(tmp_path):
    path = write_parquet(tmp_path / "orders.parquet", typed_orders().iloc[:0])
    with pytest.raises(InputError, match=r"orders.parquet: has columns but no rows"):
        load_orders(path)


def test_damaged_parquet_is_refused(tmp_path):
    path = tmp_path / "orders.parquet"
    path.write_bytes(b"PAR1" + b"\x01\x02not really parquet")
    with pytest.raises(InputError, match=r"orders.parquet: not a readable Parquet file"):
        load_orders(path)


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


# ---------------------------------------------------------------- hostile files


def test_a_fifo_or_a_device_is_refused_before_anything_reads_it(tmp_path):
    import os

    fifo = tmp_path / "orders.csv"
    os.mkfifo(fifo)  # reading it would wait forever for a writer
    for path in (fifo, "/dev/zero"):
        with pytest.raises(InputError, match="is not a regular file"):
            load_orders(path)


def test_a_header_of_a_megabyte_of_commas_is_refused_at_once(write_file):
    # Without a line break in the first 64 KB there is no header row to read; pandas would spend minutes and gigabytes.
    path = write_file("orders.csv", "," * 1_000_000 + "\n1,2,3\n")
    with pytest.raises(InputError, match="no line break in the first 64 KB"):
        load_orders(path)
    wide = write_file("wide.csv", ",".join(f"c{i}" for i in range(2_000)) + "\n" + ",".join("1" * 2_000) + "\n")
    with pytest.raises(InputError, match="the header row has 2,000 fields"):
        load_orders(wide)


def test_nested_parquet_columns_are_refused_only_when_used(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    base = {"order_date": pa.array(pd.to_datetime(["2023-01-15", "2023-05-02"])), "amount": pa.array([10.0, 12.0])}
    listed = tmp_path / "lists.parquet"
    pq.write_table(pa.table({"customer_id": pa.array([[1], [2]]), **base}), listed)
    with pytest.raises(InputError, match="'customer_id' holds lists or records"):
        load_orders(listed)
    extra = tmp_path / "extra.parquet"
    pq.write_table(pa.table({"customer_id": pa.array(["A1", "B2"]), **base, "tags": pa.array([{"a": 1}, {"a": 2}])}), extra)
    assert load_orders(extra).frame["customer_id"].tolist() == ["A1", "B2"]  # an unused nested column is no obstacle


def test_an_unreadable_or_impossible_path_is_refused(tmp_path):
    through_a_file = tmp_path / "orders.csv"
    through_a_file.write_text("x")
    for path in (through_a_file / "inner.csv", tmp_path / ("n" * 300 + ".csv")):
        with pytest.raises(InputError):
            load_orders(path)
