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
import pyarrow as pa
import pyarrow.compute as pc

from lapsewise.errors import InputError
from lapsewise.files.tables import row_label

MAX_AMOUNT = 1e12  # no single order is worth a trillion; larger values are export errors (and overflow the panel)


def canonical_ids(uniques) -> tuple[pd.Index, dict[str, np.ndarray]]:
    """Distinct raw ids in the one text form every file is compared in, and which of them each rule changed.

    The canonical form: surrounding spaces trimmed; Unicode in its composed form (NFC), so
    that an accented letter typed as one character or as a letter and an accent is the same
    id; and a whole number written as a decimal (``1.0``, ``42.00``, a float column of a
    Parquet file) written plainly (``1``, ``42``). Leading zeros are kept: ``007`` is not ``7``.
    Returns the canonical texts and masks: per rule (``trimmed``, ``composed``, ``decimal``)
    the ids it changed, and ``blank`` and ``long`` (over ``MAX_ID_LENGTH`` characters) ids.
    Everything runs in pyarrow's kernels over the distinct ids, in one pass each.
    """
    strings, decimal_written = _as_text(uniques)
    stripped = pc.utf8_trim_whitespace(strings)
    trimmed = _mask(pc.not_equal(stripped, strings))
    ascii_only = _mask(pc.string_is_ascii(stripped))
    normalised = stripped
    composed = np.zeros(len(strings), dtype=bool)
    if not ascii_only.all():
        normalised = pc.utf8_normalize(stripped, "NFC")
        composed = _mask(pc.not_equal(normalised, stripped))
    whole_decimal = _mask(pc.match_substring_regex(normalised, r"^\d+\.0+$"))
    changed = {"trimmed": trimmed, "composed": composed, "decimal": decimal_written | whole_decimal}
    # Not rules but facts the caller checks, found here in the same pass: blank ids and over-long ones.
    changed["blank"] = _mask(pc.is_in(pc.utf8_lower(normalised), value_set=pa.array(["", "nan", "none", "null"])))
    changed["long"] = _mask(pc.greater(pc.utf8_length(normalised), MAX_ID_LENGTH))
    if whole_decimal.any():
        normalised = pc.replace_substring_regex(normalised, r"^(\d+)\.0+$", r"\1")
    if not (trimmed.any() or composed.any() or changed["decimal"].any()) and pd.api.types.is_object_dtype(getattr(uniques, "dtype", None)):
        return pd.Index(uniques, dtype=object), changed  # already canonical text: no conversion back from pyarrow
    return pd.Index(normalised.to_numpy(zero_copy_only=False), dtype=object), changed


def _mask(flags: pa.Array) -> np.ndarray:
    return np.asarray(flags.to_numpy(zero_copy_only=False), dtype=bool)


def _as_text(uniques) -> tuple[pa.Array, np.ndarray]:
    """Distinct ids as a pyarrow string array, and which were floats holding whole numbers (written as integers)."""
    try:
        values = pa.array(uniques, from_pandas=True)
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError):  # mixed types in one column: each as Python writes it
        values = pa.array([str(v) for v in uniques], type=pa.string())
    whole = np.zeros(len(values), dtype=bool)
    if pa.types.is_floating(values.type):
        finite = pc.and_(pc.is_finite(values), pc.less(pc.abs(values), 2.0**63))
        whole_numbers = pc.and_(finite, pc.equal(pc.round(values), values))
        as_integers = pc.cast(pc.cast(pc.if_else(whole_numbers, values, 0.0), pa.int64()), pa.string())
        whole = _mask(whole_numbers)
        values = pc.if_else(whole_numbers, as_integers, pc.cast(values, pa.string()))
    elif not (pa.types.is_string(values.type) or pa.types.is_large_string(values.type)):
        try:
            values = pc.cast(values, pa.string())
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            values = pa.array([str(v) for v in uniques], type=pa.string())
    return pc.fill_null(values, ""), whole


_ID_REPAIRS = {
    "trimmed": "ids with surrounding spaces trimmed",
    "composed": "ids in a decomposed Unicode form composed (NFC)",
    "decimal": "ids written as decimal numbers (1.0) read as whole numbers (1)",
}
MAX_ID_LENGTH = 256


