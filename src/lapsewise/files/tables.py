"""Reading a table from disk, checked once here at the edge.

A file is recognised by its first bytes: Parquet, an Excel workbook (``.xlsx``),
a gzip- or zip-compressed text file, or delimited text (commas, semicolons, tabs
or pipes, the delimiter found from the header row unless :class:`Reading` names it).
:func:`read_table` returns the rows as found, with column names trimmed, and a
count of what it repaired or converted on the way (a byte-order mark, Windows line
endings, trailing delimiters, a compressed file, a legacy encoding). A file it cannot
read raises :class:`~lapsewise.errors.InputError` with one line naming the file and
what to do.
"""

from __future__ import annotations

import codecs
import csv
import gzip
import io
import os
import warnings
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from lapsewise.errors import InputError
from lapsewise.machine import available_memory, gigabytes

_SNIFF_BYTES = 64 * 1024
"""The bytes read to recognise a file; its header row must end within them."""
MAX_COLUMNS = 1_000
"""More columns than this is an export gone wrong; refused before pandas spends memory on them."""

@dataclass(frozen=True)
class Reading:
    """How to read the input files, when they are not plain UTF-8 CSV with ISO dates and decimal points.

    Attributes
    ----------
    delimiter : str or None
        The field delimiter of text files (``,``, ``;``, ``\\t`` or ``tab``, ``|``); None: found from the header row.
    encoding : str or None
        The text encoding (``cp1252``, ``latin-1``, ``utf-16``, ...); None: UTF-8.
    sheet : str or None
        The worksheet of an Excel workbook; None: the first sheet.
    decimal_comma : bool or None
        True: amounts have a decimal comma; False: a decimal point; None: found from the amounts.
    date_format : str or None
        The strftime format of the dates (``%d.%m.%Y``); None: ISO dates or one unambiguous format, found.
    """

    delimiter: str | None = None
    encoding: str | None = None
    sheet: str | None = None
    decimal_comma: bool | None = None
    date_format: str | None = None


_DELIMITERS = {",": "comma", ";": "semicolon", "\t": "tab", "|": "pipe"}
_DELIMITER_NAMES = {"tab": "\t", "\\t": "\t", "comma": ",", "semicolon": ";", "pipe": "|"}


def _delimiter(path: Path, reading: Reading, header: str) -> str:
    """The delimiter named by the options, or the candidate found most often in the header row (a comma when none)."""
    if reading.delimiter is not None:
        chosen = _DELIMITER_NAMES.get(reading.delimiter.lower(), reading.delimiter)
        if chosen not in _DELIMITERS:
            raise InputError(f"--delimiter '{reading.delimiter}': not a delimiter lapsewise reads; use one of , ; tab |")
        return chosen
    counts = {sep: header.count(sep) for sep in _DELIMITERS}
    best = max(counts, key=lambda sep: (counts[sep], sep == ","))
    return best if counts[best] else ","


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


def read_table(path: str | Path, reading: Reading | None = None) -> tuple[pd.DataFrame, bool, dict[str, int]]:
    """Read a table file into a DataFrame with its columns as found.

    Text and workbook columns come back as text (workbook cells that are all numbers
    or all dates keep their type); Parquet columns keep their types (text as
    Arrow-backed strings, which pandas factorizes without making Python objects).

    Returns
    -------
    frame, is_csv, repairs
        ``is_csv`` is True when rows are numbered as a spreadsheet shows them (the header is row 1).
    """
    reading = reading or Reading()
    path = require_file(path, "check the path")
    name = str(path)
    if path.stat().st_size == 0:
        raise InputError(f"{name}: the file is empty; export it again with a header row and data")
    with open(path, "rb") as handle:
        head = handle.read(_SNIFF_BYTES)
    if head[:4] == b"PAR1":
        return _read_parquet(path), False, {}
    repairs: dict[str, int] = {}
    data = None
    if head[:2] == _GZIP_MAGIC:
        data = _gunzip(path)
        repairs["gzip-compressed file read"] = 1
    elif head[:4] == _ZIP_MAGIC:
        with _open_zip(path) as archive:
            if _is_workbook(archive):
                frame, sheet = _read_xlsx(path, reading)
                return frame, True, {f"Excel workbook read (sheet '{sheet}')": 1}
            member = _zip_member(path, archive)
            if archive.getinfo(member).file_size > _unpacked_limit():
                raise _too_large(path, _unpacked_limit())
            data = archive.read(member)
        repairs[f"zip-compressed file read ({member[:40]})"] = 1
    if data is not None:
        if not data:
            raise InputError(f"{name}: the compressed file holds nothing; export it again with a header row and data")
        head = data[:_SNIFF_BYTES]
    return _read_csv(path, head, data, reading, repairs)


