"""The input files: orders, mailings, id lists and the customer-quarter table; what a clean file gives,
what is counted, what is refused, and that any file at all is read or refused with an InputError.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from hypothesis import given

from builders import typed_orders, write_parquet
from conftest import ANY_FILE, ANY_FILE_SETTINGS, GOOD_ORDERS, MAILINGS_HEADER, ORDERS_HEADER, csv_text, file_holding, mailings_text, orders_text, repair_count
from lapsewise.data.panel import build_panel, panel_from_files
from lapsewise.errors import InputError
from lapsewise.files.inputs import load_id_list, load_mailings, load_orders, load_orders_and_mailings
from lapsewise.files.tables import Reading


def ids_of(loaded) -> list[str]:
    return [str(i) for i in loaded.frame["customer_id"]]


def dates_of(loaded, column: str = "order_date") -> list[str]:
    return [str(d) for d in loaded.frame[column]]


def test_clean_orders_file_is_read_as_written(write_file):
    loaded = load_orders(write_file("orders.csv", GOOD_ORDERS))
    # GOOD_ORDERS holds three rows, A1, B2, A1, in that order, and needs no repair.
    assert ids_of(loaded) == ["A1", "B2", "A1"]
    assert dates_of(loaded) == ["2023-01-15 00:00:00", "2023-02-01 00:00:00", "2023-05-02 00:00:00"]
    assert loaded.frame["amount"].tolist() == [10.0, 25.5, 12.0]
    assert isinstance(loaded.frame["customer_id"].dtype, pd.CategoricalDtype)
    assert loaded.repairs == {}


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


def test_extra_columns_are_ignored_and_counted(write_file):
    text = csv_text(ORDERS_HEADER + ",channel,note", "A1,2023-01-15,10,web,first", "B2,2023-02-01,5,phone,")
    loaded = load_orders(write_file("orders.csv", text))
    # channel and note are two columns the orders do not use.
    assert repair_count(loaded.repairs, "extra columns ignored (channel, note)") == 2
    assert list(loaded.frame.columns) == ["customer_id", "order_date", "amount"]


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


def test_parquet_orders_load_like_the_same_csv(tmp_path, write_file):
    from_parquet = load_orders(write_parquet(tmp_path / "orders.parquet", typed_orders()))
    from_csv = load_orders(write_file("orders.csv", GOOD_ORDERS))
    # The same three orders, whatever the format.
    assert ids_of(from_parquet) == ids_of(from_csv)
    assert dates_of(from_parquet) == dates_of(from_csv)
    assert from_parquet.frame["amount"].tolist() == from_csv.frame["amount"].tolist()
    assert from_parquet.repairs == {}


def test_parquet_missing_column_is_refused_and_the_option_fixes_it(tmp_path):
    path = write_parquet(tmp_path / "orders.parquet", typed_orders().rename(columns={"amount": "value"}))
    with pytest.raises(InputError, match=r"orders.parquet: no column 'amount' .*--amount-column"):
        load_orders(path)
    assert load_orders(path, amount_column="value").frame["amount"].tolist() == [10.0, 25.5, 12.0]


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


# ---------------------------------------------------------------- the customer-quarter table


ORDERS = """customer_id,order_date,amount
A,2023-01-15,40
A,2023-02-20,10
A,2023-08-03,25
A,2023-08-30,-25
B,2023-04-02,60
B,2024-01-09,15
C,2023-11-11,30
"""


MAILINGS = """customer_id,mail_date
A,2023-04-01
A,2023-07-01
B,2023-07-01
B,2023-10-01
C,2024-01-01
"""


# The same history as one row per customer and quarter with a purchase or a mailing
# (what GROUP BY customer_id, quarter gives): A's third quarter nets to 0, so it is not a purchase.
QUARTERS = """customer_id,quarter,purchased,spend,mailed
A,2023-01-01,1,50,0
A,2023-04-01,0,0,1
A,2023-07-01,0,0,1
B,2023-04-01,1,60,0
B,2023-07-01,0,0,1
B,2023-10-01,0,0,1
B,2024-01-01,1,15,0
C,2023-10-01,1,30,0
C,2024-01-01,0,0,1
"""


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return str(path)


def test_quarterly_table_gives_the_same_panel_as_orders_and_mailings(tmp_path):
    raw = panel_from_files(write(tmp_path, "orders.csv", ORDERS), write(tmp_path, "mailings.csv", MAILINGS), as_of="2024-03-31")
    table = panel_from_files(write(tmp_path, "quarters.csv", QUARTERS))
    assert table.mailing_history and table.end_quarter == raw.end_quarter
    np.testing.assert_array_equal(table.customer_ids, raw.customer_ids)
    np.testing.assert_array_equal(table.first_quarter, raw.first_quarter)
    np.testing.assert_array_equal(table.purchased, raw.purchased)
    np.testing.assert_array_equal(table.mailed, raw.mailed)
    np.testing.assert_allclose(table.spend, raw.spend)


def test_quarterly_table_as_parquet_and_without_mailed_column(tmp_path):
    frame = pd.read_csv(pd.io.common.StringIO(QUARTERS)).drop(columns="mailed")
    path = tmp_path / "quarters.parquet"
    frame.to_parquet(path)
    panel = panel_from_files(str(path))
    assert not panel.mailing_history
    # Without a mailed column every quarter after the first purchase counts as mailed.
    assert panel.mailed[:, 1:].sum() == panel.n.sum()


def test_quarterly_table_refuses_a_separate_mailings_file(tmp_path):
    with pytest.raises(InputError, match="drop --mailings"):
        panel_from_files(write(tmp_path, "quarters.csv", QUARTERS), write(tmp_path, "mailings.csv", MAILINGS))


def test_quarterly_flags_must_be_zero_or_one(tmp_path):
    with pytest.raises(InputError, match="row 3, column purchased: 'maybe'"):
        panel_from_files(write(tmp_path, "quarters.csv", QUARTERS.replace("A,2023-04-01,0,0,1", "A,2023-04-01,maybe,0,1")))


# Piece timing in both forms: A's April-June piece (2023-05-20) comes after its order (2023-05-10), B's
# (2023-04-15) before its order (2023-05-10); B's July-September piece falls in a quarter without a purchase.
TIMED_ORDERS = orders_text("A,2023-01-15,40", "A,2023-05-10,20", "B,2023-01-20,30", "B,2023-05-10,20")
TIMED_MAILINGS = mailings_text("A,2023-05-20", "B,2023-04-15", "B,2023-08-05")
TIMED_QUARTERS = """customer_id,quarter,purchased,spend,mailed,mailed_before_order
A,2023-01-01,1,40,0,0
A,2023-04-01,1,20,1,0
B,2023-01-01,1,30,0,0
B,2023-04-01,1,20,1,1
B,2023-07-01,0,0,1,0
"""


def test_mailed_before_order_decides_purchase_quarters_as_the_dates_do(tmp_path):
    raw = panel_from_files(write(tmp_path, "orders.csv", TIMED_ORDERS), write(tmp_path, "mailings.csv", TIMED_MAILINGS), as_of="2023-09-30")
    table = panel_from_files(write(tmp_path, "quarters.csv", TIMED_QUARTERS))
    # By hand: A's purchase quarter 1 had its piece only after the order (not mailed); B's had it before (mailed),
    # and B's quarter 2, without a purchase, is mailed by its piece.
    np.testing.assert_array_equal(raw.mailed, [[0, 0, 0], [0, 1, 1]])
    np.testing.assert_array_equal(table.mailed, raw.mailed)
    np.testing.assert_array_equal(table.purchased, raw.purchased)
    assert repair_count(table.counts, "only pieces arrived after the first order") == repair_count(raw.counts, "only pieces arrived after the first order") == 1
    # Without the column the table means what it meant before: a mailed quarter is mailed, whatever the timing.
    untimed_text = "".join(line.rsplit(",", 1)[0] + "\n" for line in TIMED_QUARTERS.splitlines())
    untimed = panel_from_files(write(tmp_path, "untimed.csv", untimed_text))
    np.testing.assert_array_equal(untimed.mailed, [[0, 1, 0], [0, 1, 1]])
    assert repair_count(untimed.counts, "only pieces arrived after the first order") == 0


@pytest.mark.parametrize(
    "table, message",
    [
        (TIMED_QUARTERS.replace("A,2023-04-01,1,20,1,0", "A,2023-04-01,1,20,1,soon"), "row 3, column mailed_before_order: 'soon' is not 0 or 1"),
        (TIMED_QUARTERS.replace("A,2023-04-01,1,20,1,0", "A,2023-04-01,1,20,0,1"), "row 3, column mailed_before_order: 1 but mailed is 0"),
        (TIMED_QUARTERS.replace(",mailed,", ",posted,"), "column 'mailed_before_order' needs the column 'mailed'"),
    ],
    ids=["not-a-flag", "before-order-but-not-mailed", "without-mailed-column"],
)
def test_mailed_before_order_is_checked_like_the_other_flags(tmp_path, table, message):
    path = write(tmp_path, "quarters.csv", table)
    with pytest.raises(InputError, match=message) as refused:
        panel_from_files(path)
    assert str(refused.value).startswith(path) and "\n" not in str(refused.value)


def test_the_quarterly_table_refuses_in_home_days(tmp_path):
    # The table's mailed_before_order column already settles the timing; in-home days belong where it is computed.
    with pytest.raises(InputError, match="--in-home-days: .* is a customer-quarter table"):
        panel_from_files(write(tmp_path, "quarters.csv", TIMED_QUARTERS), in_home_days=3)


def test_every_command_reads_the_quarterly_table(tmp_path):
    path = write(tmp_path, "quarters.csv", QUARTERS)
    result = subprocess.run([sys.executable, "-m", "lapsewise", "summary", path], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert "3 customers" in result.stdout
    # Output to a pipe shows no progress bar.
    fit = subprocess.run([sys.executable, "-m", "lapsewise", "fit", path, "--out", str(tmp_path / "m.json")], capture_output=True, text=True)
    assert fit.returncode == 0, fit.stderr
    assert "\x1b[?25l" not in fit.stdout and "━" not in fit.stderr


def test_an_as_of_centuries_after_the_orders_is_refused_before_memory_is_spent(tmp_path):
    with pytest.raises(InputError, match="up to 120 quarters"):
        panel_from_files(write(tmp_path, "orders.csv", ORDERS), as_of="2200-12-31")


# ---------------------------------------------------------------- the same base in the forms systems export


def _invented_base(customers: int = 240, seed: int = 18) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Invented orders and mailings over 2021-2023: ids with accented names, amounts with cents, some returns."""
    rng = np.random.default_rng(seed)
    names = np.array(["Zo\u00eb", "M\u00fcller", "Ren\u00e9e", "Jos\u00e9", "Ang\u00e9lique", "Bj\u00f6rn"])
    ids = [f"{names[i % len(names)]}-{i}" for i in range(customers)]
    days = pd.date_range("2021-01-01", "2023-12-31", freq="D")
    order_count = rng.integers(1, 6, customers)
    order_ids = np.repeat(ids, order_count)
    order_days = days[rng.integers(0, len(days), len(order_ids))]
    cents = rng.integers(500, 250_000, len(order_ids))  # 5.00 to 2,499.99, so some need a thousands separator
    cents[rng.random(len(cents)) < 0.05] *= -1  # returns, written as negatives
    orders = pd.DataFrame({"customer_id": order_ids, "order_date": order_days, "cents": cents})
    mailed = rng.random((customers, 12)) < 0.6  # mailed on the 20th or so of a quarter's first month: day-first is unambiguous
    who, quarter = np.nonzero(mailed)
    mailings = pd.DataFrame({"customer_id": np.array(ids)[who], "mail_date": pd.Timestamp("2021-01-01") + pd.to_timedelta(quarter * 91 + 20, unit="D")})
    return orders, mailings


