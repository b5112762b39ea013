"""The CSV writer: what Python's csv module reads back, numbers as printf's %g rounds them."""

import csv
import io

import numpy as np
import pandas as pd
from hypothesis import given, settings, strategies as st

from lapsewise.output import round_significant, write_csv


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
