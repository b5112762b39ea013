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


def _panel(orders: Path, mailings: Optional[Path], as_of: Optional[str], fiscal_year_start: int, id_column: str, date_column: str, amount_column: str):
    from lapsewise.panel import panel_from_files

    return panel_from_files(str(orders), str(mailings) if mailings else None, as_of, fiscal_year_start, id_column, date_column, amount_column)


OrdersArgument = typer.Argument(..., help="Orders file (CSV or Parquet): customer_id, order_date, amount.")
ForceOption = typer.Option(False, "--force", help="Overwrite the output file if it exists.")
JsonOption = typer.Option(False, "--json", help="Print machine-readable JSON instead of tables.")


@app.command()
def fit(
    orders: Path = OrdersArgument,
    out: Path = typer.Option(..., "--out", help="Model file to write (JSON)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    id_column: str = IdOption,
    date_column: str = DateOption,
    amount_column: str = AmountOption,
    force: bool = ForceOption,
) -> None:
    """Fit the hidden-churn and order-value models and write the model file."""
    from lapsewise.model import fit_model, return_curves
    from lapsewise.output import check_writable, write_text_atomic

    check_writable(out, force)
    panel = _panel(orders, mailings, as_of, fiscal_year_start, id_column, date_column, amount_column)
    model = fit_model(panel)
    write_text_atomic(out, dumps_stable(model.to_dict()), force)
    console = _console()
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_model(console, model, return_curves(model, panel))
    console.print(f"Model written to {out}.")
    render.print_caution(console)


@app.command()
def score(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    out: Path = typer.Option(..., "--out", help="Scores file to write (CSV)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = typer.Option(None, "--as-of", help="Last day to use (YYYY-MM-DD); default: the model's as-of date."),
    horizon: int = typer.Option(4, "--horizon", min=1, max=400, help="Quarters ahead for expected purchases."),
    annual_discount_rate: float = typer.Option(0.10, "--annual-discount-rate", min=0.0, max=10.0, help="Annual rate for DERT."),
    id_column: str = IdOption,
    date_column: str = DateOption,
    amount_column: str = AmountOption,
    force: bool = ForceOption,
) -> None:
    """Write per-customer P(alive), P(order next quarter), expected purchases, DERT and expected order value."""
    from lapsewise.model import load_model, score_customers
    from lapsewise.output import check_writable, write_atomic

    check_writable(out, force)
    model = load_model(model_file)
    panel = _panel(orders, mailings, as_of or model.as_of, model.fiscal_year_start, id_column, date_column, amount_column)
    scores = score_customers(model, panel, horizon, annual_discount_rate)
    write_atomic(out, lambda p: scores.to_csv(p, index=False, float_format="%.6g"), force)
    console = _console()
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_scores(console, scores, horizon, out)
    render.print_caution(console)


@app.command()
def backtest(
    orders: Path = OrdersArgument,
    holdout_quarters: int = typer.Option(..., "--holdout-quarters", help="Quarters at the end to hold out and predict."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    id_column: str = IdOption,
    date_column: str = DateOption,
    amount_column: str = AmountOption,
    json_output: bool = JsonOption,
) -> None:
    """Fit on all but the last quarters and compare predicted with actual repeat purchases."""
    from lapsewise.backtest import run_backtest

    panel = _panel(orders, mailings, as_of, fiscal_year_start, id_column, date_column, amount_column)
    result = run_backtest(panel, holdout_quarters)
    if json_output:
        data = result.to_dict()
        data["mailing_history"] = panel.mailing_history
        typer.echo(dumps_stable(data), nl=False)
        return
    console = _console()
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_backtest(console, result)
    render.print_caution(console)


def main() -> None:
    """Entry point: run the app, turning input problems into one line and exit code 2."""
    try:
        app(standalone_mode=False)
    except InputError as exc:
        # One line, whatever the message quotes from the file: line breaks and other control characters are escaped.
        message = "".join(c if c.isprintable() else repr(c)[1:-1] for c in str(exc))
        Console(stderr=True, highlight=False, soft_wrap=True).print(f"error: {message}", markup=False, emoji=False)
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
