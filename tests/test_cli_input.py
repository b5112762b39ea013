"""Bad input through the command line: exit code 2, one line on stderr naming the file, never a traceback.

Also the output helper: no overwrite without --force, no temporary file left behind.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from hypothesis import given

from conftest import (
    ANY_FILE,
    ANY_FILE_SETTINGS,
    BAD_INPUTS,
    GOOD_ORDERS,
    assert_one_error_line,
    file_holding,
    orders_text,
    run_cli,
    run_cli_process,
)
from lapsewise.errors import InputError
from lapsewise.output import write_atomic, write_text_atomic


def test_clean_file_summary_succeeds(write_file):
    result = run_cli("summary", write_file("orders.csv", GOOD_ORDERS))
    # GOOD_ORDERS has two customers, A1 and B2, both starting in January-March 2023.
    assert (result.code, result.stderr) == (0, "")
    assert "2 customers" in result.stdout


def test_bad_input_exits_2_with_one_line(bad_input, tmp_path):
    """Each fatal case (see conftest.BAD_INPUTS): exit 2, one 'error:' line naming the file, row or column."""
    orders, mailings = bad_input.make(tmp_path)
    assert_one_error_line(run_cli(*bad_input.cli_args(orders, mailings)), *bad_input.expected(orders, mailings))


@pytest.mark.parametrize("case", ["missing-file", "non-numeric-amount", "binary-garbage"])
def test_bad_input_in_a_real_process_prints_no_traceback(tmp_path, case):
    """The installed entry point, run as its own process, behaves as the in-process runs above."""
    bad = next(b for b in BAD_INPUTS if b.id == case)
    orders, mailings = bad.make(tmp_path)
    assert_one_error_line(run_cli_process(*bad.cli_args(orders, mailings)), *bad.expected(orders, mailings))


@pytest.mark.parametrize(
    "old, new, option",
    [("customer_id", "client", "--id-column"), ("order_date", "date", "--date-column"), ("amount", "value", "--amount-column")],
)
def test_column_options_fix_a_misnamed_column(write_file, old, new, option):
    path = write_file("orders.csv", GOOD_ORDERS.replace(old, new, 1))
    # Without the option the column is missing (exit 2); with it the file reads as GOOD_ORDERS does.
    assert_one_error_line(run_cli("summary", path), str(path), f"'{old}'", option)
    result = run_cli("summary", path, option, new)
    assert result.code == 0, result.stderr
    assert "2 customers" in result.stdout


def test_id_column_option_renames_the_mailings_id_too(write_file):
    orders = write_file("orders.csv", GOOD_ORDERS.replace("customer_id", "client", 1))
    mailings = write_file("mailings.csv", "client,mail_date\nA1,2023-04-10\n")
    result = run_cli("summary", orders, "--mailings", mailings, "--id-column", "client")
    assert result.code == 0, result.stderr


def test_line_break_inside_a_quoted_cell_stays_on_one_line(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", 'B2,2023-02-01,"12\n50"'))
    # The quoted amount holds a line break; the message shows it escaped as \n.
    line = assert_one_error_line(run_cli("summary", path), str(path), "row 3", "column amount")
    assert "'12\\n50'" in line


def test_orders_in_one_incomplete_quarter_name_the_file(write_file):
    path = write_file("orders.csv", orders_text("A1,2023-01-15,10", "B2,2023-02-01,5"))
    # Both orders fall in January-March 2023, which the last order (2023-02-01) does not complete.
    assert_one_error_line(run_cli("summary", path), str(path), "--as-of 2023-03-31")
    assert run_cli("summary", path, "--as-of", "2023-03-31").code == 0


@pytest.mark.parametrize(
    "options, fragments",
    [
        (["--fiscal-year-start", "13"], ["--fiscal-year-start", "13 is not a month"]),
        # Past the last year datetime64[ns] holds; the panel would otherwise fail on an impossible date.
        (["--as-of", "9999-12-31"], ["--as-of 9999-12-31"]),
        # A date with a time is not a YYYY-MM-DD date.
        (["--as-of", "2023-06-30T12:00"], ["--as-of", "YYYY-MM-DD"]),
    ],
    ids=["fiscal-year-start", "as-of-far-ahead", "as-of-with-time"],
)
def test_bad_options_exit_2_with_one_line(write_file, options, fragments):
    assert_one_error_line(run_cli("summary", write_file("orders.csv", GOOD_ORDERS), *options), *fragments)


# ---------------------------------------------------------------- any file at all


@ANY_FILE_SETTINGS
@given(content=ANY_FILE)
def test_summary_command_succeeds_or_exits_2_on_any_file(content):
    """Whatever the bytes: exit 0, or exit 2 with one 'error:' line naming the file; never a traceback."""
    with file_holding(content) as path:
        result = run_cli("summary", path)
    if result.code == 0:
        assert "customers" in result.stdout
        assert result.stderr == ""
    else:
        assert_one_error_line(result, str(path))


# ---------------------------------------------------------------- the output helper


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
