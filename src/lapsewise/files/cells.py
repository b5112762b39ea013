"""Turning the cells of one column into values: customer ids, dates, amounts and 0/1 flags.

Each parser takes the file's name and the column's name for its messages and
raises :class:`~lapsewise.errors.InputError` naming the row (as a spreadsheet
numbers it) for a cell it cannot read.

Customer ids are always text: surrounding spaces are removed and ids are held
as a pandas Categorical so that large files stay small in memory.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from lapsewise.errors import InputError
from lapsewise.files.tables import row_label

MAX_AMOUNT = 1e12  # no single order is worth a trillion; larger values are export errors (and overflow the panel)


def clean_ids(name: str, column: pd.Series, repairs: dict[str, int], factorized: tuple | None = None) -> pd.Categorical:
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


def parse_dates(name: str, column_name: str, column: pd.Series, is_csv: bool, keep: np.ndarray) -> np.ndarray:
    """Dates as datetime64[ns] (time of day kept, zone dropped) for the kept rows.

    An unreadable date in a kept row is an error naming its row; rows not kept are not checked.
    """
    if pd.api.types.is_datetime64_any_dtype(column):
        values = pd.DatetimeIndex(column)
        if values.tz is not None:
            values = values.tz_convert(None)
        missing = np.asarray(values.isna()) & keep
        if missing.any():
            row = row_label(np.flatnonzero(missing)[0], is_csv)
            raise InputError(f"{name}, row {row}, column {column_name}: the date is blank; fill it in or remove the row")
        _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(column.iloc[row]))
        return values.values.astype("datetime64[ns]")
    text = column.astype(str).str.strip().where(keep, "1970-01-01")
    parsed = pd.to_datetime(text, format="ISO8601", errors="coerce", utc=True)
    bad = np.asarray(parsed.isna())
    if bad.any():
        first = np.flatnonzero(bad)[0]
        row = row_label(first, is_csv)
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
            f"{name}, row {row_label(first, is_csv)}, column {column_name}: '{shown(first)[:40]}' "
            f"is outside the years {pd.Timestamp.min.year + 1} to {pd.Timestamp.max.year - 1}; fix or remove the row"
        )


def parse_amounts(name: str, column_name: str, column: pd.Series, is_csv: bool) -> tuple[np.ndarray, np.ndarray]:
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
                f"{name}, row {row_label(first, is_csv)}, column {column_name}: '{str(text.iloc[first])[:40]}' "
                "is not a number; write amounts like 42.50 with no currency sign or thousands separator"
            )
    huge = (np.abs(values) > MAX_AMOUNT) & np.isfinite(values)
    if huge.any():
        first = np.flatnonzero(huge)[0]
        raise InputError(
            f"{name}, row {row_label(first, is_csv)}, column {column_name}: {values[first]:.3g} is implausibly large "
            f"(above {MAX_AMOUNT:.0e}); fix or remove the row"
        )
    infinite = np.isinf(values)
    if infinite.any():
        first = np.flatnonzero(infinite)[0]
        raise InputError(
            f"{name}, row {row_label(first, is_csv)}, column {column_name}: the amount is infinite; fix or remove the row"
        )
    return values, blank


def drop_blank_ids(name: str, ids: pd.Categorical, keep: np.ndarray, repairs: dict[str, int]) -> np.ndarray:
    blank = np.asarray(ids.codes) < 0
    if blank.any():
        repairs["rows with a blank customer id left out"] = int(blank.sum())
    return keep & ~blank


def parse_flags(name: str, column_name: str, column: pd.Series, is_csv: bool) -> np.ndarray:
    """0/1 flags (also true/false, yes/no); anything else is an error naming its row."""
    text = column.astype(str).str.strip().str.lower()
    mapping = {"1": True, "0": False, "true": True, "false": False, "yes": True, "no": False, "1.0": True, "0.0": False, "": False}
    values = text.map(mapping)
    bad = values.isna().to_numpy()
    if bad.any():
        first = np.flatnonzero(bad)[0]
        raise InputError(f"{name}, row {row_label(first, is_csv)}, column {column_name}: '{text.iloc[first][:20]}' is not 0 or 1")
    return values.to_numpy(dtype=bool)

