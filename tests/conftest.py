"""Shared helpers for the loader, panel and bad-input tests: writing small files and running the CLI.

Every file here is invented: ids like "A1", made-up dates and amounts.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import io
import subprocess
import sys
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
import pytest
from hypothesis import HealthCheck, settings
from hypothesis import strategies as st

from lapsewise.app.cli import main
from lapsewise.data.panel import build_panel
from lapsewise.data.quarters import parse_as_of
from lapsewise.files.inputs import load_mailings, load_orders

ORDERS_HEADER = "customer_id,order_date,amount"
MAILINGS_HEADER = "customer_id,mail_date"


def csv_text(header: str, *rows: str) -> str:
    """A CSV file's text: the header line, then one line per row, each ending in a newline."""
    return "".join(line + "\n" for line in (header, *rows))


def orders_text(*rows: str) -> str:
    """An orders file with the standard header and the given ``customer_id,order_date,amount`` rows."""
    return csv_text(ORDERS_HEADER, *rows)


def mailings_text(*rows: str) -> str:
    """A mailings file with the standard header and the given ``customer_id,mail_date`` rows."""
    return csv_text(MAILINGS_HEADER, *rows)


WriteFile = Callable[[str, "str | bytes"], Path]


@pytest.fixture
def write_file(tmp_path: Path) -> WriteFile:
    """Write text (as UTF-8, newlines kept as given) or bytes to ``tmp_path / name`` and return the path."""

    def write(name: str, content: str | bytes) -> Path:
        path = tmp_path / name
        path.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
        return path

    return write


def repair_count(counts: dict[str, int], fragment: str) -> int:
    """The count of the one repair whose description contains ``fragment`` (0 when there is none)."""
    matches = [count for what, count in counts.items() if fragment in what]
    assert len(matches) <= 1, f"several repairs mention {fragment!r}: {counts}"
    return matches[0] if matches else 0


# ---------------------------------------------------------------- running the command line


@dataclass(frozen=True)
class CliResult:
    code: int
    stdout: str
    stderr: str


def run_cli(*args: str | Path) -> CliResult:
    """Run ``lapsewise ARGS`` in this process through the real entry point, capturing its output and exit code.

    Any exception other than SystemExit propagates, so a traceback fails the calling test.
    """
    stdout, stderr = io.StringIO(), io.StringIO()
    argv = ["lapsewise", *map(str, args)]
    code = 0
    with contextlib.ExitStack() as stack:
        stack.enter_context(contextlib.redirect_stdout(stdout))
        stack.enter_context(contextlib.redirect_stderr(stderr))
        saved_argv, sys.argv = sys.argv, argv
        stack.callback(setattr, sys, "argv", saved_argv)
        try:
            main()
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    return CliResult(code, stdout.getvalue(), stderr.getvalue())


def run_cli_process(*args: str | Path) -> CliResult:
    """Run ``python -m lapsewise ARGS`` as its own process."""
    done = subprocess.run(
        [sys.executable, "-m", "lapsewise", *map(str, args)], capture_output=True, text=True, timeout=120
    )
    return CliResult(done.returncode, done.stdout, done.stderr)


def assert_one_error_line(result: CliResult, *fragments: str) -> str:
    """Exit code 2, exactly one line on stderr starting 'error:' that contains every fragment, no traceback."""
    assert result.code == 2, result
    assert "Traceback" not in result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("error:"), lines[0]
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


# ---------------------------------------------------------------- the fatal bad-input cases

DIRECTORY = object()  # an ``orders`` value meaning: make a folder where the file should be
MISSING = object()  # an ``orders`` value meaning: write nothing


