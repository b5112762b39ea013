"""Writing outputs safely: one CSV writer, stable JSON, and no output replaced, half-written or raced over.

Every output goes to a temporary file in the same folder, named
``.<name>.lapsewise-tmp-<process id>-<random>.tmp``, and is then published
under its own name. Without ``force`` the publishing step creates the name
exclusively (a hard link, which fails if the name exists), so of two runs
racing to write the same file exactly one succeeds and the other is refused.
The temporary file is removed when the write fails or the run is interrupted
(SIGINT or SIGTERM; see :func:`lapsewise.app.cli.main`); one left by a run that
was killed outright is removed by the next write into that folder.

Every CSV the tool writes goes through :func:`write_csv`, which prefixes text
cells that a spreadsheet would run as a formula with a single quote (OWASP's
CSV-injection guidance) and refuses numbers that are not finite. Every JSON
output goes through :func:`dumps_stable`, which refuses them too.
"""

from __future__ import annotations

import json
import math
import os
import re
import tempfile
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from lapsewise.errors import InputError

TEMPORARY_MARK = ".lapsewise-tmp-"
_TEMPORARY = re.compile(r"^\..*" + re.escape(TEMPORARY_MARK) + r"(\d+)-[^/]*\.tmp$")
_NAME_MAX = 255


def check_writable(path: str | Path, force: bool) -> Path:
    """Check, before any work, that ``path`` can be written: refuse an existing output without ``force``,
    a folder, a folder that is missing or is a file, a folder without write permission, a name too long."""
    path = Path(path)
    try:
        is_dir, exists = path.is_dir(), path.exists()
    except OSError as exc:
        raise InputError(f"{path}: cannot be used as an output ({exc.strerror or exc}); choose another name") from None
    if is_dir:
        raise InputError(f"{path}: is a folder; give a file name for the output")
    if exists and not force:
        raise InputError(f"{path}: already exists; pass --force to overwrite it or choose another name")
    if len(path.name.encode("utf-8")) > _NAME_MAX - 60:  # room for the temporary file's longer name
        raise InputError(f"{path}: the file name is {len(path.name.encode('utf-8'))} bytes long (at most {_NAME_MAX - 60}); choose a shorter name")
    parent = path.parent
    blocking = next((folder for folder in [parent, *parent.parents] if folder.exists() and not folder.is_dir()), None)
    if blocking is not None:
        raise InputError(f"{path}: {blocking} is a file, not a folder; choose another place for the output")
    if not parent.exists():
        raise InputError(f"{path}: the folder {parent} does not exist; create it first")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(f"{path}: cannot write in the folder {parent} (no permission); choose another folder")
    return path


def remove_stale_temporaries(folder: Path) -> int:
    """Remove the temporary files that runs which were killed left in ``folder``; returns how many.

    A temporary file names the process that wrote it; it is stale when that process no longer runs.
    """
    removed = 0
    try:
        names = os.listdir(folder)
    except OSError:
        return 0
    for name in names:
        match = _TEMPORARY.match(name)
        if match is None or _running(int(match.group(1))):
            continue
        try:
            (folder / name).unlink()
            removed += 1
        except OSError:
            pass
    return removed


def _running(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def write_atomic(path: str | Path, write: Callable[[Path], None], force: bool = False) -> Path:
    """Call ``write(temporary_path)`` and publish the result as ``path`` (see the module docstring)."""
    path = check_writable(path, force)
    remove_stale_temporaries(path.parent)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name[:80]}{TEMPORARY_MARK}{os.getpid()}-", suffix=".tmp", dir=path.parent)
    os.close(handle)
    temporary_path = Path(temporary)
    try:
        write(temporary_path)
        _publish(temporary_path, path, force)
    finally:
        if temporary_path.exists():
            temporary_path.unlink()
    return path


