"""Human output: rich tables, each followed by a one-line reading of what it means.

Rendering reads results; it does not compute them.
"""

from __future__ import annotations

import math

from rich.console import Console
from rich.table import Table

from lapsewise.panel import Panel, base_table, quarter_label, quarter_start, summarize

CAUTION = (
    "Customer files are personal data: keep them on this machine, honour opt-outs and suppression lists, "
    "and follow local direct-mail and data-protection law. The figures are estimates, not guarantees."
)
ALL_MAILED_NOTE = "No mailings file: every quarter after a customer's first order is counted as mailed."


def money(value: float) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "-"
    return f"{value:,.2f}"


def print_counts(console: Console, counts: dict[str, int]) -> None:
    if not counts:
        console.print("Nothing was left out or repaired.")
        return
    table = Table(title="Left out or repaired", title_justify="left")
    table.add_column("What")
    table.add_column("Count", justify="right")
    for what, count in counts.items():
        table.add_row(what, f"{count:,}")
    console.print(table)


def print_panel_summary(console: Console, panel: Panel) -> None:
    """The customer base by frequency and silent quarters, the data range and what was repaired."""
    summary = summarize(panel)
    cells = base_table(summary)
    first = quarter_start(int(panel.first_quarter.min()), panel.fiscal_year_start)
    console.print(
        f"[bold]{panel.customers:,} customers[/bold], first purchases from the quarter starting {first}; "
        f"as-of quarter {quarter_label(panel.end_quarter, panel.fiscal_year_start)}."
    )
    if not panel.mailing_history:
        console.print(ALL_MAILED_NOTE)
    table = Table(
        title="Customers (count) and mean order value (currency units) by repeat purchases and silent quarters",
        title_justify="left",
    )
    table.add_column("Repeat purchases")
    silent_labels = list(dict.fromkeys(cells["silent_band"]))
    for label in silent_labels:
        table.add_column(f"{label} silent q", justify="right")
    for frequency, rows in cells.groupby("frequency_band", sort=False):
        row = [str(frequency)]
        for _, cell in rows.iterrows():
            row.append(f"{cell.customers:,}\n{money(cell.mean_order_value)}" if cell.customers else "-")
        table.add_row(*row, end_section=True)
    console.print(table)
    one_time = int((summary.x == 0).sum())
    lapsed = int((summary.silent_quarters >= 4).sum())
    console.print(
        f"{one_time / panel.customers:.0%} of customers have bought only once; "
        f"{lapsed / panel.customers:.0%} have been silent for 4 quarters or more, "
        "the ones a 'drop after four silent quarters' rule would stop mailing."
    )
    print_counts(console, panel.counts)


def print_caution(console: Console) -> None:
    console.print(f"[dim]{CAUTION}[/dim]")


def _estimate(value: float | None, error: float | None) -> tuple[str, str]:
    if value is None:
        return "not estimated", "-"
    return f"{value:.4g}", "-" if error is None else f"{error:.3g}"


def print_model(console: Console, model, curves) -> None:
    """Parameters, fit quality, spend model and the return curve of a fitted model."""
    churn = model.churn
    table = Table(title="Hidden-churn model (BG/BB with mailing response)", title_justify="left")
    for column in ("Parameter", "Estimate", "Std. error", "Meaning"):
        table.add_column(column, justify="right" if column in ("Estimate", "Std. error") else "left")
    mean_p = churn.alpha / (churn.alpha + churn.beta)
    mean_theta = churn.gamma / (churn.gamma + churn.delta)
    meanings = {
        "alpha": f"purchase probability p ~ Beta(alpha, beta); mean p = {mean_p:.3f} per mailed quarter",
        "beta": "",
        "gamma": f"churn probability theta ~ Beta(gamma, delta); mean theta = {mean_theta:.3f} per quarter",
        "delta": "",
        "rho": "share of the purchase probability left in an unmailed quarter",
    }
    for name, meaning in meanings.items():
        value = getattr(churn, name)
        estimate, error = _estimate(value, churn.std_errors.get(name))
        table.add_row(name, estimate, error, meaning if name != "rho" or value is not None else "no mailings file: every quarter counted as mailed")
    console.print(table)
    console.print(
        f"Log-likelihood {churn.log_likelihood:,.2f} over {model.customers:,} customers in {churn.histories:,} distinct histories; "
        f"{'converged' if churn.converged else 'NOT converged'}."
    )
    if model.spend is not None:
        spend = model.spend
        table = Table(title="Order value (gamma-gamma)", title_justify="left")
        for column in ("Parameter", "Estimate", "Std. error"):
            table.add_column(column, justify="right" if column != "Parameter" else "left")
        for name in ("p", "q", "gamma"):
            estimate, error = _estimate(getattr(spend, name), spend.std_errors.get(name))
            table.add_row(name, estimate, error)
        console.print(table)
        console.print(
            f"Population mean order value {money(spend.population_mean)} (currency units) from {spend.customers:,} repeat customers; "
            f"correlation between repeat purchases and mean order value {spend.frequency_value_correlation:+.2f} (the model assumes none)."
        )
    for warning in model.warnings:
        console.print(f"[yellow]warning:[/yellow] {warning}")
    print_return_curves(console, curves)