@dataclass(frozen=True)
class BadInput:
    """A fatal input problem: the files, the command-line options, and what the one-line message must say.

    ``named`` is the file the message must name: "orders", "mailings", or None when the problem is
    an option (the message then names the option through ``fragments``).
    """

    id: str
    orders: object
    fragments: tuple[str, ...]
    options: tuple[str, ...] = ()
    mailings: str | None = None
    named: str | None = "orders"

    def make(self, folder: Path) -> tuple[Path, Path | None]:
        """Create the case's files in ``folder``; return the orders and mailings paths."""
        orders = folder / "orders.csv"
        if self.orders is DIRECTORY:
            orders.mkdir()
        elif self.orders is not MISSING:
            orders.write_bytes(self.orders if isinstance(self.orders, bytes) else str(self.orders).encode("utf-8"))
        mailings = None
        if self.mailings is not None:
            mailings = folder / "mailings.csv"
            mailings.write_text(self.mailings, encoding="utf-8")
        return orders, mailings

    def cli_args(self, orders: Path, mailings: Path | None) -> list[str]:
        return ["summary", str(orders), *self.options] + (["--mailings", str(mailings)] if mailings else [])

    def library_kwargs(self) -> dict[str, str]:
        """The ``panel_from_files`` keyword arguments that match the command-line options."""
        pairs = zip(self.options[::2], self.options[1::2])
        return {option.lstrip("-").replace("-", "_"): value for option, value in pairs}

    def expected(self, orders: Path, mailings: Path | None) -> tuple[str, ...]:
        named = {"orders": (str(orders),), "mailings": (str(mailings),), None: ()}[self.named]
        return named + self.fragments


GOOD_ORDERS = orders_text("A1,2023-01-15,10.00", "B2,2023-02-01,25.50", "A1,2023-05-02,12.00")