def clean_ids(name: str, column: pd.Series, repairs: dict[str, int], factorized: tuple | None = None, column_name: str = "customer_id", is_csv: bool = True) -> pd.Categorical:
    """Ids in their canonical text form (:func:`canonical_ids`), as a Categorical; blank ids become missing.

    ``factorized`` is the column's ``pd.factorize`` result when the caller already has it.
    An id longer than ``MAX_ID_LENGTH`` characters is an export error and is refused with its row.
    """
    codes, uniques = factorized if factorized is not None else pd.factorize(column, use_na_sentinel=True)
    text, changed = canonical_ids(uniques)
    blank_uniques = changed.pop("blank")
    long = changed.pop("long") & ~blank_uniques
    if long.any():
        first = int(np.flatnonzero(np.isin(codes, np.flatnonzero(long)))[0])
        raise InputError(
            f"{name}, row {row_label(first, is_csv)}, column {column_name}: an id of {len(text[np.flatnonzero(long)[0]]):,} characters "
            f"(at most {MAX_ID_LENGTH}); check the delimiters and the quoting"
        )
    for rule, description in _ID_REPAIRS.items():
        touched = changed[rule] & ~blank_uniques  # blank ids are counted as blank, not as repaired
        if touched.any():
            repairs[description] = int(np.isin(codes, np.flatnonzero(touched)).sum())
    if not any(mask.any() for mask in changed.values()) and not blank_uniques.any():
        # The common case: every id is already canonical, so the codes stand as they are.
        return pd.Categorical.from_codes(codes, categories=text, validate=False)
    clean_codes, clean_uniques = pd.factorize(text)
    clean_codes = np.where(blank_uniques, -1, clean_codes)  # blank ids become missing
    row_codes = np.where(codes < 0, -1, clean_codes[np.maximum(codes, 0)])
    return pd.Categorical.from_codes(row_codes, categories=pd.Index(clean_uniques, dtype=object), validate=False)


def parse_dates(name: str, column_name: str, column: pd.Series, is_csv: bool, keep: np.ndarray) -> np.ndarray:
    """Dates as datetime64[ns] (time of day kept) for the kept rows.

    A date with a time zone keeps its own calendar date and time of day (an order
    placed on 1 January in Tokyo is a 1 January order, whatever UTC says); the zone
    itself is dropped. An unreadable date in a kept row is an error naming its row;
    rows not kept are not checked.
    """
    if pd.api.types.is_datetime64_any_dtype(column):
        values = pd.DatetimeIndex(column)
        if values.tz is not None:
            values = values.tz_localize(None)  # the local wall-clock time, not UTC
        missing = np.asarray(values.isna()) & keep
        if missing.any():
            row = row_label(np.flatnonzero(missing)[0], is_csv)
            raise InputError(f"{name}, row {row}, column {column_name}: the date is blank; fill it in or remove the row")
        _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(column.iloc[row]))
        return values.values.astype("datetime64[ns]")
    text = column.astype(str).str.strip().where(keep, "1970-01-01")
    parsed = _parse_iso(text)
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
    values = pd.DatetimeIndex(parsed)
    _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(text.iloc[row]))
    return values.values.astype("datetime64[ns]")


_ZONE = r"(?:Z|[+-]\d\d:?\d\d)$"


def _parse_iso(text: pd.Series) -> pd.Series:
    """ISO 8601 dates and times as naive datetimes, a time zone dropped after reading the local date and time.

    One zone for the whole column (or none) parses in one pass; several zones in one
    column are removed from the text first, so that no date moves into another day.
    """
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)  # pandas warns about mixed zones, handled below
        try:
            parsed = pd.to_datetime(text, format="ISO8601", errors="coerce")
        except (ValueError, TypeError):
            parsed = None
    if parsed is not None and pd.api.types.is_datetime64_any_dtype(parsed):
        return parsed.dt.tz_localize(None) if parsed.dt.tz is not None else parsed
    return pd.to_datetime(text.str.replace(_ZONE, "", regex=True), format="ISO8601", errors="coerce")


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