def _plain(cents: np.ndarray) -> list[str]:
    return [f"{c / 100:.2f}" for c in cents]


def _dollars(cents: np.ndarray) -> list[str]:
    """$1,234.50, and a return as ($12.50): accounting style."""
    shown = [f"${abs(c) / 100:,.2f}" for c in cents]
    return [f"({s})" if c < 0 else s for s, c in zip(shown, cents)]


def _euros(cents: np.ndarray) -> list[str]:
    """1.234,50 € and -12,50 €: a decimal comma, dots between thousands."""
    swapped = [f"{abs(c) / 100:,.2f}".replace(",", "_").replace(".", ",").replace("_", ".") for c in cents]
    return [("-" if c < 0 else "") + s + " \u20ac" for s, c in zip(swapped, cents)]


def _write_text(path, frame: pd.DataFrame, sep: str = ",", encoding: str = "utf-8", compression=None) -> str:
    frame.to_csv(path, index=False, sep=sep, encoding=encoding, compression=compression)
    return str(path)


def _export(folder, form: str, orders: pd.DataFrame, mailings: pd.DataFrame) -> tuple[str, str, dict]:
    """Write the base as ``form`` into ``folder``; return the orders and mailings paths and the reading options."""
    iso = lambda dates: dates.dt.strftime("%Y-%m-%d")  # noqa: E731
    clean_orders = pd.DataFrame({"customer_id": orders["customer_id"], "order_date": iso(orders["order_date"]), "amount": _plain(orders["cents"].to_numpy())})
    clean_mailings = pd.DataFrame({"customer_id": mailings["customer_id"], "mail_date": iso(mailings["mail_date"])})
    o, m = folder / f"orders-{form}", folder / f"mailings-{form}"
    if form == "clean":
        return _write_text(f"{o}.csv", clean_orders), _write_text(f"{m}.csv", clean_mailings), {}
    if form == "currency":
        shown = clean_orders.assign(amount=_dollars(orders["cents"].to_numpy()))
        return _write_text(f"{o}.csv", shown), _write_text(f"{m}.csv", clean_mailings), {}
    if form == "us-dates":
        us = lambda dates: dates.dt.strftime("%m/%d/%Y")  # noqa: E731
        return (
            _write_text(f"{o}.csv", clean_orders.assign(order_date=us(orders["order_date"]))),
            _write_text(f"{m}.csv", clean_mailings.assign(mail_date=us(mailings["mail_date"]))),
            {},
        )
    if form == "day-first-semicolon-comma":
        eu = lambda dates: dates.dt.strftime("%d.%m.%Y")  # noqa: E731
        shown = clean_orders.assign(order_date=eu(orders["order_date"]), amount=_euros(orders["cents"].to_numpy()))
        return (
            _write_text(f"{o}.csv", shown, sep=";"),
            _write_text(f"{m}.csv", clean_mailings.assign(mail_date=eu(mailings["mail_date"])), sep=";"),
            {"decimal_comma": True},
        )
    if form == "cp1252":
        return _write_text(f"{o}.csv", clean_orders, encoding="cp1252"), _write_text(f"{m}.csv", clean_mailings, encoding="cp1252"), {"encoding": "cp1252"}
    if form == "gzip":
        return _write_text(f"{o}.csv.gz", clean_orders, compression="gzip"), _write_text(f"{m}.csv.gz", clean_mailings, compression="gzip"), {}
    if form == "zip":
        zipped = lambda name: {"method": "zip", "archive_name": name}  # noqa: E731
        return (
            _write_text(f"{o}.zip", clean_orders, compression=zipped("orders.csv")),
            _write_text(f"{m}.zip", clean_mailings, compression=zipped("mailings.csv")),
            {},
        )
    if form == "xlsx":
        # Dates as Excel dates, amounts as numbers, on a named sheet after a notes sheet (so --sheet is needed).
        return _write_xlsx(f"{o}.xlsx", orders.assign(amount=orders["cents"] / 100).drop(columns="cents")), _write_xlsx(f"{m}.xlsx", mailings), {"sheet": "Data"}
    raise AssertionError(form)


