"""Reading a table from disk: CSV or Parquet, recognised by its first bytes, checked once here at the edge.

:func:`read_table` returns the rows as found, with column names trimmed, and a
count of what it repaired on the way (a byte-order mark, Windows line endings,
trailing commas). A file it cannot read raises :class:`~lapsewise.errors.InputError`
with one line naming the file and what to do.
"""

from __future__ import annotations

import csv
import os
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from lapsewise.errors import InputError

_SNIFF_BYTES = 64 * 1024
"""The bytes read to recognise a file; its header row must end within them."""
MAX_COLUMNS = 1_000
"""More columns than this is an export gone wrong; refused before pandas spends memory on them."""

def row_label(index: int, is_csv: bool) -> int:
    """The row number a person sees: spreadsheet rows for CSV (header is row 1), 1-based for Parquet."""
    return int(index) + (2 if is_csv else 1)


def require_file(path: str | Path, missing_hint: str, kind: str = "a CSV or Parquet file") -> Path:
    """The path of an existing regular file, or an InputError saying what to do instead.

    A folder, a pipe (FIFO), a device such as ``/dev/zero`` or a socket is refused before
    anything reads it: reading one could wait forever or never end.
    """
    path = Path(path)
    try:
        exists, is_dir, is_file = path.exists(), path.is_dir(), path.is_file()
    except OSError as exc:  # a name too long, a path through a file, no permission to look
        raise InputError(f"{path}: cannot be opened ({exc.strerror or exc}); check the path") from None
    if not exists:
        raise InputError(f"{path}: file not found; {missing_hint}")
    if is_dir:
        raise InputError(f"{path}: is a folder, not a file; give the path of {kind}")
    if not is_file:
        raise InputError(f"{path}: is not a regular file (a pipe, a device or a socket); give the path of {kind}")
    if not os.access(path, os.R_OK):
        raise InputError(f"{path}: cannot be read (no permission); check the file's permissions")
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
    if table.num_columns > MAX_COLUMNS:
        raise InputError(f"{path}: has {table.num_columns:,} columns (at most {MAX_COLUMNS:,}); export only the columns needed")
    # Lists, structs and maps are not plain values; a loader refuses such a column if it needs it.
    nested = [field.name for field in table.schema if pa.types.is_nested(field.type)]
    frame = table.drop_columns(nested).to_pandas()
    frame.attrs["nested"] = [str(name).strip() for name in nested]
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
    _check_header(path, head)
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


def _check_header(path: Path, head: bytes) -> None:
    """Refuse a header line too long or with too many fields before pandas reads the file."""
    end = head.find(b"\n")
    if end < 0 and len(head) >= _SNIFF_BYTES:
        raise InputError(
            f"{path}: no line break in the first {_SNIFF_BYTES // 1024} KB, so no header row to read; "
            "export the data as CSV with a header row and one row per line"
        )
    line = head if end < 0 else head[:end]
    fields = line.count(b",") + 1
    if fields > MAX_COLUMNS:
        raise InputError(f"{path}: the header row has {fields:,} fields (at most {MAX_COLUMNS:,}); check the delimiters")


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


def header_columns(path: str | Path) -> list[str]:
    """The column names of a CSV or Parquet file, read without loading its rows ([] when unreadable or not a
    regular file: a pipe or a device is never opened here, :func:`read_table` refuses it)."""
    path = Path(path)
    try:
        if not path.is_file():
            return []
        with open(path, "rb") as handle:
            head = handle.read(4)
        if head == b"PAR1":
            import pyarrow.parquet as pq

            return [str(c).strip() for c in pq.read_schema(path).names]
        with open(path, encoding="utf-8-sig", errors="replace") as handle:
            return [c.strip().strip('"') for c in handle.readline(_SNIFF_BYTES).rstrip("\r\n").split(",")]
    except (OSError, ValueError):
        return []