BAD_INPUTS = [
    BadInput("missing-file", MISSING, ("not found",)),
    BadInput("folder-not-file", DIRECTORY, ("folder",)),
    BadInput("empty-file", b"", ("empty",)),
    BadInput("header-only", orders_text(), ("no data rows",)),
    # The amount column is absent altogether; the message names it and the option that renames it.
    BadInput("missing-column", csv_text("customer_id,order_date", "A1,2023-01-15"), ("'amount'", "--amount-column")),
    BadInput("misnamed-id-column", GOOD_ORDERS.replace("customer_id", "client", 1), ("'customer_id'", "--id-column")),
    BadInput("misnamed-date-column", GOOD_ORDERS.replace("order_date", "date", 1), ("'order_date'", "--date-column")),
    BadInput("misnamed-amount-column", GOOD_ORDERS.replace("amount", "value", 1), ("'amount'", "--amount-column")),
    # The bad date is on the second data line, which a spreadsheet shows as row 3 (the header is row 1).
    # 15/13/2023 fits neither day-first (month 13) nor month-first (month 15); 15/01/2023 alone is now
    # read as a day-first date, so it no longer serves here.
    BadInput(
        "unparseable-date",
        orders_text("A1,2023-01-15,10", "B2,15/13/2023,5"),
        ("row 3", "column order_date", "'15/13/2023'", "--date-format"),
    ),
    # 03/04/2023 and 05/06/2023 are valid both day-first and month-first, and no date settles it.
    BadInput(
        "ambiguous-dates",
        orders_text("A1,03/04/2023,10", "B2,05/06/2023,5"),
        ("column order_date", "'03/04/2023'", "day-first", "month-first", "--date-format"),
    ),
    # 1,250 and 2,500 are 1250 with a thousands separator or 1.25 with a decimal comma; nothing says which.
    BadInput(
        "ambiguous-decimal-mark",
        orders_text('A1,2023-01-15,"1,250"', 'B2,2023-02-01,"2,500"'),
        ("row 2", "column amount", "'1,250'", "--decimal-comma", "--decimal-point"),
    ),
    # 12.50 has a decimal point and 7,25 a decimal comma: two conventions in one column.
    BadInput(
        "mixed-decimal-marks",
        orders_text("A1,2023-01-15,12.50", 'B2,2023-02-01,"7,25"'),
        ("column amount", "'12.50'", "'7,25'", "--decimal-comma"),
    ),
    # The option says the dates are day.month.year; 2023-01-15 is not.
    BadInput(
        "date-format-not-matched",
        GOOD_ORDERS,
        ("row 2", "column order_date", "'2023-01-15'", "--date-format %d.%m.%Y"),
        options=("--date-format", "%d.%m.%Y"),
    ),
    # The third data line is row 4.
    BadInput(
        "non-numeric-amount",
        orders_text("A1,2023-01-15,10", "B2,2023-02-01,5", "C3,2023-03-01,abc"),
        ("row 4", "column amount", "'abc'"),
    ),
    # A semicolon-delimited file is read now; one whose header is cut by a delimiter the option forces is not.
    BadInput("wrong-delimiter-option", GOOD_ORDERS.replace(",", ";"), ("semicolon", "--delimiter"), options=("--delimiter", "tab")),
    BadInput("binary-garbage", b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR\x00\x01\xff\xfe", ("binary",)),
    # The o-umlaut is byte F6 in latin-1 and cp1252; the message names the likely encoding and the option.
    BadInput("not-utf8", GOOD_ORDERS.replace("B2", "Bj\u00f6rn").encode("latin-1"), ("not UTF-8", "--encoding cp1252")),
    BadInput("invalid-as-of", GOOD_ORDERS, ("--as-of", "'2023-02-30'"), options=("--as-of", "2023-02-30"), named=None),
    # The first order is on 2023-01-15, so an as-of of 2022-12-31 comes before it.
    BadInput("as-of-before-first-order", GOOD_ORDERS, ("--as-of 2022-12-31", "2023-01-15"), options=("--as-of", "2022-12-31")),
    BadInput(
        "mailings-without-mail-date",
        GOOD_ORDERS,
        ("'mail_date'",),
        mailings=csv_text("customer_id,sent_on", "A1,2023-02-01"),
        named="mailings",
    ),
]


@pytest.fixture(params=BAD_INPUTS, ids=[case.id for case in BAD_INPUTS])
def bad_input(request: pytest.FixtureRequest) -> BadInput:
    """Each fatal bad-input case in turn."""
    return request.param


# ---------------------------------------------------------------- any file at all, for hypothesis

STANDARD_HEADER = ["customer_id", "order_date", "amount"]
HEADER_NAMES = STANDARD_HEADER + [" amount ", "customer id", "", "Betr\u00e4g", "x"]
VALID_IDS = st.sampled_from(["A1", "B2", "C3", " C3 ", "\u00c91"])
ODD_IDS = st.one_of(st.sampled_from(["", "null", "   "]), st.text(max_size=8))
VALID_DATES = st.one_of(
    st.dates(min_value=dt.date(2020, 1, 1), max_value=dt.date(2024, 12, 31)).map(str),
    st.datetimes(min_value=dt.datetime(2020, 1, 1), max_value=dt.datetime(2024, 12, 31)).map(dt.datetime.isoformat),
)
ODD_DATES = st.one_of(
    st.dates(min_value=dt.date(1, 1, 1), max_value=dt.date(9999, 12, 31)).map(str),
    st.sampled_from(["", "2023-02-30", "31/12/2023", "2023-13-01", "2023-01-01T10:00+05:00", "2023-06-01Z", "2023"]),
    st.text(max_size=10),
)
VALID_AMOUNTS = st.decimals(min_value=-100, max_value=1000, places=2).map(str)
ODD_AMOUNTS = st.one_of(
    st.floats().map(repr),
    st.integers(min_value=-(10**40), max_value=10**40).map(str),
    st.sampled_from(["", "abc", "1,000", "$5", "1e400", "-0", "nan", "inf", " 7 ", "-1e308", "1e308"]),
    st.text(max_size=8),
)


@st.composite
def csvish_files(draw) -> bytes:
    """Text that looks more or less like an orders file.

    Half the files are nearly tidy (standard header, commas, three fields a row, mostly valid cells) so
    that the panel is reached often; the other half vary the header, delimiter, quoting, row widths,
    encoding and line ends freely.
    """
    tidy = draw(st.booleans())
    share_valid = 8 if tidy else 5  # out of 10 cells

    def pick(valid, odd) -> str:
        return draw(valid) if draw(st.integers(min_value=0, max_value=9)) < share_valid else draw(odd)

    def cell(value: str) -> str:
        style = "plain" if tidy else draw(st.sampled_from(["plain", "plain", "quoted", "half-quoted"]))
        if style == "quoted":
            return '"' + value.replace('"', '""') + '"'
        return '"' + value if style == "half-quoted" else value

    delimiter = "," if tidy else draw(st.sampled_from([",", ",", ";", "\t", "|"]))
    header = STANDARD_HEADER if tidy else draw(st.one_of(st.just(STANDARD_HEADER), st.lists(st.sampled_from(HEADER_NAMES), max_size=5)))

    def row() -> str:
        cells = [pick(VALID_IDS, ODD_IDS), pick(VALID_DATES, ODD_DATES), pick(VALID_AMOUNTS, ODD_AMOUNTS)]
        if not tidy:
            cells = (cells + draw(st.lists(st.text(max_size=4), max_size=2)))[: draw(st.integers(min_value=0, max_value=5))]
        return delimiter.join(cell(c) for c in cells)

    newline = draw(st.sampled_from(["\n", "\r\n"] if tidy else ["\n", "\r\n", "\r"]))
    lines = [delimiter.join(header)] + [row() for _ in range(draw(st.integers(min_value=0, max_value=8)))]
    text = newline.join(lines) + draw(st.sampled_from(["", newline]))
    bom = draw(st.sampled_from([b"", b"\xef\xbb\xbf"]))
    if tidy:
        return bom + text.encode("utf-8")
    encoded = text.encode(draw(st.sampled_from(["utf-8", "utf-8", "latin-1"])), errors="replace")
    return bom + encoded + draw(st.sampled_from([b"", b"", b"", b"\x00", b"\xff\xfe"]))


ANY_FILE = st.one_of(st.binary(max_size=300), st.binary(max_size=100).map(lambda b: b"PAR1" + b), csvish_files())

# Enough examples to reach every loader branch many times, few enough to keep each such test near a second.
ANY_FILE_SETTINGS = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@contextlib.contextmanager
def file_holding(content: bytes) -> Iterator[Path]:
    """A file named orders.csv holding ``content``, in a temporary folder removed afterwards.

    (Hypothesis tests cannot use the function-scoped ``tmp_path`` fixture across examples.)
    """
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "orders.csv"
        path.write_bytes(content)
        yield path


# ---------------------------------------------------------------- panels from small hand-made files


@pytest.fixture
def make_panel(write_file):
    """Build a panel from order rows (and mailing rows, when given) written as CSV files."""

    def make(orders, mailings=None, as_of=None, fiscal_year_start=1):
        loaded = load_orders(write_file("orders.csv", orders_text(*orders)))
        mailed = load_mailings(write_file("mailings.csv", mailings_text(*mailings))) if mailings is not None else None
        return build_panel(loaded, mailed, parse_as_of(as_of), fiscal_year_start)

    return make


def row_of(panel, customer_id: str) -> int:
    return int(np.flatnonzero(panel.customer_ids == customer_id)[0])


Q1_2023 = 8092  # January-March 2023, see the module docstring

THREE_CUSTOMERS = [
    "A1,2023-01-10,50",
    "A1,2023-04-05,30",
    "A1,2023-10-20,10",
    "B2,2023-04-02,40",
    "C3,2023-01-31,12",
    "C3,2023-07-01,8",
]


# ---------------------------------------------------------------- the demo scenario, generated once per session


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory) -> Path:
    """A small demo scenario's folder (3,000 customers, 16 quarters, seed 3), written by the installed command."""
    from builders import run

    folder = tmp_path_factory.mktemp("demo")
    result = run("demo", "--dir", folder, "--customers", 3000, "--quarters", 16, "--seed", 3)
    assert result.returncode == 0, result.stderr
    return folder
