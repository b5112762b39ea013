"""Writing outputs: atomic replacement, no overwrite without --force, the CSV writer, formula cells neutralised."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from lapsewise.errors import InputError
from lapsewise.files.writing import (
    neutralise_formulas,
    round_significant,
    write_atomic,
    write_csv,
    write_text_atomic,
)


def _read_back(path):
    # Reference: the standard library's csv module (RFC 4180 quoting).
    with open(path, newline="", encoding="utf-8") as handle:
        return list(csv.reader(handle))


@settings(max_examples=60, deadline=None)
@given(st.lists(st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters="\x00"), max_size=12), min_size=1, max_size=20))
def test_text_survives_the_round_trip_through_the_csv_module(tmp_path_factory, texts):
    path = tmp_path_factory.mktemp("csv") / "out.csv"
    write_csv(path, pd.DataFrame({"customer_id": np.array(texts, dtype=object), "label": pd.Categorical(texts)}))
    rows = _read_back(path)
    assert rows[0] == ["customer_id", "label"]
    assert [row[0] for row in rows[1:]] == texts
    assert [row[1] for row in rows[1:]] == texts


def test_numbers_are_what_printf_g_with_six_digits_rounds_them_to(tmp_path):
    # Reference: Python's "%.6g" formatting (C printf) for the rounding; the text itself may differ in
    # form (1234570 rather than 1.23457e+06) but must parse to the same number.
    values = np.array([0.1234567891, 1234567.0, 1e-9, -2.5e-7, 123456.5, 0.0, -0.000123456789, 9.9999996, 1e300, np.nan])
    path = tmp_path / "numbers.csv"
    write_csv(path, pd.DataFrame({"value": values, "count": np.arange(len(values))}))
    rows = _read_back(path)[1:]
    for index, ((text, count), value) in enumerate(zip(rows, values)):
        if np.isnan(value):
            assert text == ""
        else:
            assert float(text) == float("%.6g" % value), (text, value)
        assert count == str(index)


def test_quoting_matches_the_csv_module_minimal_quoting(tmp_path):
    # Reference: csv.writer with QUOTE_MINIMAL writes the same bytes for text fields.
    frame = pd.DataFrame({"id": ["plain", "a,b", 'say "hi"', "two\nlines", "=SUM(A1)", ""], "flag": [True, False, True, False, True, False]})
    path = tmp_path / "quoted.csv"
    write_csv(path, frame)
    expected = io.StringIO(newline="")
    writer = csv.writer(expected, lineterminator="\n")
    writer.writerow(["id", "flag"])
    writer.writerows(zip(frame["id"], frame["flag"]))
    assert path.read_text(encoding="utf-8") == expected.getvalue()


def test_round_significant_passes_non_finite_values_through():
    out = round_significant(np.array([np.inf, -np.inf, np.nan, 0.0, 3.14159265]), 3)
    assert np.isposinf(out[0]) and np.isneginf(out[1]) and np.isnan(out[2])
    assert out[3] == 0.0 and out[4] == 3.14  # "%.3g" % 3.14159265 is "3.14"


def test_output_is_not_overwritten_without_force(tmp_path):
    target = tmp_path / "scores.csv"
    target.write_text("old", encoding="utf-8")
    with pytest.raises(InputError, match=r"scores.csv: already exists; pass --force"):
        write_text_atomic(target, "new")
    # The old content is untouched and nothing else was created.
    assert target.read_text(encoding="utf-8") == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["scores.csv"]


@pytest.mark.parametrize("exists", [False, True], ids=["new", "replaced-with-force"])
def test_output_is_written_whole_and_leaves_no_temporary_file(tmp_path, exists):
    target = tmp_path / "scores.csv"
    if exists:
        target.write_text("old", encoding="utf-8")
    write_text_atomic(target, "new\n", force=True)
    assert target.read_text(encoding="utf-8") == "new\n"
    assert [p.name for p in tmp_path.iterdir()] == ["scores.csv"]


def test_failed_write_keeps_the_old_output_and_leaves_no_temporary_file(tmp_path):
    target = tmp_path / "scores.csv"
    target.write_text("old", encoding="utf-8")

    def write_half_then_fail(path: Path) -> None:
        path.write_text("half", encoding="utf-8")
        raise OSError("disk full")

    with pytest.raises(OSError, match="disk full"):
        write_atomic(target, write_half_then_fail, force=True)
    assert target.read_text(encoding="utf-8") == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["scores.csv"]


@pytest.mark.parametrize(
    "name, message",
    [("", r"is a folder"), ("missing/scores.csv", r"the folder .*missing does not exist")],
    ids=["folder", "missing-folder"],
)
def test_output_to_a_folder_or_a_missing_folder_is_refused(tmp_path, name, message):
    with pytest.raises(InputError, match=message):
        write_text_atomic(tmp_path / name, "new", force=True)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("text", ["=SUM(A1)", "+1", "-2", "@cmd", "\tx", "\rx"])
def test_formula_cells_are_neutralised(text):
    # OWASP CSV-injection guidance: prefix cells starting with = + - @ tab or carriage return with a quote.
    frame = pd.DataFrame({"customer_id": [text, "A1"], "value_of_mailing": [-1.5, 2.0]})
    out = neutralise_formulas(frame)
    assert out.customer_id.tolist() == ["'" + text, "A1"]
    assert out.value_of_mailing.tolist() == [-1.5, 2.0]  # numbers stay numbers