def _write_xlsx(path: str, frame: pd.DataFrame) -> str:
    import openpyxl

    workbook = openpyxl.Workbook()
    workbook.active.title = "Notes"
    workbook.active.append(["Invented test data"])
    sheet = workbook.create_sheet("Data")
    sheet.append(list(frame.columns))
    for row in frame.itertuples(index=False):
        sheet.append([value.to_pydatetime() if isinstance(value, pd.Timestamp) else value for value in row])
    workbook.save(path)
    return path


EXPORT_FORMS = ["currency", "us-dates", "day-first-semicolon-comma", "cp1252", "gzip", "zip", "xlsx"]


@pytest.fixture(scope="module")
def clean_base(tmp_path_factory):
    """The invented base written as plain UTF-8 CSV with ISO dates, and the model fitted on it."""
    from lapsewise.model.fitted import fit_model

    folder = tmp_path_factory.mktemp("forms")
    orders, mailings = _invented_base()
    orders_path, mailings_path, _ = _export(folder, "clean", orders, mailings)
    panel = panel_from_files(orders_path, mailings_path, "2023-12-31")
    return folder, orders, mailings, panel, fit_model(panel).to_dict()


@pytest.mark.parametrize("form", EXPORT_FORMS)
def test_every_export_form_gives_the_clean_files_model(clean_base, form):
    """The same orders and mailings, written as an order or donor system would export them, give the model the
    clean CSV gives, to the last digit: the same cells become the same values, so the panel and the fit are the same."""
    from lapsewise.model.fitted import fit_model

    folder, orders, mailings, clean_panel, clean_model = clean_base
    orders_path, mailings_path, reading = _export(folder, form, orders, mailings)
    panel = panel_from_files(orders_path, mailings_path, "2023-12-31", **reading)
    np.testing.assert_array_equal(panel.customer_ids, clean_panel.customer_ids)
    np.testing.assert_array_equal(panel.spend, clean_panel.spend)
    np.testing.assert_array_equal(panel.mailed, clean_panel.mailed)
    assert fit_model(panel).to_dict() == clean_model


def test_export_forms_are_counted_in_the_repairs(clean_base):
    """Each conversion is counted: the base's 240 customers have their orders and mailings in the counts."""
    folder, orders, mailings, _, _ = clean_base
    orders_path, _, reading = _export(folder, "currency", orders, mailings)
    loaded = load_orders(orders_path)
    # Every amount has a dollar sign; the returns are the negative cents of the base; the thousands are the amounts of 1,000.00 or more.
    assert repair_count(loaded.repairs, "currency sign") == len(orders)
    assert repair_count(loaded.repairs, "parentheses") == int((orders["cents"] < 0).sum())
    assert repair_count(loaded.repairs, "thousands separators") == int((orders["cents"].abs() >= 100_000).sum())
    orders_path, mailings_path, reading = _export(folder, "day-first-semicolon-comma", orders, mailings)
    loaded = load_mailings(mailings_path, reading=Reading(**reading))
    # One file read with semicolons; every mail date day-first.
    assert repair_count(loaded.repairs, "semicolon-delimited") == 1
    assert repair_count(loaded.repairs, "day-first") == len(mailings)
    orders_path, _, reading = _export(folder, "gzip", orders, mailings)
    assert repair_count(load_orders(orders_path).repairs, "gzip") == 1
