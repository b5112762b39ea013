"""Load and validate the input files: orders, mailings, suppression list, attributes.

Each loader reads a CSV or Parquet file, checks it once, here at the edge, and
returns a :class:`Loaded` holding a tidy DataFrame and a count of everything it
repaired on the way (duplicate rows dropped, blank ids, returns and so on). A
problem it cannot repair raises :class:`~lapsewise.errors.InputError` with one
line naming the file, the row or column, and what to fix.

Customer ids are always text: surrounding spaces are removed and ids are held
as a pandas Categorical so that large files stay small in memory.
"""

from __future__ import annotations

import csv
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.errors import InputError

ID_COLUMN = "customer_id"
ORDER_DATE_COLUMN = "order_date"
AMOUNT_COLUMN = "amount"
MAIL_DATE_COLUMN = "mail_date"
VERSION_COLUMN = "version"

_SNIFF_BYTES = 64 * 1024
MAX_AMOUNT = 1e12  # no single order is worth a trillion; larger values are export errors (and overflow the panel)


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
    """

    name: str
    frame: pd.DataFrame
    repairs: dict[str, int] = field(default_factory=dict)


def _row_label(index: int, is_csv: bool) -> int:
    """The row number a person sees: spreadsheet rows for CSV (header is row 1), 1-based for Parquet."""
    return int(index) + (2 if is_csv else 1)


def require_file(path: str | Path, missing_hint: str, kind: str = "a CSV or Parquet file") -> Path:
    """The path of an existing file, or an InputError saying what to do instead."""
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: file not found; {missing_hint}")
    if path.is_dir():
        raise InputError(f"{path}: is a folder, not a file; give the path of {kind}")
    return path


def read_table(path: str | Path) -> tuple[pd.DataFrame, bool, dict[str, int]]:
    """Read a CSV or Parquet file into a DataFrame with its columns as found.

    CSV columns come back as text; Parquet columns keep their types (text as
    Arrow-backed strings, which pandas factorizes without making Python objects).

    Returns
    -------
    frame, is_csv, repairs
    """
    path = require_file(path, "check the path")
    name = str(path)
    if path.stat().st_size == 0:
        raise InputError(f"{name}: the file is empty; export it again with a header row and data")
    with open(path, "rb") as handle:
        head = handle.read(_SNIFF_BYTES)
    if head[:4] == b"PAR1":
        return _read_parquet(path), False, {}
    return _read_csv(path, head)


def _read_parquet(path: Path) -> pd.DataFrame:
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except Exception as exc:  # pyarrow raises several types for damaged files
        raise InputError(f"{path}: not a readable Parquet file ({str(exc).splitlines()[0]}); export it again") from None
    frame = table.to_pandas()
    if len(frame) == 0:
        raise InputError(f"{path}: has columns but no rows; export it again with data")
    _strip_column_names(path, frame)
    return frame


def _strip_column_names(path: Path, frame: pd.DataFrame) -> None:
    """Remove spaces around column names; two columns that then share a name are an error."""
    frame.columns = [str(c).strip() for c in frame.columns]
    repeated = frame.columns[frame.columns.duplicated()]
    if len(repeated):
        raise InputError(f"{path}: the column '{repeated[0][:40]}' appears more than once; rename or remove the copies")


def _read_csv(path: Path, head: bytes) -> tuple[pd.DataFrame, bool, dict[str, int]]:
    repairs: dict[str, int] = {}
    if b"\x00" in head:
        raise InputError(f"{path}: looks like a binary file, not CSV or Parquet; export the data as CSV or Parquet")
    try:
        head.decode("utf-8")
    except UnicodeDecodeError as exc:
        # A cut in the middle of a multi-byte character at the end of the sniffed block is fine.
        if exc.start < len(head) - 4:
            raise InputError(
                f"{path}: is not UTF-8 text (bad byte at position {exc.start}); save it as UTF-8 CSV or as Parquet"
            ) from None
    if head.startswith(b"\xef\xbb\xbf"):
        repairs["byte-order mark at the start of the file removed"] = 1
    if b"\r\n" in head:
        repairs["Windows line endings read"] = 1
    try:
        with warnings.catch_warnings(record=True) as caught:
            # pandas warns, and drops the surplus, when a row has more fields than the header.
            warnings.simplefilter("always", pd.errors.ParserWarning)
            frame = pd.read_csv(
                path,
                dtype=str,
                keep_default_na=False,
                encoding="utf-8-sig",
                skip_blank_lines=True,
                index_col=False,  # never take the first column as row labels when rows end in a comma
            )
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the file is empty; export it again with a header row and data") from None
    except pd.errors.ParserError as exc:
        detail = str(exc).strip().splitlines()[-1]
        raise InputError(f"{path}: cannot be read as CSV ({detail}); check the quoting and the number of fields") from None
    except UnicodeDecodeError as exc:
        raise InputError(
            f"{path}: is not UTF-8 text (bad byte at position {exc.start}); save it as UTF-8 CSV or as Parquet"
        ) from None
    if any(issubclass(w.category, pd.errors.ParserWarning) for w in caught):
        surplus = _rows_with_surplus_fields(path, len(frame.columns))
        if surplus:
            repairs["rows ending in empty extra fields (trailing commas) read"] = surplus
    _strip_column_names(path, frame)
    if len(frame.columns) == 1:
        header = frame.columns[0]
        for sep, label in ((";", "semicolon"), ("\t", "tab"), ("|", "pipe")):
            if sep in header:
                raise InputError(
                    f"{path}: looks {label}-delimited (header '{header[:60]}'); save it with commas between columns"
                )
    if len(frame) == 0:
        raise InputError(f"{path}: has a header but no data rows; export it again with data")
    return frame, True, repairs


def _rows_with_surplus_fields(path: Path, width: int) -> int:
    """Count rows with more fields than the header's ``width``; a surplus field that is not blank is an error."""
    surplus = 0
    with open(path, newline="", encoding="utf-8-sig", errors="replace") as handle:
        try:
            for row_number, row in enumerate(csv.reader(handle), start=1):
                if len(row) > width:
                    surplus += 1
                    if any(cell.strip() for cell in row[width:]):
                        raise InputError(
                            f"{path}, row {row_number}: {len(row)} fields but the header has {width}; "
                            "check the delimiters and the quoting (quote amounts and text that contain commas)"
                        )
        except csv.Error as exc:
            raise InputError(f"{path}: cannot be read as CSV ({exc}); check the quoting and the number of fields") from None
    return surplus