def print_return_curves(console: Console, curves) -> None:
    if curves.empty:
        return
    table = Table(
        title="Return curve: P(alive) / P(order next quarter if mailed), in %, after k more mailed quarters without an order",
        title_justify="left",
    )
    table.add_column("k", justify="right")
    groups = list(curves.groupby("band", sort=False))
    for band, rows in groups:
        first = rows.iloc[0]
        table.add_column(f"{band} repeat\n(x={first.x}, t_x={first.t_x})", justify="right")
    for k in sorted(curves["k"].unique()):
        cells = [str(k)]
        for _, rows in groups:
            row = rows[rows["k"] == k].iloc[0]
            cells.append(f"{100 * row.p_alive:.0f} / {100 * row.p_buy:.1f}")
        table.add_row(*cells)
    console.print(table)
    band, rows = groups[0]
    last = rows.iloc[-1]
    console.print(
        f"A typical customer with {band} repeat purchases has a {100 * rows.iloc[0].p_buy:.1f}% chance of ordering if mailed now; "
        f"after {int(last.k)} more mailed quarters without an order it is {100 * last.p_buy:.1f}%."
    )


def print_backtest(console: Console, result) -> None:
    console.print(
        f"Fitted on the data up to {result.calibration_as_of}; predicting the next {result.holdout_quarters} quarters "
        f"for {result.customers:,} customers, given the mailings actually made."
    )
    gap = (result.predicted - result.actual) / result.actual if result.actual else float("nan")
    table = Table(title="Repeat purchases in the holdout quarters (count)", title_justify="left")
    table.add_column("Actual", justify="right")
    table.add_column("Predicted", justify="right")
    table.add_column("Difference", justify="right")
    table.add_row(f"{result.actual:,.0f}", f"{result.predicted:,.1f}", f"{gap:+.1%}")
    console.print(table)
    table = Table(title="Mean repeat purchases per customer in the holdout, by repeat purchases in calibration", title_justify="left")
    for column in ("Repeat purchases", "Customers", "Actual mean", "Predicted mean"):
        table.add_column(column, justify="right" if column != "Repeat purchases" else "left")
    for row in result.by_frequency.itertuples():
        table.add_row(str(row.frequency), f"{row.customers:,}", f"{row.actual_mean:.3f}", f"{row.predicted_mean:.3f}")
    console.print(table)
    table = Table(title="Quarter by quarter: repeat purchases of the whole calibration base (count)", title_justify="left")
    for column in ("Quarter", "Mailed (%)", "Actual", "Predicted"):
        table.add_column(column, justify="right" if column != "Quarter" else "left")
    for row in result.by_quarter.itertuples():
        table.add_row(row.quarter, f"{100 * row.mailed_share:.0f}", f"{row.actual:,}", f"{row.predicted:,.1f}")
    console.print(table)
    console.print(f"The model predicted {result.predicted:,.0f} repeat purchases against {result.actual:,.0f} actual ({gap:+.1%}).")


def print_scores(console: Console, scores, horizon: int, out) -> None:
    table = Table(title="Scores written", title_justify="left")
    for column in ("Customers", "Mean P(alive) (%)", "Mean P(order next q) (%)", f"Expected orders, next {horizon} q", "Mean DERT (orders)"):
        table.add_column(column, justify="right")
    table.add_row(
        f"{len(scores):,}",
        f"{100 * scores['p_alive'].mean():.1f}",
        f"{100 * scores['p_buy'].mean():.2f}",
        f"{scores['expected_purchases'].sum():,.0f}",
        f"{scores['dert'].mean():.3f}",
    )
    console.print(table)
    likely = int((scores["p_alive"] >= 0.5).sum())
    console.print(f"{likely:,} of {len(scores):,} customers are more likely alive than not; one row per customer is in {out}.")


def print_truth_comparison(console: Console, model, truth) -> None:
    """The demo's fitted parameters beside the settings the scenario was drawn from."""
    table = Table(title="Fitted against the scenario's true settings", title_justify="left")
    for column in ("Parameter", "True", "Fitted", "Std. error", "Within 2 std. errors"):
        table.add_column(column, justify="left" if column == "Parameter" else "right")
    pairs = [(name, getattr(truth, name), getattr(model.churn, name), model.churn.std_errors.get(name)) for name in ("alpha", "beta", "gamma", "delta", "rho")]
    if model.spend is not None:
        pairs += [
            (f"spend {name}", getattr(truth, f"spend_{name}"), getattr(model.spend, name), model.spend.std_errors.get(name)) for name in ("p", "q", "gamma")
        ]
    inside = 0
    for name, true, fitted, error in pairs:
        ok = fitted is not None and error is not None and abs(fitted - true) <= 2 * error
        inside += ok
        table.add_row(name, f"{true:.4g}", "-" if fitted is None else f"{fitted:.4g}", "-" if error is None else f"{error:.3g}", "yes" if ok else "no")
    console.print(table)
    console.print(
        f"{inside} of {len(pairs)} true settings lie within two standard errors of the fit; about 95% should. "
        "Spend is fitted on net order values after the scenario's partial returns, so it sits a little below the truth."
    )