def _publish(temporary: Path, path: Path, force: bool) -> None:
    """Give the written file its name: replacing an existing output with ``force``, else only if the name is free."""
    if force:
        os.replace(temporary, path)
        return
    try:
        os.link(temporary, path)  # fails if the name exists: no run can overwrite another's output
        return
    except FileExistsError:
        raise InputError(f"{path}: already exists (another run wrote it first); pass --force to overwrite it or choose another name") from None
    except OSError:
        pass  # a file system without hard links: reserve the name exclusively, then move the file onto it
    try:
        os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))
    except FileExistsError:
        raise InputError(f"{path}: already exists (another run wrote it first); pass --force to overwrite it or choose another name") from None
    os.replace(temporary, path)


def write_text_atomic(path: str | Path, text: str, force: bool = False) -> Path:
    return write_atomic(path, lambda p: p.write_text(text, encoding="utf-8"), force)


# ---------------------------------------------------------------- JSON


def dumps_stable(data: object, name: str = "the output") -> str:
    """JSON with sorted keys and a trailing newline: the same input always gives the same bytes.

    A number that is not finite has no JSON form; it is refused with the key that holds it.
    """
    where = _non_finite(data, "")
    if where is not None:
        raise InputError(
            f"{name}: {where or 'the value'} is not a finite number; the inputs drive a figure out of range "
            "(check the model file's parameters and the policy's values)"
        )
    return json.dumps(data, indent=2, sort_keys=True, allow_nan=False) + "\n"


def _non_finite(data: object, where: str) -> str | None:
    """The key path of the first number in ``data`` that is NaN or infinite (None when every one is finite)."""
    if isinstance(data, float):
        return None if math.isfinite(data) else where
    if isinstance(data, dict):
        for key, value in data.items():
            found = _non_finite(value, f"{where}.{key}" if where else str(key))
            if found is not None:
                return found
    elif isinstance(data, (list, tuple)):
        for index, value in enumerate(data):
            found = _non_finite(value, f"{where}[{index}]")
            if found is not None:
                return found
    return None


# ---------------------------------------------------------------- CSV

_CSV_BLOCK = 500_000  # rows turned into text at a time, to bound memory


def save_csv(path: str | Path, frame: pd.DataFrame, force: bool = False, nullable: Iterable[str] = (), significant: int = 6) -> Path:
    """Write ``frame`` to ``path`` through :func:`write_csv`, atomically, after checking its numbers.

    Every number column must be finite except those named in ``nullable`` (documented
    as empty where a figure does not exist), where NaN is written as an empty cell.
    """
    check_finite(frame, str(path), nullable)
    return write_atomic(path, lambda p: write_csv(p, frame, significant), force)


def check_finite(frame: pd.DataFrame, name: str, nullable: Iterable[str] = ()) -> None:
    """Refuse a frame with a NaN or infinite number outside the ``nullable`` columns, naming the column."""
    allowed = set(nullable)
    for column in frame.columns:
        values = frame[column]
        if not pd.api.types.is_float_dtype(values.dtype):
            continue
        array = values.to_numpy(dtype=np.float64)
        bad = ~np.isfinite(array) if column not in allowed else np.isinf(array)
        if bad.any():
            raise InputError(
                f"{name}: column {column} would hold {int(bad.sum()):,} values that are not finite numbers; "
                "the inputs drive it out of range (check the model file's parameters and the policy's values)"
            )


def write_csv(path: str | Path, frame: pd.DataFrame, significant: int = 6) -> None:
    """Write ``frame`` as CSV: a header, then one line per row.

    Fields are quoted only when they hold a comma, a quote or a line break (as
    Python's csv module does), numbers are rounded to ``significant`` digits,
    missing values are empty, and text cells that a spreadsheet would run as a
    formula (starting with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return)
    get a single quote in front. Each column becomes text through pyarrow's
    vectorised kernels and the lines are joined in blocks, so a million rows take
    a fraction of the time a row-by-row writer needs.
    """
    header = _safe_text(pa.array([str(name) for name in frame.columns], type=pa.string())).to_pylist()
    with open(path, "wb") as handle:
        handle.write((",".join(header) + "\n").encode("utf-8"))
        for start in range(0, len(frame), _CSV_BLOCK):
            block = frame.iloc[start : start + _CSV_BLOCK]
            fields = [_csv_field(block[name], significant) for name in block.columns]
            lines = pc.binary_join_element_wise(*fields, ",")
            lines = pc.binary_join_element_wise(lines, pa.scalar(""), "\n")  # each line ends in a newline
            handle.write(_string_bytes(lines))


