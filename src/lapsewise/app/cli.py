"""The command line: parse the options, call the pipeline, render the result.

A command reads its options, calls :mod:`lapsewise.app.pipeline` and hands the
result to :mod:`lapsewise.app.render` (or prints its JSON); it computes nothing itself.
"""

from __future__ import annotations

import functools
import inspect
import signal
import sys
import typing
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from lapsewise.app import pipeline, render
from lapsewise.budget.control_cell import DEFAULT_SEED
from lapsewise.budget.mail_list import decision_counts
from lapsewise.errors import InputError
from lapsewise.files.writing import check_writable, dumps_stable, save_csv, write_text_atomic

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="lapsewise: when to stop mailing lapsed customers, and how to spread a mail budget.",
    pretty_exceptions_enable=False,
)

MAX_BUDGET = 1e15  # a finite amount: no quarter's mail budget is larger, and inf or nan are refused

MailingsOption = typer.Option(None, "--mailings", help="Mailings file (CSV or Parquet): customer_id, mail_date[, version].")
AsOfOption = typer.Option(None, "--as-of", help="Last day to use (YYYY-MM-DD); default: end of the last complete quarter in the orders.")
FiscalOption = typer.Option(1, "--fiscal-year-start", help="Month (1-12) in which the first quarter of the year starts.")


def _console(json_output: bool = False) -> Console:
    return Console(no_color=json_output, highlight=False, soft_wrap=False)


_ECONOMICS_OPTIONS = (
    ("gross_margin", float, "share of order value left after cost of goods"),
    ("order_cost", float, "pick, pack and payment cost per order"),
    ("piece_cost", float, "print and postage per piece"),
    ("annual_discount_rate", float, "annual discount rate"),
    ("horizon_quarters", int, "quarters each decision looks ahead"),
    ("order_value", float, "a fixed value per order instead of the spend model"),
    ("unmailed_response", float, "rho, the share of response left without a piece"),
)


def option_group(group: str, options):
    """Give a command one option per entry of ``options`` ((name, annotation, typer option) triples);
    the command receives their values together as the dict ``group``. One definition, many commands."""

    def decorate(command):
        signature = inspect.signature(command)
        kept = [p for name, p in signature.parameters.items() if name != group]
        added = [inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=option, annotation=kind) for name, kind, option in options]

        @functools.wraps(command)
        def wrapper(*args, **kwargs):
            values = {name: kwargs.pop(name) for name, _, _ in options}
            return command(*args, **{group: values}, **kwargs)

        hints = typing.get_type_hints(command)
        hints.pop(group, None)
        hints.update({name: kind for name, kind, _ in options})
        wrapper.__annotations__ = hints
        wrapper.__signature__ = signature.replace(parameters=kept + added)
        return wrapper

    return decorate


economics_overrides = option_group(
    "overrides",
    [
        (name, Optional[kind], typer.Option(None, f"--{name.replace('_', '-')}", help=f"Override the policy economics key {name}: {text}."))
        for name, kind, text in _ECONOMICS_OPTIONS
    ],
)
column_names = option_group(
    "columns",
    [
        ("id_column", str, typer.Option("customer_id", "--id-column", help="Name of the customer id column in every input file.")),
        ("date_column", str, typer.Option("order_date", "--date-column", help="Name of the order date column in the orders file.")),
        ("amount_column", str, typer.Option("amount", "--amount-column", help="Name of the order amount column in the orders file.")),
        # How to read the orders and mailings files (see files.tables.Reading); only the encoding applies to the other files.
        ("delimiter", Optional[str], typer.Option(None, "--delimiter", help="Field delimiter of text files: , ; tab or |; default: found from the header row.")),
        ("encoding", Optional[str], typer.Option(None, "--encoding", help="Text encoding of the input files, e.g. cp1252, latin-1, utf-16; default: UTF-8.")),
        ("sheet", Optional[str], typer.Option(None, "--sheet", help="Worksheet of an Excel (.xlsx) orders or mailings file; default: the first sheet.")),
        (
            "decimal_comma",
            Optional[bool],
            typer.Option(None, "--decimal-comma/--decimal-point", help="Amounts use a decimal comma (1.234,50) or a decimal point (1,234.50); default: found from the amounts."),
        ),
        ("date_format", Optional[str], typer.Option(None, "--date-format", help="Format of the dates in strftime codes, e.g. %m/%d/%Y or %d.%m.%Y; default: ISO dates or one unambiguous format, found.")),
        # How the mailings are read against the orders (data.panel.attach_mailings).
        (
            "in_home_days",
            int,
            typer.Option(0, "--in-home-days", min=0, help="Days a piece takes to arrive: a quarter with an order counts as mailed only for a piece dated at least this many days before its first order."),
        ),
    ],
)


