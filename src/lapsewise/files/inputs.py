"""The input files: orders, mailings, suppression list, attributes and the customer-quarter table.

Each loader reads its file (:mod:`lapsewise.files.tables`), checks its columns
and cells once, here at the edge (:mod:`lapsewise.files.cells`), and returns a
:class:`Loaded` holding a tidy DataFrame and a count of everything it repaired on
the way (duplicate rows dropped, blank ids, returns and so on). A problem it
cannot repair raises :class:`~lapsewise.errors.InputError` with one line naming
the file, the row or column, and what to fix.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.errors import InputError
from lapsewise.files.cells import clean_ids, drop_blank_ids, parse_amounts, parse_dates, parse_flags
from lapsewise.files.tables import Reading, duplicate_rows, header_columns, read_table, row_label

ID_COLUMN = "customer_id"
ORDER_DATE_COLUMN = "order_date"
AMOUNT_COLUMN = "amount"
MAIL_DATE_COLUMN = "mail_date"
VERSION_COLUMN = "version"


@dataclass(frozen=True)
class Loaded:
    """A validated input file.

    Attributes
    ----------
    name : str
        The file name as the user gave it, for messages.
    frame : pandas.DataFrame
        The tidy rows: ``customer_id`` (Categorical of text ids) and the file's own columns.
    repairs : dict
        What was repaired or left out, as ``{description: count}``; only non-zero counts.
    kept : numpy.ndarray or None
        The file row of each frame row, counted from 0 over the data rows (None: every row was kept).
    is_csv : bool
        Whether the file was CSV (its rows are numbered as a spreadsheet shows them, the header being row 1).
    """

    name: str
    frame: pd.DataFrame
    repairs: dict[str, int] = field(default_factory=dict)
    kept: np.ndarray | None = None
    is_csv: bool = True

    def row_label(self, index: int) -> int:
        """The row number a person sees for frame row ``index``."""
        return row_label(int(index if self.kept is None else self.kept[index]), self.is_csv)


def _require_columns(name: str, frame: pd.DataFrame, wanted: dict[str, str]) -> None:
    """Check that every wanted column exists and holds plain values. ``wanted`` maps column name to the option that renames it."""
    nested = set(frame.attrs.get("nested", ()))
    for column, option in wanted.items():
        if column in nested:
            raise InputError(f"{name}: the column '{column}' holds lists or records (a nested Parquet type); export it as plain values")
        if column not in frame.columns:
            found = ", ".join(f"'{c}'" for c in list(frame.columns)[:8])
            hint = f"; rename the column or pass {option}" if option else "; rename the column"
            raise InputError(f"{name}: no column '{column}' (found {found}){hint}")


def _frame(columns: dict, keep: np.ndarray) -> pd.DataFrame:
    """The kept rows of the columns as a DataFrame with a 0..n-1 index, built on the arrays without copying them.

    When every row is kept the arrays are used as they are: on millions of rows a
    masked copy, and the DataFrame's own copy of its inputs, would each cost a pass
    over memory (see ``tests/bench/README.md``).
    """
    if not keep.all():
        columns = {name: values[keep] for name, values in columns.items()}
    return pd.DataFrame(columns, copy=False)


def _kept(keep: np.ndarray) -> np.ndarray | None:
    return None if keep.all() else np.flatnonzero(keep)


def _count_extra_columns(frame: pd.DataFrame, used: list[str], repairs: dict[str, int]) -> None:
    extra = [c for c in frame.columns if c not in used]
    if extra:
        shown = ", ".join(extra[:5]) + (", ..." if len(extra) > 5 else "")
        repairs[f"extra columns ignored ({shown})"] = len(extra)


def load_orders(
    path: str | Path,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
    reading: Reading | None = None,
) -> Loaded:
    """Read the orders file: one row per order, negative amounts are returns.

    Returns a :class:`Loaded` whose frame has ``customer_id`` (Categorical),
    ``order_date`` (datetime64) and ``amount`` (float64). Exact duplicate rows,
    rows with a blank id and rows with a blank amount are left out and counted.
    ``reading`` says how to read a file that is not plain UTF-8 CSV with ISO dates
    (see :class:`~lapsewise.files.tables.Reading`).
    """
    reading = reading or Reading()
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {id_column: "--id-column", date_column: "--date-column", amount_column: "--amount-column"})
    _count_extra_columns(frame, [id_column, date_column, amount_column], repairs)
    factorized = pd.factorize(frame[id_column], use_na_sentinel=True)
    # Exact duplicate rows, compared with the ids as their codes (one hashing of the id text, not two).
    duplicated = duplicate_rows(frame.assign(**{id_column: factorized[0]}))
    if duplicated.any():
        repairs["exact duplicate rows dropped"] = int(duplicated.sum())
    ids = clean_ids(name, frame[id_column], repairs, factorized, id_column, is_csv)
    keep = drop_blank_ids(name, ids, ~duplicated, repairs)
    amounts, blank_amount = parse_amounts(name, amount_column, frame[amount_column], is_csv, reading.decimal_comma, repairs)
    dropped_blank = blank_amount & keep
    if dropped_blank.any():
        repairs["orders with a blank amount left out"] = int(dropped_blank.sum())
    keep &= ~blank_amount
    dates = parse_dates(name, date_column, frame[date_column], is_csv, keep, reading.date_format, repairs)
    with_time = (dates != dates.astype("datetime64[D]")) & keep
    if with_time.any():
        repairs["order dates with a time of day (quarters use the date)"] = int(with_time.sum())
    returns = (amounts < 0) & keep
    if returns.any():
        repairs["return rows (negative amounts) netted into their quarter"] = int(returns.sum())
    if not keep.any():
        raise InputError(f"{name}: no usable order rows (every row has a blank id or amount); check the file")
    return Loaded(name, _frame({ID_COLUMN: ids, ORDER_DATE_COLUMN: dates, AMOUNT_COLUMN: amounts}, keep), repairs, _kept(keep), is_csv)


def load_mailings(path: str | Path, id_column: str = ID_COLUMN, reading: Reading | None = None) -> Loaded:
    """Read the mailings file: one row per piece mailed (``customer_id``, ``mail_date``, optional ``version``).

    The ``version`` column is recognised (not counted as an extra column) but not
    kept: the model needs only whether a customer was mailed in a quarter.
    """
    reading = reading or Reading()
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {id_column: "--id-column", MAIL_DATE_COLUMN: ""})
    used = [id_column, MAIL_DATE_COLUMN] + ([VERSION_COLUMN] if VERSION_COLUMN in frame.columns else [])
    _count_extra_columns(frame, used, repairs)
    ids = clean_ids(name, frame[id_column], repairs, None, id_column, is_csv)
    keep = drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    dates = parse_dates(name, MAIL_DATE_COLUMN, frame[MAIL_DATE_COLUMN], is_csv, keep, reading.date_format, repairs)
    return Loaded(name, _frame({ID_COLUMN: ids, MAIL_DATE_COLUMN: dates}, keep), repairs, _kept(keep), is_csv)


def load_orders_and_mailings(
    orders_path: str | Path,
    mailings_path: str | Path | None,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
    then: Callable[[Loaded], object] | None = None,
    reading: Reading | None = None,
) -> tuple:
    """:func:`load_orders` and :func:`load_mailings` (when a path is given), read side by side.

    The two files are independent until the panel joins them, and most of each
    load (Parquet decoding, hashing the ids) runs outside the interpreter lock, so
    on two cores the pair takes about as long as the larger file alone. ``then``,
    when given, is applied to the loaded orders while the mailings may still be
    loading, and its result is returned in their place. A problem in the orders
    file (or in ``then``) is reported first, as when the files are read in turn.
    """
    def orders_part():
        orders = load_orders(orders_path, id_column, date_column, amount_column, reading)
        return orders if then is None else then(orders)

    if not mailings_path:
        return orders_part(), None
    with ThreadPoolExecutor(max_workers=1) as pool:
        mailings_job = pool.submit(load_mailings, mailings_path, id_column, reading)
        return orders_part(), mailings_job.result()


def load_id_list(path: str | Path, id_column: str = ID_COLUMN, reading: Reading | None = None) -> Loaded:
    """Read a list of customer ids, such as a suppression list (opt-outs, deceased, undeliverable)."""
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {id_column: "--id-column"})
    _count_extra_columns(frame, [id_column], repairs)
    ids = clean_ids(name, frame[id_column], repairs, None, id_column, is_csv)
    keep = drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    unique = pd.Index(np.asarray(ids[keep]).astype(str)).unique()
    return Loaded(name, pd.DataFrame({ID_COLUMN: unique}), repairs)


def load_attributes(path: str | Path, column: str, id_column: str = ID_COLUMN, reading: Reading | None = None) -> Loaded:
    """Read a customer attributes file and keep one text column of it, one row per customer."""
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {id_column: "--id-column", column: "--segment-column"})
    ids = clean_ids(name, frame[id_column], repairs, None, id_column, is_csv)
    keep = drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    out = pd.DataFrame({ID_COLUMN: np.asarray(ids[keep]).astype(str), column: frame[column].astype(str).str.strip().to_numpy()[keep]})
    duplicated = out.duplicated(subset=[ID_COLUMN], keep="first").to_numpy()
    if duplicated.any():
        repairs["attribute rows for an id already seen ignored"] = int(duplicated.sum())
    return Loaded(name, out[~duplicated].reset_index(drop=True), repairs)


CELL_SEGMENT_COLUMN = "segment"


def load_control_cell(path: str | Path, reading: Reading | None = None) -> Loaded:
    """Read a control cell written by ``lapsewise control-cell``: ``customer_id, segment``, one row per held customer.

    A cell that the writer protected from spreadsheets (a quote before a leading ``=``, ``+``, ``-``, ``@``)
    has the quote taken off again, so the ids read back as they were written.
    """
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {ID_COLUMN: "", CELL_SEGMENT_COLUMN: ""})
    _count_extra_columns(frame, [ID_COLUMN, CELL_SEGMENT_COLUMN], repairs)
    ids = clean_ids(name, _unquoted(frame[ID_COLUMN]), repairs, None, ID_COLUMN, is_csv)
    keep = drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    out = pd.DataFrame({ID_COLUMN: np.asarray(ids[keep]).astype(str), CELL_SEGMENT_COLUMN: _unquoted(frame[CELL_SEGMENT_COLUMN]).str.strip().to_numpy()[keep]})
    duplicated = out.duplicated(subset=[ID_COLUMN], keep="first").to_numpy()
    if duplicated.any():
        repairs["cell rows for an id already seen ignored"] = int(duplicated.sum())
    return Loaded(name, out[~duplicated].reset_index(drop=True), repairs)


def _unquoted(column: pd.Series) -> pd.Series:
    """Text cells without the quote the CSV writer puts before a leading =, +, -, @, tab or carriage return."""
    return column.astype(str).str.replace(r"^'(?=[=+\-@\t\r])", "", regex=True)


# ---------------------------------------------------------------- the customer-quarter table

QUARTER_COLUMN = "quarter"
PURCHASED_COLUMN = "purchased"
SPEND_COLUMN = "spend"
MAILED_COLUMN = "mailed"
BEFORE_ORDER_COLUMN = "mailed_before_order"


def is_quarterly_table(path: str | Path, reading: Reading | None = None) -> bool:
    """True for a customer-quarter table (customer_id, quarter, purchased, spend[, mailed[, mailed_before_order]]) rather than raw orders."""
    columns = set(header_columns(path, reading))
    return {QUARTER_COLUMN, PURCHASED_COLUMN, SPEND_COLUMN} <= columns


def load_quarterly(path: str | Path, id_column: str = ID_COLUMN, reading: Reading | None = None) -> tuple[Loaded, Loaded | None]:
    """Read a customer-quarter table and return it as the orders and mailings it stands for.

    One row per customer and quarter with a purchase or a mailing: ``customer_id``,
    ``quarter`` (any date in the quarter, e.g. its first day), ``purchased`` (0/1),
    ``spend`` (net spend of the quarter), optionally ``mailed`` (0/1) and, beside it,
    optionally ``mailed_before_order`` (0/1: a piece arrived by the quarter's first
    order). Each purchased quarter becomes one order of its spend; each mailed
    quarter one piece, whose ``mailed_before_order`` column says whether it counts
    for a purchase in its quarter (without the column, it does). Without a
    ``mailed`` column every quarter counts as mailed.
    """
    reading = reading or Reading()
    name = str(path)
    frame, is_csv, repairs = read_table(path, reading)
    _require_columns(name, frame, {id_column: "--id-column", QUARTER_COLUMN: "", PURCHASED_COLUMN: "", SPEND_COLUMN: ""})
    has_mailed = MAILED_COLUMN in frame.columns
    has_before = BEFORE_ORDER_COLUMN in frame.columns
    if has_before and not has_mailed:
        raise InputError(
            f"{name}: column '{BEFORE_ORDER_COLUMN}' needs the column '{MAILED_COLUMN}' (1 when any piece was mailed that quarter); add it or drop '{BEFORE_ORDER_COLUMN}'"
        )
    used = [MAILED_COLUMN] * has_mailed + [BEFORE_ORDER_COLUMN] * has_before
    _count_extra_columns(frame, [id_column, QUARTER_COLUMN, PURCHASED_COLUMN, SPEND_COLUMN] + used, repairs)
    ids = clean_ids(name, frame[id_column], repairs, None, id_column, is_csv)
    keep = drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    dates = parse_dates(name, QUARTER_COLUMN, frame[QUARTER_COLUMN], is_csv, keep, reading.date_format, repairs)
    purchased = parse_flags(name, PURCHASED_COLUMN, frame[PURCHASED_COLUMN], is_csv) & keep
    spend, blank = parse_amounts(name, SPEND_COLUMN, frame[SPEND_COLUMN], is_csv, reading.decimal_comma, repairs)
    spend = np.where(blank, 0.0, spend)
    not_positive = purchased & (spend <= 0)
    if not_positive.any():
        repairs["quarters marked purchased with no positive spend (not purchases)"] = int(not_positive.sum())
    orders = _frame({ID_COLUMN: ids, ORDER_DATE_COLUMN: dates, AMOUNT_COLUMN: spend}, purchased)
    if not len(orders):
        raise InputError(f"{name}: no row has purchased = 1; a customer-quarter table needs the quarters with purchases")
    orders_kept = _kept(purchased)
    mailings = None
    if has_mailed:
        mailed = parse_flags(name, MAILED_COLUMN, frame[MAILED_COLUMN], is_csv) & keep
        before = np.ones(len(frame), dtype=bool)
        if has_before:
            before = parse_flags(name, BEFORE_ORDER_COLUMN, frame[BEFORE_ORDER_COLUMN], is_csv)
            contradiction = before & ~mailed & keep
            if contradiction.any():
                first = int(np.flatnonzero(contradiction)[0])
                raise InputError(
                    f"{name}, row {row_label(first, is_csv)}, column {BEFORE_ORDER_COLUMN}: 1 but {MAILED_COLUMN} is 0; "
                    "a piece before the order is a piece mailed, so fix one of the two"
                )
        columns = {ID_COLUMN: ids, MAIL_DATE_COLUMN: dates, BEFORE_ORDER_COLUMN: before}
        mailings = Loaded(name, _frame(columns, mailed), {}, _kept(mailed), is_csv)
    return Loaded(name, orders, repairs, orders_kept, is_csv), mailings