def _csv_field(series: pd.Series, significant: int) -> pa.Array:
    """One column as a pyarrow string array of CSV fields (missing values empty)."""
    if isinstance(series.dtype, pd.CategoricalDtype):
        labels = _safe_text(pa.array(series.cat.categories.astype(str).to_numpy(dtype=object), type=pa.string()))
        codes = series.cat.codes.to_numpy()
        text = pc.take(labels, pa.array(codes, mask=codes < 0))
    elif pd.api.types.is_bool_dtype(series.dtype):
        text = pa.array(np.where(series.to_numpy(dtype=bool), "True", "False"), type=pa.string())
    elif pd.api.types.is_float_dtype(series.dtype):
        values = round_significant(series.to_numpy(dtype=np.float64), significant)
        text = pc.cast(pa.array(values, from_pandas=True), pa.string())
    elif pd.api.types.is_integer_dtype(series.dtype):
        text = pc.cast(pa.array(series.to_numpy()), pa.string())
    elif hasattr(series.array, "__arrow_array__"):  # text already held by pyarrow: no conversion
        text = _safe_text(pc.cast(pa.array(series.array), pa.string()))
    else:
        values = series.to_numpy()
        missing = pd.isna(values)
        strings = pa.array(np.where(missing, "", values.astype(str)) if missing.any() else values.astype(str), type=pa.string())
        text = _safe_text(strings)
    return pc.fill_null(text, "")


_FORMULA_START = "^[=+\\-@\t\r]"


def _safe_text(strings: pa.Array) -> pa.Array:
    """Text cells as CSV fields: formula-like ones prefixed with a quote, then quoted where they need it."""
    risky = pc.match_substring_regex(strings, _FORMULA_START)
    if pc.any(risky).as_py():
        strings = pc.if_else(risky, pc.binary_join_element_wise("'", strings, ""), strings)
    return _quote_strings(strings)


def _quote_strings(strings: pa.Array) -> pa.Array:
    """Quote the strings that hold a comma, quote or line break, doubling their quotes."""
    needs = pc.match_substring_regex(strings, '[,"\\r\\n]')
    if not pc.any(needs).as_py():
        return strings
    quoted = pc.binary_join_element_wise('"', pc.replace_substring(strings, '"', '""'), '"', "")
    return pc.if_else(needs, quoted, strings)


def _string_bytes(strings: pa.Array) -> memoryview:
    """The characters of a pyarrow string array, concatenated (its data buffer between the first and last offsets)."""
    offsets = np.frombuffer(strings.buffers()[1], dtype=np.int32)[strings.offset : strings.offset + len(strings) + 1]
    data = strings.buffers()[2]
    if data is None:
        return memoryview(b"")
    return memoryview(data)[int(offsets[0]) : int(offsets[-1])]


def round_significant(values: np.ndarray, digits: int) -> np.ndarray:
    """Round each finite, non-zero value to ``digits`` significant digits (NaN and infinities pass through)."""
    out = np.array(values, dtype=np.float64, copy=True)
    finite = np.isfinite(out) & (out != 0)
    if not finite.any():
        return out
    shown = out[finite]
    decimals = digits - 1 - np.floor(np.log10(np.abs(shown)))
    power = 10.0 ** np.abs(decimals)  # an exact power of ten up to 1e22
    up = decimals >= 0
    # Scale by an exact power of ten, round, scale back: the result is the double nearest the rounded decimal.
    shown[up] = np.round(shown[up] * power[up]) / power[up]
    shown[~up] = np.round(shown[~up] / power[~up]) * power[~up]
    inexact = np.abs(decimals) > 22  # beyond 1e22 a power of ten is not a double: round through the decimal text
    if inexact.any():
        shown[inexact] = np.char.mod(f"%.{digits}g", out[finite][inexact]).astype(np.float64)
    out[finite] = shown
    return out
