"""The demo: generate the Mail-Order Garden Seeds scenario, write its files, and run every step of the tool on it.

The scenario's data come from :mod:`lapsewise.evaluate.scenario`; every step
runs through :mod:`lapsewise.app.pipeline`, as the commands do. The demo's
policy is ``demo-policy.toml`` beside this module, a copy of
``policies/full-catalog.toml`` (a test keeps the two identical), written into
the demo folder so that the commands can be tried on the same files.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

import pandas as pd
from rich.console import Console

from lapsewise.app import pipeline, render, report
from lapsewise.budget.mail_list import decision_counts
from lapsewise.data.summary import describe_base
from lapsewise.errors import InputError
from lapsewise.evaluate.backtest import run_backtest
from lapsewise.evaluate.scenario import SCENARIO_NAME, DemoData, compare_with_truth, simulate_base
from lapsewise.files.writing import check_writable, dumps_stable, save_csv, write_text_atomic
from lapsewise.model.uncertainty import model_draws

DEMO_BUDGET = 3000.0
SIMULATED_CUSTOMERS = 10_000


def demo_policy_text() -> str:
    """The demo's policy file (a copy of policies/full-catalog.toml)."""
    return resources.files("lapsewise.app").joinpath("demo-policy.toml").read_text(encoding="utf-8")


def write_demo_files(folder: Path, data: DemoData, force: bool) -> dict[str, Path]:
    """Write the scenario's orders, mailings, true settings and policy into ``folder`` (atomically)."""
    if folder.exists() and not folder.is_dir():
        raise InputError(f"{folder}: exists and is not a folder; choose another --dir")
    folder.mkdir(parents=True, exist_ok=True)
    paths = {
        "orders": folder / "orders.csv",
        "mailings": folder / "mailings.csv",
        "truth": folder / "truth.json",
        "policy": folder / "policy.toml",
        "model": folder / "model.json",
        "mail_list": folder / "mail-list.csv",
        "report": folder / "report.html",
    }
    for path in paths.values():
        check_writable(path, force)  # every output of the demo, before anything is written
    save_csv(paths["orders"], data.orders, force, significant=15)
    mailings = data.mailings.assign(mail_date=pd.to_datetime(data.mailings["mail_date"]).dt.strftime("%Y-%m-%d"))
    save_csv(paths["mailings"], mailings, force)
    truth = {"scenario": SCENARIO_NAME, "as_of": str(data.as_of), **data.truth.as_dict()}
    write_text_atomic(paths["truth"], dumps_stable(truth), force)
    write_text_atomic(paths["policy"], demo_policy_text(), force)
    return paths


DEMO_DRAWS = 10
"""Draws of the parameters behind the demo's plan and mail list (the commands default to more; fewer keep the demo quick)."""


def run_demo(console: Console, folder: Path, customers: int, quarters: int, seed: int, force: bool) -> None:
    """Generate the scenario, write its files, and run every step of the tool on them."""
    data = simulate_base(customers, quarters, seed)
    paths = write_demo_files(folder, data, force)
    console.rule(f"[bold]{SCENARIO_NAME}[/bold] (invented demo scenario)")
    console.print(
        f"Wrote {len(data.orders):,} order rows to {paths['orders']} and {len(data.mailings):,} mailing rows to "
        f"{paths['mailings']} ({customers:,} customers over {quarters} quarters, seed {seed})."
    )
    panel = pipeline.read_panel(paths["orders"], paths["mailings"], str(data.as_of), 1)
    console.rule("The customer base")
    base = describe_base(panel)
    render.print_panel_summary(console, panel, base)

    console.rule("The fitted model")
    fitted = pipeline.fit(panel)
    model = fitted.model
    write_text_atomic(paths["model"], dumps_stable(model.to_dict()), force)
    render.print_model(console, model, fitted.curves)
    render.print_truth_comparison(console, compare_with_truth(model, data.truth))
    console.print(f"Model written to {paths['model']}.")

    holdout = report.holdout_quarters(quarters)  # a short demo history keeps enough calibration quarters
    console.rule(f"Backtest: the last {holdout} quarters held out")
    backtest = run_backtest(panel, holdout)
    render.print_backtest(console, backtest)

    # A history so short that the lapse rule mailed everyone every quarter leaves rho unestimated; the demo knows the truth.
    unmailed = None if model.rho_estimable else {"unmailed_response": data.truth.rho}
    policy = pipeline.read_policy(paths["policy"], unmailed)
    if unmailed:
        console.print(f"Every quarter was mailed, so the demo plans with the scenario's true rho, unmailed_response = {data.truth.rho:g}.")
    console.rule(f"When to stop mailing: the stop table (policy: {paths['policy']})")
    stop_table = pipeline.stop_table(model, policy)
    render.print_stop_table(console, stop_table, model)

    console.rule("The stop rule against rules of thumb: simulation")
    simulation = pipeline.simulation(model, policy, SIMULATED_CUSTOMERS, None, seed)
    render.print_simulation(console, simulation, policy.economics)

    console.rule(f"This quarter's plan at a sample budget of {DEMO_BUDGET:,.0f}")
    values = pipeline.value_customers(model, panel, policy, draws=model_draws(model, DEMO_DRAWS, seed))
    plan = pipeline.plan(values, policy, DEMO_BUDGET, report.FRONTIER_POINTS)
    render.print_value_precision(console, values.precision)
    render.print_plan(console, plan, panel, values)
    rows = pipeline.mail_list_rows(values, plan)
    save_csv(paths["mail_list"], rows, force)
    render.print_mail_list(console, decision_counts(rows), plan, paths["mail_list"], int(rows["may_flip"].sum()))

    results = report.ReportResults(
        str(paths["orders"]), str(paths["policy"]), panel, base, model, fitted.curves, policy, stop_table, backtest, simulation, values, plan, None
    )
    write_text_atomic(paths["report"], report.report_html(results), force)
    console.print(f"The report, a figure per step, is in {paths['report']}.")
    render.print_caution(console)
