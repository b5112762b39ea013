"""The command line: parse options, call the stages, render. No arithmetic lives here."""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from lapsewise import render
from lapsewise.errors import InputError
from lapsewise.output import dumps_stable

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="lapsewise: when to stop mailing lapsed customers, and how to spread a mail budget.",
    pretty_exceptions_enable=False,
)

MailingsOption = typer.Option(None, "--mailings", help="Mailings file (CSV or Parquet): customer_id, mail_date[, version].")
AsOfOption = typer.Option(None, "--as-of", help="Last day to use (YYYY-MM-DD); default: end of the last complete quarter in the orders.")
FiscalOption = typer.Option(1, "--fiscal-year-start", help="Month (1-12) in which the first quarter of the year starts.")
IdOption = typer.Option("customer_id", "--id-column", help="Name of the customer id column in every input file.")
DateOption = typer.Option("order_date", "--date-column", help="Name of the order date column in the orders file.")
AmountOption = typer.Option("amount", "--amount-column", help="Name of the order amount column in the orders file.")


def _console(json_output: bool = False) -> Console:
    return Console(no_color=json_output, highlight=False, soft_wrap=False)


@app.command()
def summary(
    orders: Path = typer.Argument(..., help="Orders file (CSV or Parquet): customer_id, order_date, amount."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    id_column: str = IdOption,
    date_column: str = DateOption,
    amount_column: str = AmountOption,
) -> None:
    """Show the customer base by repeat purchases and silent quarters. Writes nothing."""
    from lapsewise.panel import panel_from_files

    panel = panel_from_files(str(orders), str(mailings) if mailings else None, as_of, fiscal_year_start, id_column, date_column, amount_column)
    console = _console()
    render.print_panel_summary(console, panel)
    render.print_caution(console)


@app.command()
def demo(
    folder: Path = typer.Option(Path("lapsewise-demo"), "--dir", help="Folder to write the demo files into."),
    customers: int = typer.Option(20_000, "--customers", min=100, help="Number of customers to generate."),
    quarters: int = typer.Option(24, "--quarters", min=4, max=200, help="Quarters of history to generate."),
    seed: int = typer.Option(7, "--seed", help="Seed of every random step."),
    force: bool = typer.Option(False, "--force", help="Overwrite demo files already in the folder."),
) -> None:
    """Generate the Mail-Order Garden Seeds scenario and run every step on it."""
    from lapsewise.demo import run_demo

    run_demo(_console(), folder, customers, quarters, seed, force)


def main() -> None:
    """Entry point: run the app, turning input problems into one line and exit code 2."""
    try:
        app(standalone_mode=False)
    except InputError as exc:
        Console(stderr=True, highlight=False, soft_wrap=True).print(f"error: {exc}", markup=False)
        sys.exit(2)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        Console(stderr=True).print("aborted", markup=False)
        sys.exit(1)
    except KeyboardInterrupt:
        sys.exit(130)
    except Exception as exc:
        # Usage errors from the option parser know how to show themselves (exit code 2).
        if hasattr(exc, "show") and hasattr(exc, "exit_code"):
            exc.show()
            sys.exit(exc.exit_code)
        raise
