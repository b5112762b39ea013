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


# ---------------------------------------------------------------- delimiters, encodings, compressed files, workbooks

import gzip  # noqa: E402
import zipfile  # noqa: E402

from lapsewise.files.tables import Reading, header_columns, read_table  # noqa: E402


@pytest.mark.parametrize("sep, label", [(";", "semicolon"), ("\t", "tab"), ("|", "pipe")])
def test_other_delimiters_are_found_from_the_header_and_counted(write_file, sep, label):
    path = write_file("orders.csv", GOOD_ORDERS.replace(",", sep))
    loaded = load_orders(path)
    # GOOD_ORDERS's three rows: A1 10.00, B2 25.50, A1 12.00.
    assert ids_of(loaded) == ["A1", "B2", "A1"]
    assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]
    assert repair_count(loaded.repairs, f"{label}-delimited") == 1


def test_the_delimiter_option_is_followed(write_file):
    # Semicolons between fields and commas inside the amounts (decimal commas): the option settles the delimiter.
    path = write_file("orders.csv", orders_text("A1;2023-01-15;10,50", "B2;2023-02-01;3,25").replace(",", ";", 2))
    loaded = load_orders(path, reading=Reading(delimiter=";", decimal_comma=True))
    # 10,50 and 3,25 with a decimal comma are 10.5 and 3.25.
    assert loaded.frame["amount"].tolist() == [10.5, 3.25]


def test_a_legacy_encoding_is_refused_naming_it_and_read_with_the_option(write_file):
    # "Zoë" and "Müller" in cp1252: bytes EB and FC, not UTF-8.
    path = write_file("orders.csv", orders_text("Zo\u00eb,2023-01-15,10", "M\u00fcller,2023-02-01,5").encode("cp1252"))
    with pytest.raises(InputError, match=r"is not UTF-8 text .*looks like cp1252.*pass --encoding cp1252"):
        load_orders(path)
    loaded = load_orders(path, reading=Reading(encoding="cp1252"))
    assert ids_of(loaded) == ["Zo\u00eb", "M\u00fcller"]
    assert repair_count(loaded.repairs, "decoded from cp1252") == 1


def test_utf16_text_is_refused_without_the_option_and_read_with_it(write_file):
    path = write_file("orders.csv", GOOD_ORDERS.encode("utf-16"))  # starts with the UTF-16 byte-order mark
    with pytest.raises(InputError, match="is UTF-16 text; pass --encoding utf-16"):
        load_orders(path)
    # GOOD_ORDERS's three amounts.
    assert load_orders(path, reading=Reading(encoding="utf-16")).frame["amount"].tolist() == [10.0, 25.5, 12.0]


def test_an_unknown_encoding_name_is_refused(write_file):
    path = write_file("orders.csv", GOOD_ORDERS)
    with pytest.raises(InputError, match="--encoding 'klingon': not an encoding"):
        load_orders(path, reading=Reading(encoding="klingon"))


def test_gzip_and_zip_files_read_like_the_plain_file(tmp_path):
    gz = tmp_path / "orders.csv.gz"
    gz.write_bytes(gzip.compress(GOOD_ORDERS.encode()))
    zipped = tmp_path / "orders.zip"
    with zipfile.ZipFile(zipped, "w") as archive:
        archive.writestr("export/orders.csv", GOOD_ORDERS)
    for path, what in ((gz, "gzip-compressed"), (zipped, "zip-compressed")):
        loaded = load_orders(path)
        assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]  # GOOD_ORDERS's amounts
        assert repair_count(loaded.repairs, what) == 1
        assert header_columns(path) == ORDERS_HEADER.split(",")


