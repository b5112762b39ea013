"""Turning the cells of one column into values: customer ids, dates, amounts and 0/1 flags.

Each parser takes the file's name and the column's name for its messages and
raises :class:`~lapsewise.errors.InputError` naming the row (as a spreadsheet
numbers it) for a cell it cannot read.

Customer ids are always text: surrounding spaces are removed and ids are held
as a pandas Categorical so that large files stay small in memory.
"""

from __future__ import annotations

import re

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


def parse_dates(
    name: str,
    column_name: str,
    column: pd.Series,
    is_csv: bool,
    keep: np.ndarray,
    date_format: str | None = None,
    repairs: dict[str, int] | None = None,
) -> np.ndarray:
    """Dates as datetime64[ns] (time of day kept) for the kept rows.

    Text dates are read with ``date_format`` (strftime codes) when given; otherwise ISO
    dates are read in one pass, and a column with other dates is read when those fit one
    format (``10/18/2022``, ``18.10.2022``, ``18 Oct 2022``, with or without a time of day).
    A column whose dates fit both day-first and month-first is refused. A date with a time
    zone keeps its own calendar date and time of day (an order placed on 1 January in Tokyo
    is a 1 January order, whatever UTC says); the zone itself is dropped. An unreadable date
    in a kept row is an error naming its row; rows not kept are not checked.
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
    text = column.astype(str).str.strip()
    repairs = repairs if repairs is not None else {}
    if date_format is not None:
        filler = text[keep].iloc[0] if keep.any() else ""
        text = text.where(keep, filler)
        parsed = _parse_with_format(text, date_format)
        parsed = parsed.where(parsed.notna() | keep, pd.Timestamp("1970-01-01"))  # rows not kept are not checked
        hint = f"does not match --date-format {date_format}; check the option"
        counted = np.asarray(parsed.notna()) & keep
        if counted.any():
            repairs[f"dates read with --date-format {date_format}"] = int(counted.sum())
    else:
        text = text.where(keep, "1970-01-01")
        parsed = _parse_iso(text)
        hint = "is not a date; write dates as YYYY-MM-DD or pass --date-format"
        if parsed.isna().any():
            parsed = _parse_other_dates(name, column_name, text, parsed, keep, is_csv, repairs)
    bad = np.asarray(parsed.isna())
    if bad.any():
        first = np.flatnonzero(bad)[0]
        row = row_label(first, is_csv)
        shown = str(text.iloc[first])
        if shown == "":
            raise InputError(f"{name}, row {row}, column {column_name}: the date is blank; fill it in or remove the row")
        raise InputError(f"{name}, row {row}, column {column_name}: '{shown[:40]}' {hint}")
    values = pd.DatetimeIndex(parsed)
    _check_date_range(name, column_name, values, keep, is_csv, lambda row: str(text.iloc[row]))
    return values.values.astype("datetime64[ns]")


def _parse_with_format(text: pd.Series, date_format: str) -> pd.Series:
    try:
        return pd.to_datetime(text, format=date_format, errors="coerce")
    except (ValueError, TypeError) as exc:
        raise InputError(f"--date-format '{date_format}': not a date format ({exc}); use strftime codes such as %d.%m.%Y") from None


_MONTHS = {m: i for i, m in enumerate(["jan", "feb", "mar", "apr", "may", "jun", "jul", "aug", "sep", "oct", "nov", "dec"], start=1)}
_TIME = r"(?:[ T]+(?P<hour>\d{1,2}):(?P<minute>\d\d)(?::(?P<second>\d\d)(?:[.,]\d+)?)?\s*(?P<half>[AaPp]\.?[Mm]\.?)?)?$"
_DATE_SHAPES = {
    # two numbers and a year: day-first or month-first, to be settled by the values
    "numeric": re.compile(r"^(?P<a>\d{1,2})(?P<sep>[/.-])(?P<b>\d{1,2})(?P=sep)(?P<year>\d{4}|\d{2})\.?" + _TIME),
    # a day, a month name and a year (18 Oct 2022, 18-Oct-22, 18. Oktober is not English and is refused)
    "day name": re.compile(r"^(?P<a>\d{1,2})\.?[ -](?P<month>[A-Za-z]{3,9})\.?[ -](?P<year>\d{4}|\d{2})" + _TIME),
    # a month name, a day and a year (Oct 18, 2022)
    "name day": re.compile(r"^(?P<month>[A-Za-z]{3,9})\.? (?P<a>\d{1,2}),? (?P<year>\d{4})" + _TIME),
}
_SHAPE_REPAIRS = {
    "day-first": "dates read as day-first (DD/MM/YYYY)",
    "month-first": "dates read as month-first (MM/DD/YYYY)",
    "day name": "dates read with a month name (18 Oct 2022)",
    "name day": "dates read with a month name (Oct 18, 2022)",
}


def _parse_other_dates(
    name: str, column_name: str, text: pd.Series, parsed: pd.Series, keep: np.ndarray, is_csv: bool, repairs: dict[str, int]
) -> pd.Series:
    """Read the dates ISO parsing left, on their distinct texts, when they all fit one format.

    Returns ``parsed`` with those dates filled in; dates that fit no format stay missing
    (the caller names the first). A column whose numeric dates fit both day-first and
    month-first is refused here, naming the option that settles it.
    """
    left = np.asarray(parsed.isna()) & np.asarray(text != "")
    codes, uniques = pd.factorize(text[left])
    distinct = pd.Series(uniques, dtype=object)
    best_label, best = None, None
    for shape, pattern in _DATE_SHAPES.items():
        parts = distinct.str.extract(pattern)
        matched = parts["year"].notna()
        if not matched.any():
            continue
        parts = parts.fillna({"year": "1970", "a": "1", "b": "1", "month": "jan"})
        year = parts["year"].astype(int)
        year = year.where(parts["year"].str.len() == 4, np.where(year < 69, 2000 + year, 1900 + year))
        a = parts["a"].astype(int)
        if shape == "numeric":
            b = parts["b"].astype(int)
            day_first = _build_dates(year, b, a, parts).where(matched)
            month_first = _build_dates(year, a, b, parts).where(matched)
            fits_day, fits_month = day_first.notna().all(), month_first.notna().all()
            if fits_day and fits_month and (a != b).any():
                example = distinct[(a != b).to_numpy()].iloc[0]
                raise InputError(
                    f"{name}, column {column_name}: dates such as '{example[:20]}' fit both day-first and month-first; "
                    "pass --date-format (%d/%m/%Y or %m/%d/%Y, with the file's separator)"
                )
            candidates = [("day-first", day_first), ("month-first", month_first)]
        else:
            month = parts["month"].str[:3].str.lower().map(_MONTHS)
            known = month.notna() & matched
            candidates = [(shape, _build_dates(year, month.fillna(1).astype(int), a, parts).where(known))]
        for label, dates in candidates:
            if best is None or dates.notna().sum() > best.notna().sum():
                best_label, best = label, dates
        if best.notna().all():
            break
    if best is None:
        return parsed  # the first unreadable date is reported by the caller
    filled = parsed.copy()
    filled[left] = best.to_numpy()[codes]
    if best.notna().all():
        counted = left & keep
        what = _SHAPE_REPAIRS[best_label]
        repairs[what] = repairs.get(what, 0) + int(counted.sum())
    return filled  # dates the format does not fit stay missing, and the caller names the first


def _build_dates(year: pd.Series, month: pd.Series, day: pd.Series, parts: pd.DataFrame) -> pd.Series:
    """Dates (and times) from their parts; an impossible date (31 April, month 13) is missing."""
    hour = parts["hour"].fillna("0").astype(int)
    half = parts["half"].fillna("").str[:1].str.lower()
    bad_clock = ((half != "") & ((hour < 1) | (hour > 12))) | (hour > 23)
    hour = np.where(half == "p", hour % 12 + 12, np.where(half == "a", hour % 12, hour))
    frame = pd.DataFrame(
        {
            "year": year,
            "month": month,
            "day": day,
            "hour": hour,
            "minute": parts["minute"].fillna("0").astype(int),
            "second": parts["second"].fillna("0").astype(int),
        }
    )
    valid = (frame["month"].between(1, 12)) & (frame["day"].between(1, 31)) & (frame["minute"] < 60) & (frame["second"] < 60) & ~bad_clock
    dates = pd.to_datetime(frame.where(valid, pd.DataFrame({"year": 1970, "month": 1, "day": 1, "hour": 0, "minute": 0, "second": 0}, index=frame.index)), errors="coerce")
    return dates.where(valid)


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


def parse_amounts(
    name: str, column_name: str, column: pd.Series, is_csv: bool, decimal_comma: bool | None = None, repairs: dict[str, int] | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Amounts as float64 and a mask of blank cells; a cell that is not an amount is an error naming its row.

    Plain numbers (``42.50``, ``-3``) are read in one pass. Anything else is read on the
    column's distinct texts: a currency sign or three-letter code before or after the
    number (``$1,234.50``, ``1.234,50 €``, ``EUR 12.00``), thousands separators (commas,
    dots, spaces or apostrophes), a minus sign before or after, and accounting negatives
    in parentheses (``(12.50)``). The decimal mark is ``decimal_comma`` (True: comma,
    False: point) or, when None, found from the amounts themselves; a column whose amounts
    use both marks, or fit either (``1,234`` alone), is refused. Each kind of conversion is
    counted in ``repairs``.
    """
    if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
        values = column.to_numpy(dtype=np.float64, na_value=np.nan)
        blank = np.isnan(values)
    else:
        text = column.astype(str).str.strip()
        blank = np.asarray((text == "") | text.str.lower().isin(["nan", "none", "null", "na"]))
        values = None
        if decimal_comma is not True:
            values = pd.to_numeric(text.where(~blank, "nan"), errors="coerce").to_numpy(dtype=np.float64)
            if not (np.isnan(values) & ~blank).any():
                decimal_comma = False  # plain numbers: nothing to convert
            else:
                values = None
        if values is None:
            values = _formatted_amounts(name, column_name, text.where(~blank, ""), blank, is_csv, decimal_comma, repairs if repairs is not None else {})
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


