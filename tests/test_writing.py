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
from lapsewise.files.writing import round_significant, write_atomic, write_csv, write_text_atomic


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
    # Every text comes back as written, but for the quote that neutralises a formula-like cell (OWASP).
    expected = ["'" + text if text[:1] in ("=", "+", "-", "@", "\t", "\r") else text for text in texts]
    assert [row[0] for row in rows[1:]] == expected
    assert [row[1] for row in rows[1:]] == expected


def test_numbers_are_what_printf_g_with_six_digits_rounds_them_to(tmp_path):
    # Reference: Python's "%.6g" formatting (C printf) for the rounding; the text itself may differ in
    # form (1234570 rather than 1.23457e+06) but must parse to the same number.
    # 6.000740000000001e-24 and 3.14159265e-40 need more than an exact power of ten to round (beyond 1e22).
    values = np.array([0.1234567891, 1234567.0, 1e-9, -2.5e-7, 123456.5, 0.0, -0.000123456789, 9.9999996, 1e300, np.nan, 6.000740000000001e-24, 3.14159265e-40])
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
    # (A formula-like cell is compared in its neutralised form, with the quote in front.)
    frame = pd.DataFrame({"id": ["plain", "a,b", 'say "hi"', "two\nlines", "'=SUM(A1)", ""], "flag": [True, False, True, False, True, False]})
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
def test_formula_cells_are_neutralised_in_every_kind_of_text_column(tmp_path, text):
    # OWASP CSV-injection guidance: prefix cells starting with = + - @ tab or carriage return with a quote.
    frame = pd.DataFrame(
        {
            "customer_id": np.array([text, "A1"], dtype=object),
            "segment": pd.Categorical([text, "A1"]),
            "version": pd.array([text, "A1"], dtype="string[pyarrow]"),
            "value_of_mailing": [-1.5, 2.0],
        }
    )
    path = tmp_path / "out.csv"
    write_csv(path, frame)
    rows = _read_back(path)
    assert rows[1][:3] == ["'" + text] * 3 and rows[2][:3] == ["A1"] * 3
    assert [row[3] for row in rows[1:]] == ["-1.5", "2"]  # numbers stay numbers


# ---------------------------------------------------------------- no overwrite, even in a race; no temporary file left


def test_two_runs_racing_for_one_output_end_with_exactly_one_writer(demo_dir, tmp_path):
    import subprocess
    import sys

    out = tmp_path / "list.csv"
    policy = demo_dir / "policy.toml"
    command = [sys.executable, "-m", "lapsewise", "mail-list", demo_dir / "model.json", demo_dir / "orders.csv", "--policy", policy,
               "--horizon-quarters", 6, "--out", out]
    runs = [subprocess.Popen(list(map(str, command)), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True) for _ in range(2)]
    results = [(run.wait(timeout=300), run.stderr.read()) for run in runs]
    assert sorted(code for code, _ in results) == [0, 2], results
    loser = next(stderr for code, stderr in results if code == 2)
    assert "already exists" in loser and "Traceback" not in loser and len(loser.strip().splitlines()) == 1
    assert [p.name for p in tmp_path.iterdir()] == ["list.csv"]  # the winner's file, and no temporary file


def test_a_temporary_file_of_a_killed_run_is_removed_by_the_next_write(tmp_path):
    import subprocess

    child = subprocess.Popen(["true"])
    child.wait()  # a process that has ended: its id names no running process
    stale = tmp_path / f".scores.csv.lapsewise-tmp-{child.pid}-abc.tmp"
    stale.write_text("half")
    foreign = tmp_path / ".notes.tmp"  # not ours: left alone
    foreign.write_text("keep")
    write_text_atomic(tmp_path / "other.csv", "new\n")
    assert sorted(p.name for p in tmp_path.iterdir()) == [".notes.tmp", "other.csv"]


def test_sigterm_during_a_write_removes_the_temporary_file(tmp_path):
    # The command's entry point turns SIGTERM into an ordinary exit, so the writer's cleanup runs.
    import subprocess
    import sys

    script = (
        "import os, signal, sys\n"
        "from lapsewise.app.cli import _stop_on_sigterm\n"
        "from lapsewise.files.writing import write_atomic\n"
        "signal.signal(signal.SIGTERM, _stop_on_sigterm)\n"
        "def write(path):\n"
        "    path.write_text('half')\n"
        "    os.kill(os.getpid(), signal.SIGTERM)\n"
        f"write_atomic({str(tmp_path / 'out.csv')!r}, write)\n"
    )
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert done.returncode == 128 + 15, done.stderr
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda folder: (folder / "file.csv").write_text("x") and folder / "file.csv" / "out.csv", r"file.csv is a file, not a folder"),
        (lambda folder: folder / ("n" * 240 + ".csv"), r"the file name is 244 bytes long"),
    ],
    ids=["path-through-a-file", "name-too-long"],
)
def test_outputs_that_cannot_be_written_are_refused_before_any_work(tmp_path, make, message):
    from lapsewise.files.writing import check_writable

    with pytest.raises(InputError, match=message):
        check_writable(make(tmp_path), force=False)


def test_numbers_that_are_not_finite_are_refused_by_the_writers(tmp_path):
    from lapsewise.files.writing import dumps_stable, save_csv

    with pytest.raises(InputError, match="column dert would hold 1 values that are not finite"):
        save_csv(tmp_path / "scores.csv", pd.DataFrame({"dert": [1.0, np.inf], "expected_order_value": [np.nan, 2.0]}), nullable=["expected_order_value"])
    assert not (tmp_path / "scores.csv").exists()
    save_csv(tmp_path / "scores.csv", pd.DataFrame({"dert": [1.0, 2.0], "expected_order_value": [np.nan, 2.0]}), nullable=["expected_order_value"])
    assert (tmp_path / "scores.csv").read_text() == "dert,expected_order_value\n1,\n2,2\n"
    with pytest.raises(InputError, match=r"segments\[1\].value is not a finite number"):
        dumps_stable({"segments": [{"value": 1.0}, {"value": float("nan")}]})