def duplicate_rows(frame: pd.DataFrame) -> np.ndarray:
    """``frame.duplicated(keep="first")`` as a boolean array, without hashing every row into a table.

    Each row gets a 64-bit key mixed from its columns (numbers by their bits,
    text by pandas' vectorised hash); sorting the keys finds the few that repeat,
    and only the rows with a repeated key are compared exactly. Sorting millions of
    integers is several times faster than building a hash table of them.
    """
    key = np.zeros(len(frame), dtype=np.uint64)
    for position, name in enumerate(frame.columns):
        column = frame[name]
        if pd.api.types.is_datetime64_any_dtype(column):
            bits = pd.DatetimeIndex(column).asi8.view(np.uint64)
        elif pd.api.types.is_numeric_dtype(column):
            # As doubles (+ 0.0 makes -0.0 and 0.0 alike): equal values give equal bits; the exact check settles the rest.
            bits = (column.to_numpy(dtype=np.float64, na_value=np.nan) + 0.0).view(np.uint64)
        else:
            bits = pd.util.hash_array(column.to_numpy(dtype=object))
        with np.errstate(over="ignore"):
            key = (key ^ bits) * np.uint64(0x9E3779B97F4A7C15 + 2 * position)  # mix, then spread the bits
            key ^= key >> np.uint64(29)
    ordered = np.sort(key)
    repeated = np.unique(ordered[1:][ordered[1:] == ordered[:-1]])
    out = np.zeros(len(frame), dtype=bool)
    if len(repeated):
        candidates = np.flatnonzero(pd.Series(key).isin(repeated).to_numpy())  # a hash set of the few repeated keys
        out[candidates[frame.iloc[candidates].duplicated(keep="first").to_numpy()]] = True
    return out