_CURRENCY = r"(?:[A-Z]{3}|[A-Z]{0,2}[$€£¥₹₩₽₺₪]|kr|Fr\.?|zł|Kč|R\$)"
_AMOUNT_PARTS = re.compile(
    rf"^(?P<open>\()?\s*(?P<lead_minus>[-−])?\s*(?P<lead>{_CURRENCY})?\s*(?P<minus>[-−])?\s*"
    r"(?P<number>[0-9][0-9.,' \u00a0\u202f]*|[.,][0-9]+)"
    rf"\s*(?P<trail_minus>[-−])?\s*(?P<trail>{_CURRENCY})?\s*(?P<end_minus>[-−])?\s*(?P<close>\))?$"
)
_GROUPED = {  # the number with its grouping, for each decimal mark
    ".": re.compile(r"^(?:[0-9]{1,3}(?:(?P<g>[,' \u00a0\u202f])[0-9]{3})?(?:(?P=g)[0-9]{3})*|[0-9]*)(?:\.[0-9]*)?$"),
    ",": re.compile(r"^(?:[0-9]{1,3}(?:(?P<g>[.' \u00a0\u202f])[0-9]{3})?(?:(?P=g)[0-9]{3})*|[0-9]*)(?:,[0-9]*)?$"),
}


def _formatted_amounts(
    name: str, column_name: str, text: pd.Series, blank: np.ndarray, is_csv: bool, decimal_comma: bool | None, repairs: dict[str, int]
) -> np.ndarray:
    """Amounts written with currency, grouping, parentheses or a decimal comma, read on their distinct texts."""
    codes, uniques = pd.factorize(text)
    rows_of = np.bincount(codes[codes >= 0], minlength=len(uniques))
    distinct = pd.Series(uniques, dtype=object)
    parts = distinct.str.extract(_AMOUNT_PARTS)
    used = (distinct != "").to_numpy()
    matched = parts["number"].notna().to_numpy()
    opened, closed = parts["open"].notna().to_numpy(), parts["close"].notna().to_numpy()
    signs = (parts[["lead_minus", "minus", "trail_minus", "end_minus"]].notna().sum(axis=1)).to_numpy()
    currencies = parts[["lead", "trail"]].notna().sum(axis=1).to_numpy()
    well_formed = matched & (opened == closed) & (signs + opened <= 1) & (currencies <= 1)
    number = parts["number"].fillna("").str.rstrip(" \u00a0\u202f")

    def first_row(mask: np.ndarray) -> tuple[int, str]:
        rows = np.flatnonzero(np.isin(codes, np.flatnonzero(mask)))
        return row_label(rows[0], is_csv), str(distinct[codes[rows[0]]])

    def refuse(mask: np.ndarray, what: str) -> None:
        row, shown = first_row(mask)
        raise InputError(f"{name}, row {row}, column {column_name}: '{shown[:40]}' {what}")

    if (used & ~well_formed).any():
        refuse(used & ~well_formed, "is not an amount; write amounts like 42.50, 1,234.50, $42.50 or (12.50)")
    # Which mark each distinct amount shows: a last separator followed by other than three digits is the
    # decimal mark; a separator that repeats, or comes before the other, groups thousands.
    point_says = number.str.contains(r"\.(?:[0-9]{0,2}|[0-9]{4,})$|,.*\.|,[0-9]{3},", regex=True).to_numpy()
    comma_says = number.str.contains(r",(?:[0-9]{0,2}|[0-9]{4,})$|\..*,|\.[0-9]{3}\.", regex=True).to_numpy()
    given = decimal_comma is not None
    if decimal_comma is None:
        if point_says.any() and comma_says.any():
            row_point, shown_point = first_row(point_says)
            row_comma, shown_comma = first_row(comma_says)
            raise InputError(
                f"{name}, column {column_name}: the amounts use both decimal marks ('{shown_point[:20]}' in row {row_point}, "
                f"'{shown_comma[:20]}' in row {row_comma}); pass --decimal-comma or --decimal-point, or export with one mark"
            )
        either = number.str.contains(r"^[0-9]{1,3},[0-9]{3}$", regex=True).to_numpy()
        if not point_says.any() and not comma_says.any() and either.any():
            row, shown = first_row(either)
            raise InputError(
                f"{name}, row {row}, column {column_name}: '{shown[:20]}' could be read with a decimal comma or a "
                "thousands separator, and no amount says which; pass --decimal-comma or --decimal-point"
            )
        decimal_comma = bool(comma_says.any())
    mark = "," if decimal_comma else "."
    grouped_ok = number.str.match(_GROUPED[mark]).to_numpy()
    if (used & ~grouped_ok).any():
        mark_name = "comma" if decimal_comma else "point"
        why = f"as {'--decimal-comma' if decimal_comma else '--decimal-point'} says" if given else "as the column's other amounts have"
        refuse(used & ~grouped_ok, f"is not an amount with a decimal {mark_name} ({why}); check the decimal mark and the thousands separators")
    other = "." if decimal_comma else ","
    plain = number.str.replace(rf"[{re.escape(other)}' \u00a0\u202f]", "", regex=True)
    if decimal_comma:
        plain = plain.str.replace(",", ".", regex=False)
    magnitude = pd.to_numeric(plain.where(used, "nan"), errors="coerce").to_numpy(dtype=np.float64)
    if (used & np.isnan(magnitude)).any():
        refuse(used & np.isnan(magnitude), "is not an amount; write amounts like 42.50, 1,234.50, $42.50 or (12.50)")
    negative = (signs > 0) | opened
    distinct_values = np.where(used, np.where(negative, -magnitude, magnitude), np.nan)
    counted = {
        "amounts with a currency sign or code read": currencies > 0,
        "amounts with thousands separators read": number.str.contains(rf"[{re.escape(other)}' \u00a0\u202f]", regex=True).to_numpy(),
        "amounts in parentheses read as negative (accounting style)": opened,
        "amounts with the minus sign after the number or the currency read": parts[["minus", "trail_minus", "end_minus"]].notna().any(axis=1).to_numpy(),
        "amounts with a decimal comma read": used & np.full(len(uniques), decimal_comma) & number.str.contains(",", regex=False).to_numpy(),
    }
    for what, mask in counted.items():
        rows = int(rows_of[mask & used].sum())
        if rows:
            repairs[what] = repairs.get(what, 0) + rows
    values = distinct_values[np.maximum(codes, 0)]
    values[blank] = np.nan
    return values


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