_GZIP_MAGIC = b"\x1f\x8b"
_ZIP_MAGIC = b"PK\x03\x04"


def _unpacked_limit() -> int:
    """The most a compressed input may unpack to: a quarter of the free memory (the rows take several times the text)."""
    return available_memory() // 4


def _too_large(path: Path, size: int) -> InputError:
    return InputError(
        f"{path}: unpacks to more than {gigabytes(size)}, more than a quarter of the memory free; "
        "unpack it on disk and give the plain file (or its Parquet export)"
    )


def _gunzip(path: Path) -> bytes:
    """The unpacked bytes, read in blocks so that a file unpacking to more than the limit is refused, not swallowed."""
    limit, blocks, total = _unpacked_limit(), [], 0
    try:
        with gzip.open(path, "rb") as handle:
            while block := handle.read(64 * 2**20):
                total += len(block)
                if total > limit:
                    raise _too_large(path, limit)
                blocks.append(block)
    except (OSError, EOFError, gzip.BadGzipFile) as exc:
        raise InputError(f"{path}: a damaged gzip file ({exc}); compress it again or give the plain file") from None
    return b"".join(blocks)


def _open_zip(path: Path) -> zipfile.ZipFile:
    try:
        return zipfile.ZipFile(path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputError(f"{path}: a damaged zip file ({exc}); compress it again or give the plain file") from None


def _is_workbook(archive: zipfile.ZipFile) -> bool:
    return "xl/workbook.xml" in archive.namelist()


def _zip_member(path: Path, archive: zipfile.ZipFile) -> str:
    """The one file inside a zip archive (folders and macOS resource entries aside)."""
    members = [m.filename for m in archive.infolist() if not m.is_dir() and not m.filename.startswith("__MACOSX/")]
    if len(members) != 1:
        shown = ", ".join(members[:4]) or "nothing"
        raise InputError(f"{path}: a zip archive must hold exactly one file (it holds {shown}); zip each file on its own")
    return members[0]


def _read_xlsx(path: Path, reading: Reading) -> tuple[pd.DataFrame, str]:
    """The first sheet (or ``reading.sheet``) of an Excel workbook, the first row as the header."""
    import openpyxl

    try:
        workbook = openpyxl.load_workbook(path, read_only=True, data_only=True)
    except Exception as exc:  # openpyxl raises several types for damaged workbooks
        raise InputError(f"{path}: not a readable Excel workbook ({str(exc).splitlines()[0][:80]}); save it again as .xlsx") from None
    try:
        names = workbook.sheetnames
        if reading.sheet is not None and reading.sheet not in names:
            shown = ", ".join(f"'{n}'" for n in names[:8])
            raise InputError(f"{path}: no sheet '{reading.sheet}' (found {shown}); check --sheet")
        sheet = reading.sheet if reading.sheet is not None else names[0]
        rows = list(workbook[sheet].iter_rows(values_only=True))
    finally:
        workbook.close()
    while rows and all(v is None for v in rows[-1]):
        rows.pop()
    if not rows:
        raise InputError(f"{path}: the sheet '{sheet}' is empty; put a header row and data on it or pass --sheet")
    header = list(rows[0])
    if len(header) > MAX_COLUMNS:
        raise InputError(f"{path}: has {len(header):,} columns (at most {MAX_COLUMNS:,}); export only the columns needed")
    body = rows[1:]
    if not body:
        raise InputError(f"{path}: the sheet '{sheet}' has a header but no data rows; export it again with data")
    width = len(header)
    columns = list(zip(*(tuple(row) + (None,) * (width - len(row)) for row in body)))
    frame = {}
    for position, (title, values) in enumerate(zip(header, columns)):
        if title is None and all(v is None for v in values):
            continue  # an empty column beside the table
        frame[str(title) if title is not None else f"column {position + 1}"] = _sheet_column(values, reading.decimal_comma)
    frame = pd.DataFrame(frame)
    _strip_column_names(path, frame)
    return frame, sheet


def _sheet_column(values: tuple, decimal_comma: bool | None):
    """One worksheet column: numbers as numbers, dates as datetimes, anything mixed as text."""
    cells = np.array(values, dtype=object)
    kind = pd.api.types.infer_dtype(cells, skipna=True)
    blank = pd.isna(cells)
    if kind == "integer":
        return pd.array(cells, dtype="Int64")
    if kind in ("floating", "mixed-integer-float"):
        return pd.to_numeric(pd.Series(cells), errors="coerce").to_numpy(dtype=np.float64)
    if kind in ("datetime", "datetime64", "date"):
        return pd.to_datetime(pd.Series(cells))
    mark = "," if decimal_comma else "."

    def text(value) -> str:
        if isinstance(value, float):
            return repr(value).replace(".", mark)
        if hasattr(value, "isoformat"):
            return value.isoformat()
        return str(value)

    return np.array(["" if b else text(v) for v, b in zip(cells, blank)], dtype=object)


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


def _read_csv(path: Path, head: bytes, data: bytes | None, reading: Reading, repairs: dict[str, int]) -> tuple[pd.DataFrame, bool, dict[str, int]]:
    """Delimited text, from the file itself or from its decompressed ``data``."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")) and reading.encoding is None:
        raise InputError(f"{path}: is UTF-16 text; pass --encoding utf-16, or save it as UTF-8")
    encoding = reading.encoding or "utf-8-sig"
    try:
        codec = codecs.lookup(encoding).name
    except LookupError:
        raise InputError(f"--encoding '{encoding}': not an encoding Python knows; try cp1252, latin-1 or utf-16") from None
    if b"\x00" in head and not codec.startswith(("utf-16", "utf-32")):
        raise InputError(f"{path}: looks like a binary file, not CSV or Parquet; export the data as CSV or Parquet")
    try:
        text = head.decode(encoding)
    except UnicodeDecodeError as exc:
        # A cut in the middle of a multi-byte character at the end of the sniffed block is fine.
        if exc.start < len(head) - 4:
            raise _undecodable(path, exc, head, reading) from None
        text = head[: exc.start].decode(encoding)
    if codec not in ("utf-8", "utf-8-sig"):
        repairs[f"text decoded from {encoding}"] = 1
    header = text.lstrip("\ufeff").split("\n", 1)[0]
    sep = _delimiter(path, reading, header)
    _check_header(path, head, header, sep)
    if sep != ",":
        repairs[f"{_DELIMITERS[sep]}-delimited text read"] = 1
    if head.startswith(b"\xef\xbb\xbf"):
        repairs["byte-order mark at the start of the file removed"] = 1
    if b"\r\n" in head:
        repairs["Windows line endings read"] = 1
    try:
        with warnings.catch_warnings(record=True) as caught:
            # pandas warns, and drops the surplus, when a row has more fields than the header.
            warnings.simplefilter("always", pd.errors.ParserWarning)
            frame = pd.read_csv(
                path if data is None else io.BytesIO(data),
                sep=sep,
                dtype=str,
                keep_default_na=False,
                encoding=encoding,
                skip_blank_lines=True,
                index_col=False,  # never take the first column as row labels when rows end in a delimiter
            )
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: the file is empty; export it again with a header row and data") from None
    except pd.errors.ParserError as exc:
        detail = str(exc).strip().splitlines()[-1]
        raise InputError(f"{path}: cannot be read as CSV ({detail}); check the quoting and the number of fields") from None
    except UnicodeDecodeError as exc:
        raise _undecodable(path, exc, exc.object, reading) from None
    if any(issubclass(w.category, pd.errors.ParserWarning) for w in caught):
        surplus = _rows_with_surplus_fields(path, data, len(frame.columns), sep, encoding)
        if surplus:
            repairs[f"rows ending in empty extra fields (trailing {_DELIMITERS[sep]}s) read"] = surplus
    _strip_column_names(path, frame)
    if len(frame.columns) == 1:
        only = frame.columns[0]
        for other, label in _DELIMITERS.items():
            if other != sep and other in only:
                raise InputError(
                    f"{path}: looks {label}-delimited (header '{only[:60]}') but was read with --delimiter '{reading.delimiter}'; "
                    "pass the file's delimiter or leave the option out"
                )
    if len(frame) == 0:
        raise InputError(f"{path}: has a header but no data rows; export it again with data")
    return frame, True, repairs


def _undecodable(path: Path, exc: UnicodeDecodeError, raw: bytes, reading: Reading) -> InputError:
    """The message for text that does not decode: the option to check, or the encoding the bytes suggest."""
    if reading.encoding is not None:
        return InputError(f"{path}: is not {reading.encoding} text (bad byte at position {exc.start}); check --encoding")
    guess = _likely_encoding(raw)
    return InputError(
        f"{path}: is not UTF-8 text (bad byte at position {exc.start}); it looks like {guess}: "
        f"pass --encoding {guess.split()[0]}, or save it as UTF-8"
    )


def _likely_encoding(raw: bytes) -> str:
    """The legacy encoding the bytes most likely are: Windows Western European unless they cannot be."""
    try:
        raw.decode("cp1252")
    except UnicodeDecodeError:
        return "latin-1 (ISO 8859-1)"
    return "cp1252 (Windows Western European)"


def _check_header(path: Path, head: bytes, header: str, sep: str) -> None:
    """Refuse a header line too long or with too many fields before pandas reads the file."""
    if head.find(b"\n") < 0 and len(head) >= _SNIFF_BYTES:
        raise InputError(
            f"{path}: no line break in the first {_SNIFF_BYTES // 1024} KB, so no header row to read; "
            "export the data as CSV with a header row and one row per line"
        )
    fields = header.count(sep) + 1
    if fields > MAX_COLUMNS:
        raise InputError(f"{path}: the header row has {fields:,} fields (at most {MAX_COLUMNS:,}); check the delimiters")


def _rows_with_surplus_fields(path: Path, data: bytes | None, width: int, sep: str, encoding: str) -> int:
    """Count rows with more fields than the header's ``width``; a surplus field that is not blank is an error."""
    surplus = 0
    raw = open(path, "rb") if data is None else io.BytesIO(data)
    with io.TextIOWrapper(raw, encoding=encoding, errors="replace", newline="") as handle:
        try:
            for row_number, row in enumerate(csv.reader(handle, delimiter=sep), start=1):
                if len(row) > width:
                    surplus += 1
                    if any(cell.strip() for cell in row[width:]):
                        raise InputError(
                            f"{path}, row {row_number}: {len(row)} fields but the header has {width}; "
                            "check the delimiters and the quoting (quote amounts and text that contain the delimiter)"
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


def header_columns(path: str | Path, reading: Reading | None = None) -> list[str]:
    """The column names of a table file, read without loading its rows ([] when unreadable or not a
    regular file: a pipe or a device is never opened here, :func:`read_table` refuses it)."""
    reading = reading or Reading()
    path = Path(path)
    try:
        if not path.is_file():
            return []
        with open(path, "rb") as handle:
            head = handle.read(_SNIFF_BYTES)
        if head[:4] == b"PAR1":
            import pyarrow.parquet as pq

            return [str(c).strip() for c in pq.read_schema(path).names]
        if head[:2] == _GZIP_MAGIC:
            with gzip.open(path, "rb") as handle:
                head = handle.read(_SNIFF_BYTES)
        elif head[:4] == _ZIP_MAGIC:
            with zipfile.ZipFile(path) as archive:
                if _is_workbook(archive):
                    import openpyxl

                    workbook = openpyxl.load_workbook(path, read_only=True, data_only=True)
                    try:
                        sheet = workbook[reading.sheet if reading.sheet is not None else workbook.sheetnames[0]]
                        first = next(sheet.iter_rows(values_only=True, max_row=1), ())
                    finally:
                        workbook.close()
                    return [str(c).strip() for c in first if c is not None]
                with archive.open(_zip_member(path, archive)) as handle:
                    head = handle.read(_SNIFF_BYTES)
        line = head.decode(reading.encoding or "utf-8-sig", errors="replace").lstrip("\ufeff").split("\n", 1)[0].rstrip("\r")
        return [c.strip().strip('"') for c in line.split(_delimiter(path, reading, line))]
    except (OSError, ValueError, KeyError, LookupError, InputError, zipfile.BadZipFile, EOFError):
        return []