def _require_columns(name: str, frame: pd.DataFrame, wanted: dict[str, str]) -> None:
    """Check that every wanted column exists. ``wanted`` maps column name to the option that renames it."""
    for column, option in wanted.items():
        if column not in frame.columns:
            found = ", ".join(f"'{c}'" for c in list(frame.columns)[:8])
            hint = f"; rename the column or pass {option}" if option else "; rename the column"
            raise InputError(f"{name}: no column '{column}' (found {found}){hint}")


def _clean_ids(name: str, column: pd.Series, repairs: dict[str, int], factorized: tuple | None = None) -> pd.Categorical:
    """Text ids with surrounding spaces removed, as a Categorical; blank ids become missing.

    ``factorized`` is the column's ``pd.factorize`` result when the caller already has it.
    """
    codes, uniques = factorized if factorized is not None else pd.factorize(column, use_na_sentinel=True)
    text = pd.Index(uniques).astype(str)
    stripped = text.str.strip()
    blank_uniques = np.asarray((stripped == "") | (stripped.str.lower().isin(["nan", "none", "null"])))
    padded_uniques = np.asarray(stripped != text) & ~blank_uniques  # blank ids are counted as blank, not as padded
    if padded_uniques.any():
        padded_rows = int(np.isin(codes, np.flatnonzero(padded_uniques)).sum())
        repairs["ids with surrounding spaces trimmed"] = padded_rows
    if not padded_uniques.any() and not blank_uniques.any():
        # The common case: every id is already clean, so the codes stand as they are.
        return pd.Categorical.from_codes(codes, categories=pd.Index(np.asarray(text, dtype=object), dtype=object), validate=False)
    clean_codes, clean_uniques = pd.factorize(stripped)
    clean_codes = np.where(blank_uniques, -1, clean_codes)  # blank ids become missing
    row_codes = np.where(codes < 0, -1, clean_codes[np.maximum(codes, 0)])
    return pd.Categorical.from_codes(row_codes, categories=pd.Index(clean_uniques, dtype=object), validate=False)


def _parse_dates(name: str, column_name: str, column: pd.Series, is_csv: bool, keep: np.ndarray) -> np.ndarray:
    """Dates as datetime64[ns] (time of day kept, zone dropped) for the kept rows.

    An unreadable date in a kept row is an error naming its row; rows not kept are not checked.
    """
    if pd.api.types.is_datetime64_any_dtype(column):
        values = pd.DatetimeIndex(column)
        if values.tz is not None:
            values = values.tz_convert(None)
        missing = np.asarray(values.isna()) & keep
        if missing.any():
            row = _row_label(np.flatnonzero(missing)[0], is_csv)
            raise InputError(f"{name}, row {row}, column {column_name}: the date is blank; fill it in or remove the row")
        _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(column.iloc[row]))
        return values.values.astype("datetime64[ns]")
    text = column.astype(str).str.strip().where(keep, "1970-01-01")
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce", utc=True)
    bad = np.asarray(parsed.isna())
    if bad.any():
        first = np.flatnonzero(bad)[0]
        row = _row_label(first, is_csv)
        shown = str(text.iloc[first])
        if shown == "":
            raise InputError(f"{name}, row {row}, column {column_name}: the date is blank; fill it in or remove the row")
        raise InputError(
            f"{name}, row {row}, column {column_name}: '{shown[:40]}' is not a date; write dates as YYYY-MM-DD"
        )
    values = pd.DatetimeIndex(parsed.dt.tz_convert(None))
    _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(text.iloc[row]))
    return values.values.astype("datetime64[ns]")


def _check_date_range(name: str, column_name: str, values: pd.DatetimeIndex, keep: np.ndarray, is_csv: bool, shown) -> None:
    """Dates outside what datetime64[ns] holds (about 1678 to 2261) would wrap around silently; refuse them."""
    kept = values[keep] if not keep.all() else values
    if len(kept) == 0 or (kept.min() >= pd.Timestamp.min and kept.max() <= pd.Timestamp.max):
        return
    outside = np.asarray((values < pd.Timestamp.min) | (values > pd.Timestamp.max)) & keep
    if outside.any():
        first = np.flatnonzero(outside)[0]
        raise InputError(
            f"{name}, row {_row_label(first, is_csv)}, column {column_name}: '{shown(first)[:40]}' "
            f"is outside the years {pd.Timestamp.min.year + 1} to {pd.Timestamp.max.year - 1}; fix or remove the row"
        )