@app.command()
@column_names
def summary(
    orders: Path = typer.Argument(..., help="Orders file (CSV or Parquet): customer_id, order_date, amount."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    columns: dict | None = None,
) -> None:
    """Show the customer base by repeat purchases and silent quarters. Writes nothing."""
    from lapsewise.data.summary import describe_base

    panel = pipeline.read_panel(orders, mailings, as_of, fiscal_year_start, columns)
    console = _console()
    render.print_panel_summary(console, panel, describe_base(panel))
    render.print_caution(console)


@app.command()
def demo(
    folder: Path = typer.Option(Path("lapsewise-demo"), "--dir", help="Folder to write the demo files into."),
    customers: int = typer.Option(20_000, "--customers", min=100, max=1_000_000, help="Number of customers to generate."),
    quarters: int = typer.Option(24, "--quarters", min=4, max=80, help="Quarters of history to generate."),
    seed: int = typer.Option(7, "--seed", min=0, max=2**32 - 1, help="Seed of every random step (0 to 4294967295)."),
    force: bool = typer.Option(False, "--force", help="Overwrite demo files already in the folder."),
) -> None:
    """Generate the Mail-Order Garden Seeds scenario and run every step on it."""
    from lapsewise.app.demo import run_demo

    run_demo(_console(), folder, customers, quarters, seed, force)


OrdersArgument = typer.Argument(..., help="Orders file (CSV or Parquet): customer_id, order_date, amount.")
ForceOption = typer.Option(False, "--force", help="Overwrite the output file if it exists.")
JsonOption = typer.Option(False, "--json", help="Print machine-readable JSON instead of tables.")
DEFAULT_DRAWS = 20
DEFAULT_DRAW_SEED = 1
_DRAWS = ("draws", Optional[int], typer.Option(
    None, "--draws", min=0, max=1000,
    help=f"Draws of the parameters from the fit's standard errors (normal on log and logit scales); 0 uses the estimates alone. Default {DEFAULT_DRAWS} "
    "(stop-table: none when it plans on the calendar, where each draw solves that program again).",
))
_DRAW_SEED = ("draw_seed", int, typer.Option(DEFAULT_DRAW_SEED, "--seed", min=0, max=2**32 - 1, help="Seed of the parameter draws (0 to 4294967295)."))
_PLUG_IN = ("plug_in", bool, typer.Option(False, "--plug-in", help="Decide at the parameter estimates alone (no draws): faster, blind to how sure they are."))
parameter_draws = option_group("drawing", [_DRAWS, _DRAW_SEED, _PLUG_IN])
parameter_draws_seeded_by_default = option_group("drawing", [_DRAWS, _PLUG_IN])
"""For a command whose --seed means something else: the draws take the default seed (mail-list's, by default)."""


def _drawn(drawing: dict, default: int | None = DEFAULT_DRAWS) -> tuple[int | None, int]:
    """(draws, seed) from a command's draw options: none with --plug-in, ``default`` when --draws is not given; the
    default seed where the command has no --seed for them."""
    draws = default if drawing["draws"] is None else drawing["draws"]
    return (0 if drawing["plug_in"] else draws), drawing.get("draw_seed", DEFAULT_DRAW_SEED)


NoSeasonsOption = typer.Option(False, "--no-seasons", help="Fit the model without multipliers by quarter of the year.")


@app.command()
@column_names
def fit(
    orders: Path = OrdersArgument,
    out: Path = typer.Option(..., "--out", help="Model file to write (JSON)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    no_seasons: bool = NoSeasonsOption,
    columns: dict | None = None,
    force: bool = ForceOption,
    control: Optional[Path] = typer.Option(
        None, "--control", help="Control cell held in the as-of quarter (written by 'lapsewise control-cell'): estimate rho from it alone."
    ),
    json_output: bool = typer.Option(False, "--json", help="Print the model file's content (and 'control') as JSON instead of tables."),
) -> None:
    """Fit the hidden-churn and order-value models and write the model file."""
    check_writable(out, force)
    console = _console(json_output)
    with render.progress(console, 2, not json_output) as step:
        with step("Reading the files and building the quarterly panel"):
            panel = pipeline.read_panel(orders, mailings, as_of, fiscal_year_start, columns)
            counts = None if control is None else pipeline.read_control_counts(panel, control, columns, str(orders))
        with step(f"Fitting the models on {panel.customers:,} customers"):
            fitted = pipeline.fit(panel, seasons=not no_seasons)
    model = fitted.model
    reading = None if counts is None else pipeline.control_reading(counts, model)
    write_text_atomic(out, dumps_stable(model.to_dict()), force)
    if json_output:  # the model file's contents (parameters, seasons, mailing_check, rho_estimable, warnings) and the control reading
        typer.echo(dumps_stable({**model.to_dict(), "control": None if reading is None else reading.to_dict()}), nl=False)
        return
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_model(console, model, fitted.curves)
    render.print_control_reading(console, reading)
    console.print(f"Model written to {out}.")
    render.print_caution(console)


@app.command()
@column_names
def score(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    out: Path = typer.Option(..., "--out", help="Scores file to write (CSV)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = typer.Option(None, "--as-of", help="Last day to use (YYYY-MM-DD); default: the model's as-of date."),
    horizon: int = typer.Option(4, "--horizon", min=1, max=400, help="Quarters ahead for expected purchases."),
    annual_discount_rate: float = typer.Option(0.10, "--annual-discount-rate", min=0.0, max=10.0, help="Annual rate for DERT."),
    policy_file: Optional[Path] = typer.Option(
        None, "--policy", help="Policy file (TOML): also give expected orders and DERT under the stop rule's own plan."
    ),
    columns: dict | None = None,
    force: bool = ForceOption,
) -> None:
    """Write per-customer P(alive), P(order next quarter), expected orders, DERT and expected order value."""
    from lapsewise.model.fitted import load_model
    from lapsewise.model.scores import SCORE_NULLABLE, score_customers, score_totals

    check_writable(out, force)
    model = load_model(model_file)
    panel = pipeline.read_panel(orders, mailings, as_of or model.as_of, model.fiscal_year_start, columns)
    scores = score_customers(model, panel, horizon, annual_discount_rate)
    planned = None
    if policy_file is not None:
        planned = pipeline.planned_scores(model, panel, policy_file, horizon, annual_discount_rate)
        scores = scores.assign(expected_orders_planned=planned.expected_orders, dert_planned=planned.dert)
    save_csv(out, scores, force, nullable=SCORE_NULLABLE)
    console = _console()
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_scores(console, score_totals(scores), horizon, out, planned)
    render.print_caution(console)


@app.command()
@column_names
def backtest(
    orders: Path = OrdersArgument,
    holdout_quarters: int = typer.Option(..., "--holdout-quarters", help="Quarters at the end to hold out and predict."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    fiscal_year_start: int = FiscalOption,
    no_seasons: bool = NoSeasonsOption,
    columns: dict | None = None,
    json_output: bool = JsonOption,
) -> None:
    """Fit on all but the last quarters and compare predicted with actual repeat purchases."""
    from lapsewise.evaluate.backtest import run_backtest

    console = _console(json_output)
    with render.progress(console, 2, not json_output) as step:
        with step("Reading the files and building the quarterly panel"):
            panel = pipeline.read_panel(orders, mailings, as_of, fiscal_year_start, columns)
        with step("Fitting on the calibration quarters and predicting the holdout"):
            result = run_backtest(panel, holdout_quarters, seasons=not no_seasons)
    if json_output:
        data = result.to_dict()
        data["mailing_history"] = panel.mailing_history
        typer.echo(dumps_stable(data), nl=False)
        return
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_backtest(console, result)
    render.print_caution(console)


PolicyOption = typer.Option(..., "--policy", help="Policy file (TOML); see policies/.")


@app.command("stop-table")
@economics_overrides
@parameter_draws
def stop_table(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    policy_file: Path = PolicyOption,
    sensitivity: bool = typer.Option(
        False, "--sensitivity", help="Also count the stop points that move when each parameter is two standard errors lower or higher (two tables per parameter)."
    ),
    json_output: bool = JsonOption,
    overrides: dict | None = None,
    drawing: dict | None = None,
) -> None:
    """When to stop mailing a silent customer: the optimal stop point beside the breakeven rule's, with its range over draws of the parameters."""
    from lapsewise.model.fitted import load_model

    draws, seed = _drawn(drawing, default=None)
    model = load_model(model_file)
    policy = pipeline.read_policy(policy_file, overrides)
    console = _console(json_output)
    with render.progress(console, 1, not json_output) as step:
        with step("Solving the stop-rule program" + (f" at the estimates and {draws} draws of the parameters" if draws else "")):
            table = pipeline.stop_table(model, policy, draws, seed, sensitivity, default_draws=DEFAULT_DRAWS)
    if json_output:
        typer.echo(dumps_stable(render.stop_table_json(table, model)), nl=False)
        return
    if not model.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_stop_table(console, table, model)
    render.print_caution(console)


@app.command()
@economics_overrides
def simulate(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    policy_file: Path = PolicyOption,
    customers: int = typer.Option(10_000, "--customers", min=100, max=1_000_000, help="New customers to simulate."),
    quarters: Optional[int] = typer.Option(None, "--quarters", min=1, max=120, help="Quarters to simulate (default: the horizon)."),
    seed: int = typer.Option(1, "--seed", min=0, max=2**32 - 1, help="Seed of every random draw (0 to 4294967295)."),
    json_output: bool = JsonOption,
    overrides: dict | None = None,
) -> None:
    """Monte Carlo of the optimal policy against stop-after-k, breakeven and always-mail rules."""
    from lapsewise.model.fitted import load_model

    model = load_model(model_file)
    policy = pipeline.read_policy(policy_file, overrides)
    economics = policy.economics
    console = _console(json_output)
    with render.progress(console, 1, not json_output) as step:
        with step(f"Simulating {customers:,} customers under every policy"):
            result = pipeline.simulation(model, policy, customers, quarters, seed)
    if json_output:
        typer.echo(dumps_stable({**result.to_dict(), "mailing_history": model.mailing_history}), nl=False)
        return
    if not model.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_simulation(console, result, economics)
    render.print_caution(console)


def _valuing_step(draws: int) -> str:
    return "Reading the files and valuing a mailing to every customer" + (f", at the estimates and {draws} draws of the parameters" if draws else "")


RecurringOption = typer.Option(
    False, "--recurring-budget", help="The budget binds every quarter: value later pieces at piece cost plus its shadow price (re-solved until it settles)."
)
CertifyOption = typer.Option(
    False, "--certify-values",
    help="Refine the order values solved until every customer's value of mailing is proved within 1% (or 0.01) of a program solved at their own order value; slower.",
)
SuppressOption = typer.Option(None, "--suppress", help="Suppression list (customer_id column): never mailed.")
AttributesOption = typer.Option(None, "--attributes", help="Customer attributes file to cross segments with (needs --segment-column).")
SegmentColumnOption = typer.Option(None, "--segment-column", help="Column of the attributes file to cross segments with.")


@app.command()
@column_names
@economics_overrides
@parameter_draws
def plan(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    policy_file: Path = PolicyOption,
    budget: float = typer.Option(..., "--budget", min=0.0, max=MAX_BUDGET, help="Mail budget for this quarter, currency units (pieces and setup)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    suppress: Optional[Path] = SuppressOption,
    attributes: Optional[Path] = AttributesOption,
    segment_column: Optional[str] = SegmentColumnOption,
    frontier: bool = typer.Option(False, "--frontier", help="Also show expected value over a range of budgets."),
    recurring: bool = RecurringOption,
    certify: bool = CertifyOption,
    columns: dict | None = None,
    json_output: bool = JsonOption,
    overrides: dict | None = None,
    drawing: dict | None = None,
) -> None:
    """Spread a fixed mail budget across segments and versions (an integer program)."""
    console = _console(json_output)
    draws, seed = _drawn(drawing)
    with render.progress(console, 2, not json_output) as step:
        with step(_valuing_step(draws)):
            inputs = pipeline.plan_inputs(model_file, orders, policy_file, mailings, as_of, suppress, attributes, segment_column, columns, overrides, draws, seed, certify)
        with step("Solving the budget integer program"):
            result, recurring_result = pipeline.budget_plan(inputs, budget, recurring, frontier_points=10 if frontier else 0)
    panel = inputs.panel
    if json_output:
        suppression = None if inputs.suppression is None else inputs.suppression.to_dict()
        extra = {"mailing_history": panel.mailing_history, "suppression": suppression}
        extra["recurring_budget"] = None if recurring_result is None else recurring_result.to_dict()
        extra["value_precision"] = inputs.values.precision.to_dict()
        typer.echo(dumps_stable({**result.to_dict(), **extra}), nl=False)
        return
    if not panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_suppression(console, inputs.suppression)
    render.print_draw_notes(console, inputs.draws.notes() if inputs.draws else ())
    render.print_value_precision(console, inputs.values.precision)
    render.print_plan(console, result, panel, inputs.values if recurring_result is None else recurring_result.values)
    render.print_recurring_budget(console, recurring_result)
    render.print_caution(console)


@app.command("mail-list")
@column_names
@economics_overrides
@parameter_draws
def mail_list_command(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    policy_file: Path = PolicyOption,
    out: Path = typer.Option(..., "--out", help="Mail list to write (CSV)."),
    budget: Optional[float] = typer.Option(None, "--budget", min=0.0, max=MAX_BUDGET, help="Mail budget; without it everyone worth mailing is mailed."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    suppress: Optional[Path] = SuppressOption,
    attributes: Optional[Path] = AttributesOption,
    segment_column: Optional[str] = SegmentColumnOption,
    recurring: bool = RecurringOption,
    certify: bool = CertifyOption,
    columns: dict | None = None,
    force: bool = ForceOption,
    overrides: dict | None = None,
    drawing: dict | None = None,
) -> None:
    """Write this quarter's mail list: one row per customer with the decision."""
    check_writable(out, force)
    console = _console()
    draws, seed = _drawn(drawing)
    with render.progress(console, 3) as step:
        with step(_valuing_step(draws)):
            inputs = pipeline.plan_inputs(model_file, orders, policy_file, mailings, as_of, suppress, attributes, segment_column, columns, overrides, draws, seed, certify)
        with step("Solving the budget integer program"):
            result, recurring_result = pipeline.budget_plan(inputs, budget, recurring)
        with step("Writing the mail list"):
            rows = pipeline.mail_list_rows(inputs.values if recurring_result is None else recurring_result.values, result)
            save_csv(out, rows, force)
    if not inputs.panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_suppression(console, inputs.suppression)
    render.print_draw_notes(console, inputs.draws.notes() if inputs.draws else ())
    render.print_value_precision(console, inputs.values.precision)
    render.print_recurring_budget(console, recurring_result)
    render.print_mail_list(console, decision_counts(rows), result, out, int(rows["may_flip"].sum()) if "may_flip" in rows else 0)
    render.print_caution(console)


@app.command("control-cell")
@column_names
@economics_overrides
@parameter_draws_seeded_by_default
def control_cell_command(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    policy_file: Path = PolicyOption,
    precision: float = typer.Option(..., "--precision", help="95% half-width wanted on rho, above 0 and below 1 (e.g. 0.1 for +-0.1)."),
    out: Path = typer.Option(..., "--out", help="Control cell to write (CSV: customer_id, segment)."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    suppress: Optional[Path] = SuppressOption,
    attributes: Optional[Path] = AttributesOption,
    segment_column: Optional[str] = SegmentColumnOption,
    seed: int = typer.Option(DEFAULT_SEED, "--seed", min=0, max=2**32 - 1, help=f"Seed of the cell's random draw (0 to 4294967295; default {DEFAULT_SEED})."),
    columns: dict | None = None,
    json_output: bool = JsonOption,
    force: bool = ForceOption,
    overrides: dict | None = None,
    drawing: dict | None = None,
) -> None:
    """Draw a random no-mail control cell among this quarter's mailable customers, sized to estimate rho to +-PRECISION."""
    check_writable(out, force)
    pipeline.check_precision(precision)
    console = _console(json_output)
    draws, draw_seed = _drawn(drawing)
    with render.progress(console, 2, not json_output) as step:
        with step(_valuing_step(draws)):
            # The parameter draws take mail-list's default seed (--seed is the cell's), so the customers worth mailing are its.
            inputs = pipeline.plan_inputs(
                model_file, orders, policy_file, mailings, as_of, suppress, attributes, segment_column, columns, overrides, draws, draw_seed
            )
        with step("Sizing and drawing the control cell"):
            cell = pipeline.control_cell(inputs, precision, seed)
            save_csv(out, cell.rows(), force)
    if json_output:
        typer.echo(dumps_stable(cell.to_dict()), nl=False)
        return
    if not inputs.panel.mailing_history:
        console.print(render.ALL_MAILED_NOTE)
    render.print_suppression(console, inputs.suppression)
    render.print_control_cell(console, cell, out)
    render.print_caution(console)


@app.command()
@column_names
@economics_overrides
@parameter_draws
def report(
    model_file: Path = typer.Argument(..., metavar="MODEL", help="Model file written by 'lapsewise fit'."),
    orders: Path = OrdersArgument,
    policy_file: Path = PolicyOption,
    out: Path = typer.Option(..., "--out", help="Report to write (one self-contained HTML file)."),
    budget: Optional[float] = typer.Option(None, "--budget", min=0.0, max=MAX_BUDGET, help="Mail budget to mark on the frontier; without it everyone worth mailing is mailed."),
    mailings: Optional[Path] = MailingsOption,
    as_of: Optional[str] = AsOfOption,
    suppress: Optional[Path] = SuppressOption,
    columns: dict | None = None,
    force: bool = ForceOption,
    overrides: dict | None = None,
    drawing: dict | None = None,
) -> None:
    """Write an HTML report with a figure per result: base, lapse curve, stop table, budget frontier, backtest, policies."""
    from lapsewise.app import report as report_page

    check_writable(out, force)
    console = _console()
    draws, seed = _drawn(drawing)
    with render.progress(console, 2) as step:
        with step("Valuing every customer" + (f" (at {draws} draws of the parameters)" if draws else "") + ", solving the stop table and plan, backtesting and simulating"):
            results = report_page.collect(model_file, orders, policy_file, budget, mailings, as_of, suppress, columns, overrides, draws, seed)
        with step("Drawing the figures"):
            write_text_atomic(out, report_page.report_html(results), force)
    console.print(f"Report written to {out}.")
    render.print_caution(console)


def _stop_on_sigterm(signum, frame) -> None:
    """SIGTERM ends the run the way Ctrl-C does, so that temporary files are removed on the way out."""
    raise SystemExit(128 + signum)


def main() -> None:
    """Entry point: run the app, turning input problems into one line and exit code 2."""
    signal.signal(signal.SIGTERM, _stop_on_sigterm)
    try:
        app(standalone_mode=False)
    except InputError as exc:
        _one_line_error(str(exc))
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        Console(stderr=True).print("aborted", markup=False)
        sys.exit(1)
    except KeyboardInterrupt:
        sys.exit(130)
    except Exception as exc:
        if hasattr(exc, "format_message") and hasattr(exc, "exit_code"):  # a usage error from the option parser
            if type(exc).__name__ == "NoArgsIsHelpError":  # a command given without its arguments: show its help
                exc.show()
                sys.exit(exc.exit_code)
            context = getattr(exc, "ctx", None)
            command = context.command_path if context is not None else "lapsewise"
            _one_line_error(f"{exc.format_message()} (see '{command} --help')")
        raise


def _one_line_error(message: str) -> None:
    """Print ``error: message`` as one line on stderr, whatever it quotes from a file, and exit with code 2."""
    # Line breaks and other control characters are escaped.
    message = "".join(c if c.isprintable() else repr(c)[1:-1] for c in message)
    Console(stderr=True, highlight=False, soft_wrap=True).print(f"error: {message}", markup=False, emoji=False)
    sys.exit(2)