@pytest.mark.parametrize(
    "make, message",
    [
        # Two files in one archive: which is the orders?
        (lambda path: _zip(path, {"a.csv": GOOD_ORDERS, "b.csv": GOOD_ORDERS}), "must hold exactly one file (it holds a.csv, b.csv)"),
        # A gzip header followed by garbage.
        (lambda path: path.write_bytes(b"\x1f\x8b\x08\x00garbage"), "a damaged gzip file"),
        # A compressed file holding nothing.
        (lambda path: path.write_bytes(gzip.compress(b"")), "the compressed file holds nothing"),
    ],
)
def test_bad_compressed_files_are_refused(tmp_path, make, message):
    path = tmp_path / "orders.bin"
    make(path)
    with pytest.raises(InputError) as caught:
        read_table(path)
    assert message in str(caught.value)


def _zip(path, members: dict[str, str]) -> None:
    with zipfile.ZipFile(path, "w") as archive:
        for name, text in members.items():
            archive.writestr(name, text)


def _workbook(path, sheets: dict[str, list[list]]) -> None:
    import openpyxl

    workbook = openpyxl.Workbook()
    workbook.remove(workbook.active)
    for title, rows in sheets.items():
        sheet = workbook.create_sheet(title)
        for row in rows:
            sheet.append(row)
    workbook.save(path)


def test_a_workbook_is_read_from_its_first_sheet_or_the_named_one(tmp_path):
    import datetime as dt

    path = tmp_path / "orders.xlsx"
    rows = [["customer_id", "order_date", "amount"], ["A1", dt.datetime(2023, 1, 15), 10], [17, dt.datetime(2023, 2, 1), 25.5], [None, None, None]]
    _workbook(path, {"Orders": rows, "Other": [["customer_id", "order_date", "amount"], ["Z9", dt.datetime(2024, 3, 1), 1]]})
    first = load_orders(path)
    # The first sheet's two rows (the empty last row dropped); the number 17 as the id "17".
    assert ids_of(first) == ["A1", "17"]
    assert [str(d.date()) for d in first.frame["order_date"]] == ["2023-01-15", "2023-02-01"]
    assert first.frame["amount"].tolist() == [10.0, 25.5]
    assert repair_count(first.repairs, "sheet 'Orders'") == 1
    # The other sheet's one row.
    assert ids_of(load_orders(path, reading=Reading(sheet="Other"))) == ["Z9"]
    assert header_columns(path, Reading(sheet="Other")) == ["customer_id", "order_date", "amount"]
    with pytest.raises(InputError, match=r"no sheet 'Sales' \(found 'Orders', 'Other'\); check --sheet"):
        load_orders(path, reading=Reading(sheet="Sales"))


def test_a_workbook_with_text_amounts_and_dates_reads_them_like_a_text_file(tmp_path):
    path = tmp_path / "orders.xlsx"
    # Amounts typed as text with currency signs and dates typed as US text, as some exports do.
    _workbook(path, {"Sheet": [["customer_id", "order_date", "amount"], ["A1", "10/18/2022", "$1,104.00"], ["B2", "11/03/2022", "($12.50)"]]})
    loaded = load_orders(path)
    assert loaded.frame["amount"].tolist() == [1104.0, -12.5]
    assert [str(d.date()) for d in loaded.frame["order_date"]] == ["2022-10-18", "2022-11-03"]


def test_a_compressed_file_that_unpacks_beyond_the_limit_is_refused(tmp_path, monkeypatch):
    # A small archive can unpack to far more than memory holds (a zip bomb): the unpacked size is checked first.
    import gzip
    import zipfile

    from lapsewise.files import tables

    monkeypatch.setattr(tables, "available_memory", lambda: 4 * 1_000_000)  # a limit of 1 MB unpacked
    text = ("customer_id,order_date,amount\n" + "A1,2023-01-15,10\n" * 200_000).encode()  # 3.4 MB, compresses to little
    packed = tmp_path / "orders.csv.gz"
    packed.write_bytes(gzip.compress(text))
    zipped = tmp_path / "orders.zip"
    with zipfile.ZipFile(zipped, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("orders.csv", text)
    for path in (packed, zipped):
        with pytest.raises(InputError, match="unpacks to more than"):
            load_orders(path)