def _parse_amounts(name: str, column_name: str, column: pd.Series, is_csv: bool) -> tuple[np.ndarray, np.ndarray]:
    """Amounts as float64 and a mask of blank cells; a non-numeric cell is an error naming its row."""
    if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
        values = column.to_numpy(dtype=np.float64, na_value=np.nan)
        blank = np.isnan(values)
    else:
        text = column.astype(str).str.strip()
        blank = np.asarray((text == "") | text.str.lower().isin(["nan", "none", "null", "na"]))
        values = pd.to_numeric(text.where(~blank, "nan"), errors="coerce").to_numpy(dtype=np.float64)
        bad = np.isnan(values) & ~blank
        if bad.any():
            first = np.flatnonzero(bad)[0]
            raise InputError(
                f"{name}, row {_row_label(first, is_csv)}, column {column_name}: '{str(text.iloc[first])[:40]}' "
                "is not a number; write amounts like 42.50 with no currency sign or thousands separator"
            )
    huge = (np.abs(values) > MAX_AMOUNT) & np.isfinite(values)
    if huge.any():
        first = np.flatnonzero(huge)[0]
        raise InputError(
            f"{name}, row {_row_label(first, is_csv)}, column {column_name}: {values[first]:.3g} is implausibly large "
            f"(above {MAX_AMOUNT:.0e}); fix or remove the row"
        )
    infinite = np.isinf(values)
    if infinite.any():
        first = np.flatnonzero(infinite)[0]
        raise InputError(
            f"{name}, row {_row_label(first, is_csv)}, column {column_name}: the amount is infinite; fix or remove the row"
        )
    return values, blank


def _frame(columns: dict, keep: np.ndarray) -> pd.DataFrame:
    """The kept rows of the columns as a DataFrame with a 0..n-1 index, built on the arrays without copying them.

    When every row is kept the arrays are used as they are: on millions of rows a
    masked copy, and the DataFrame's own copy of its inputs, each cost about half a second.
    """
    if not keep.all():
        columns = {name: values[keep] for name, values in columns.items()}
    return pd.DataFrame(columns, copy=False)


def _drop_blank_ids(name: str, ids: pd.Categorical, keep: np.ndarray, repairs: dict[str, int]) -> np.ndarray:
    blank = np.asarray(ids.codes) < 0
    if blank.any():
        repairs["rows with a blank customer id left out"] = int(blank.sum())
    return keep & ~blank


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
) -> Loaded:
    """Read the orders file: one row per order, negative amounts are returns.

    Returns a :class:`Loaded` whose frame has ``customer_id`` (Categorical),
    ``order_date`` (datetime64) and ``amount`` (float64). Exact duplicate rows,
    rows with a blank id and rows with a blank amount are left out and counted.
    """
    name = str(path)
    frame, is_csv, repairs = read_table(path)
    _require_columns(name, frame, {id_column: "--id-column", date_column: "--date-column", amount_column: "--amount-column"})
    _count_extra_columns(frame, [id_column, date_column, amount_column], repairs)
    factorized = pd.factorize(frame[id_column], use_na_sentinel=True)
    # Exact duplicate rows, compared with the ids as their codes (one hashing of the id text, not two).
    duplicated = duplicate_rows(frame.assign(**{id_column: factorized[0]}))
    if duplicated.any():
        repairs["exact duplicate rows dropped"] = int(duplicated.sum())
    ids = _clean_ids(name, frame[id_column], repairs, factorized)
    keep = _drop_blank_ids(name, ids, ~duplicated, repairs)
    amounts, blank_amount = _parse_amounts(name, amount_column, frame[amount_column], is_csv)
    dropped_blank = blank_amount & keep
    if dropped_blank.any():
        repairs["orders with a blank amount left out"] = int(dropped_blank.sum())
    keep &= ~blank_amount
    dates = _parse_dates(name, date_column, frame[date_column], is_csv, keep)
    with_time = (dates != dates.astype("datetime64[D]")) & keep
    if with_time.any():
        repairs["order dates with a time of day (quarters use the date)"] = int(with_time.sum())
    returns = (amounts < 0) & keep
    if returns.any():
        repairs["return rows (negative amounts) netted into their quarter"] = int(returns.sum())
    if not keep.any():
        raise InputError(f"{name}: no usable order rows (every row has a blank id or amount); check the file")
    return Loaded(name, _frame({ID_COLUMN: ids, ORDER_DATE_COLUMN: dates, AMOUNT_COLUMN: amounts}, keep), repairs)


def load_mailings(path: str | Path, id_column: str = ID_COLUMN) -> Loaded:
    """Read the mailings file: one row per piece mailed (``customer_id``, ``mail_date``, optional ``version``).

    The ``version`` column is recognised (not counted as an extra column) but not
    kept: the model needs only whether a customer was mailed in a quarter.
    """
    name = str(path)
    frame, is_csv, repairs = read_table(path)
    _require_columns(name, frame, {id_column: "--id-column", MAIL_DATE_COLUMN: ""})
    used = [id_column, MAIL_DATE_COLUMN] + ([VERSION_COLUMN] if VERSION_COLUMN in frame.columns else [])
    _count_extra_columns(frame, used, repairs)
    ids = _clean_ids(name, frame[id_column], repairs)
    keep = _drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    dates = _parse_dates(name, MAIL_DATE_COLUMN, frame[MAIL_DATE_COLUMN], is_csv, keep)
    return Loaded(name, _frame({ID_COLUMN: ids, MAIL_DATE_COLUMN: dates}, keep), repairs)


def load_orders_and_mailings(
    orders_path: str | Path,
    mailings_path: str | Path | None,
    id_column: str = ID_COLUMN,
    date_column: str = ORDER_DATE_COLUMN,
    amount_column: str = AMOUNT_COLUMN,
    then: Callable[[Loaded], object] | None = None,
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
        orders = load_orders(orders_path, id_column, date_column, amount_column)
        return orders if then is None else then(orders)

    if not mailings_path:
        return orders_part(), None
    with ThreadPoolExecutor(max_workers=1) as pool:
        mailings_job = pool.submit(load_mailings, mailings_path, id_column)
        return orders_part(), mailings_job.result()


def load_id_list(path: str | Path, id_column: str = ID_COLUMN) -> Loaded:
    """Read a list of customer ids, such as a suppression list (opt-outs, deceased, undeliverable)."""
    name = str(path)
    frame, is_csv, repairs = read_table(path)
    _require_columns(name, frame, {id_column: "--id-column"})
    _count_extra_columns(frame, [id_column], repairs)
    ids = _clean_ids(name, frame[id_column], repairs)
    keep = _drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    unique = pd.Index(np.asarray(ids[keep]).astype(str)).unique()
    return Loaded(name, pd.DataFrame({ID_COLUMN: unique}), repairs)


def load_attributes(path: str | Path, column: str, id_column: str = ID_COLUMN) -> Loaded:
    """Read a customer attributes file and keep one text column of it, one row per customer."""
    name = str(path)
    frame, is_csv, repairs = read_table(path)
    _require_columns(name, frame, {id_column: "--id-column", column: "--segment-column"})
    ids = _clean_ids(name, frame[id_column], repairs)
    keep = _drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    out = pd.DataFrame({ID_COLUMN: np.asarray(ids[keep]).astype(str), column: frame[column].astype(str).str.strip().to_numpy()[keep]})
    duplicated = out.duplicated(subset=[ID_COLUMN], keep="first").to_numpy()
    if duplicated.any():
        repairs["attribute rows for an id already seen ignored"] = int(duplicated.sum())
    return Loaded(name, out[~duplicated].reset_index(drop=True), repairs)


# ---------------------------------------------------------------- the customer-quarter table

QUARTER_COLUMN = "quarter"
PURCHASED_COLUMN = "purchased"
SPEND_COLUMN = "spend"
MAILED_COLUMN = "mailed"


def header_columns(path: str | Path) -> list[str]:
    """The column names of a CSV or Parquet file, read without loading its rows ([] when unreadable)."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            head = handle.read(4)
        if head == b"PAR1":
            import pyarrow.parquet as pq

            return [str(c).strip() for c in pq.read_schema(path).names]
        with open(path, encoding="utf-8-sig", errors="replace") as handle:
            return [c.strip().strip('"') for c in handle.readline().rstrip("\r\n").split(",")]
    except (OSError, ValueError):
        return []


def is_quarterly_table(path: str | Path) -> bool:
    """True for a customer-quarter table (customer_id, quarter, purchased, spend[, mailed]) rather than raw orders."""
    columns = set(header_columns(path))
    return {QUARTER_COLUMN, PURCHASED_COLUMN, SPEND_COLUMN} <= columns


def _flags(name: str, column_name: str, column: pd.Series, is_csv: bool) -> np.ndarray:
    """0/1 flags (also true/false, yes/no); anything else is an error naming its row."""
    text = column.astype(str).str.strip().str.lower()
    mapping = {"1": True, "0": False, "true": True, "false": False, "yes": True, "no": False, "1.0": True, "0.0": False, "": False}
    values = text.map(mapping)
    bad = values.isna().to_numpy()
    if bad.any():
        first = np.flatnonzero(bad)[0]
        raise InputError(f"{name}, row {_row_label(first, is_csv)}, column {column_name}: '{text.iloc[first][:20]}' is not 0 or 1")
    return values.to_numpy(dtype=bool)


def load_quarterly(path: str | Path, id_column: str = ID_COLUMN) -> tuple[Loaded, Loaded | None]:
    """Read a customer-quarter table and return it as the orders and mailings it stands for.

    One row per customer and quarter with a purchase or a mailing: ``customer_id``,
    ``quarter`` (any date in the quarter, e.g. its first day), ``purchased`` (0/1),
    ``spend`` (net spend of the quarter) and optionally ``mailed`` (0/1). Each
    purchased quarter becomes one order of its spend; each mailed quarter one piece.
    Without a ``mailed`` column every quarter counts as mailed.
    """
    name = str(path)
    frame, is_csv, repairs = read_table(path)
    _require_columns(name, frame, {id_column: "--id-column", QUARTER_COLUMN: "", PURCHASED_COLUMN: "", SPEND_COLUMN: ""})
    has_mailed = MAILED_COLUMN in frame.columns
    _count_extra_columns(frame, [id_column, QUARTER_COLUMN, PURCHASED_COLUMN, SPEND_COLUMN] + ([MAILED_COLUMN] if has_mailed else []), repairs)
    ids = _clean_ids(name, frame[id_column], repairs)
    keep = _drop_blank_ids(name, ids, np.ones(len(frame), dtype=bool), repairs)
    dates = _parse_dates(name, QUARTER_COLUMN, frame[QUARTER_COLUMN], is_csv, keep)
    purchased = _flags(name, PURCHASED_COLUMN, frame[PURCHASED_COLUMN], is_csv) & keep
    spend, blank = _parse_amounts(name, SPEND_COLUMN, frame[SPEND_COLUMN], is_csv)
    spend = np.where(blank, 0.0, spend)
    not_positive = purchased & (spend <= 0)
    if not_positive.any():
        repairs["quarters marked purchased with no positive spend (not purchases)"] = int(not_positive.sum())
    orders = _frame({ID_COLUMN: ids, ORDER_DATE_COLUMN: dates, AMOUNT_COLUMN: spend}, purchased)
    if not len(orders):
        raise InputError(f"{name}: no row has purchased = 1; a customer-quarter table needs the quarters with purchases")
    mailings = None
    if has_mailed:
        mailed = _flags(name, MAILED_COLUMN, frame[MAILED_COLUMN], is_csv) & keep
        mailings = Loaded(name, _frame({ID_COLUMN: ids, MAIL_DATE_COLUMN: dates}, mailed), {})
    return Loaded(name, orders, repairs), mailings
