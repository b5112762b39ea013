"""Human output: rich tables, each followed by a one-line reading of what it means.

Rendering reads results (the stages' result objects) and formats them; every
number it prints was computed by a stage.
"""

from __future__ import annotations

import dataclasses
import math
from contextlib import contextmanager, nullcontext

from rich import box
from rich.console import Console
from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn
from rich.table import Table

from lapsewise.data.panel import Panel
from lapsewise.data.quarters import quarter_label, quarter_start
from lapsewise.data.summary import BaseDescription
from lapsewise.model.mailing_check import ACCURACY_GAIN_THRESHOLD, EXPLAINED_SHARE_THRESHOLD

CAUTION = (
    "Customer files are personal data: keep them on this machine, honour opt-outs and suppression lists, "
    "and follow local direct-mail and data-protection law. The figures are estimates, not guarantees."
)
ALL_MAILED_NOTE = "No mailings file: every quarter after a customer's first order is counted as mailed."


def compact_table() -> Table:
    """A table without borders, for wide grids of numbers that must fit 80 columns."""
    return Table(box=box.SIMPLE_HEAD, padding=(0, 0, 0, 1), show_edge=False, pad_edge=False)


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


def print_panel_summary(console: Console, panel: Panel, base: BaseDescription) -> None:
    """The customer base by frequency and silent quarters, the data range and what was repaired."""
    cells = base.cells
    first = quarter_start(base.first_quarter, panel.fiscal_year_start)
    console.print(
        f"[bold]{panel.customers:,} customers[/bold], first purchases from the quarter starting {first}; "
        f"as-of quarter {quarter_label(panel.end_quarter, panel.fiscal_year_start)}."
    )
    if not panel.mailing_history:
        console.print(ALL_MAILED_NOTE)
    console.print(
        "Customers (count) and their mean order value (currency units) by repeat purchases (rows) "
        "and silent quarters since the last purchase (columns):"
    )
    table = Table(box=box.SIMPLE_HEAD, show_edge=False)
    table.add_column("Repeat", no_wrap=True)
    silent_labels = list(dict.fromkeys(cells["silent_band"]))
    for label in silent_labels:
        table.add_column(f"{label} silent", justify="right", no_wrap=True)
    for frequency, rows in cells.groupby("frequency_band", sort=False):
        row = [str(frequency)]
        for _, cell in rows.iterrows():
            row.append(f"{cell.customers:,}\n{money(cell.mean_order_value)}" if cell.customers else "-")
        table.add_row(*row, end_section=True)
    console.print(table)
    console.print(
        f"{base.one_time_share:.0%} of customers have bought only once; "
        f"{base.lapsed_share:.0%} have been silent for {base.lapsed_after} quarters or more, "
        f"the ones a 'stop after {base.lapsed_after} silent quarters' rule would stop mailing."
    )
    print_counts(console, panel.counts)


def print_caution(console: Console) -> None:
    console.print(f"[dim]{CAUTION}[/dim]")


def _estimate(value: float | None, error: float | None) -> tuple[str, str]:
    if value is None:
        return "not estimated", "-"
    return f"{value:.4g}", "-" if error is None else f"{error:.3g}"


def print_model(console: Console, model, curves) -> None:
    """Parameters, fit quality, spend model and the lapse curves of a fitted model."""
    churn = model.churn
    seasonal = churn.seasons is not None
    title = "Hidden-churn model (BG/BB with mailing response" + (" and seasons)" if seasonal else ")")
    table = Table(title=title, title_justify="left")
    for column in ("Parameter", "Estimate", "Std. error", "Meaning"):
        table.add_column(column, justify="right" if column in ("Estimate", "Std. error") else "left")
    mean_p, mean_theta = churn.process.mean_p, churn.process.mean_theta
    meanings = {
        "alpha": f"purchase probability p ~ Beta(alpha, beta); mean p = {mean_p:.3f} per mailed quarter"
        + (" of the busiest season" if seasonal else ""),
        "beta": "",
        "gamma": f"churn probability theta ~ Beta(gamma, delta); mean theta = {mean_theta:.3f} per quarter",
        "delta": "",
        "rho": "share of the purchase probability left in an unmailed quarter",
    }
    for name, meaning in meanings.items():
        value = getattr(churn, name)
        estimate, error = _estimate(value, churn.std_errors.get(name))
        table.add_row(name, estimate, error, meaning if name != "rho" or value is not None else _rho_missing(model))
    if churn.seasons is not None:
        for q, multiplier in enumerate(churn.seasons):
            error = churn.std_errors.get(f"season_{q + 1}")
            meaning = f"multiplier of p in quarter {q + 1} of the year" + (" (the largest, fixed at 1)" if error is None and multiplier == 1.0 else "")
            table.add_row(f"season_{q + 1}", f"{multiplier:.4g}", "-" if error is None else f"{error:.3g}", meaning)
    console.print(table)
    console.print(
        f"Log-likelihood {churn.log_likelihood:,.2f} over {model.customers:,} customers in {churn.histories:,} distinct histories; "
        f"{'converged' if churn.converged else 'NOT converged'}."
    )
    print_season_test(console, churn.season_test)
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
    print_mailing_check(console, model.mailing_check)
    for warning in model.warnings:
        console.print(f"[yellow]warning:[/yellow] {warning}")
    print_lapse_curves(console, curves)


def print_season_test(console: Console, test: dict | None) -> None:
    """The likelihood-ratio test of the seasons against a model without them, in one line."""
    if test is None:
        return
    verdict = "the seasons matter" if test["p_value"] < 0.05 else "no evidence of seasons (the multipliers may be noise)"
    console.print(
        f"Seasons against none: likelihood-ratio statistic {test['statistic']:,.1f} on {test['degrees_of_freedom']} degrees of freedom, "
        f"p-value {test['p_value']:.3g}: {verdict} (5% level)."
    )


def _rho_missing(model) -> str:
    if model.rho_estimable:
        return "no mailings file: every quarter counted as mailed"
    return "cannot be estimated: every customer was mailed in every quarter"


def print_mailing_check(console: Console, check) -> None:
    """How far the mailing followed recency, frequency and season (:mod:`lapsewise.model.mailing_check`), and what it means."""
    if check is None:
        return
    def share(value) -> str:
        return "-" if value is None else f"{100 * value:.1f}"

    table = Table(title="How was mailing decided? Customer-quarters after the first purchase", title_justify="left")
    table.add_column("Figure")
    table.add_column("Value", justify="right")
    table.add_row("Customer-quarters (count)", f"{check.customer_quarters:,}")
    table.add_row("Unmailed (count)", f"{check.unmailed_quarters:,}")
    table.add_row("Unmailed (%)", share(check.unmailed_share))
    table.add_row("Accuracy of always the more common decision (%)", share(check.base_rate_accuracy))
    table.add_row("Accuracy of the majority of recency x frequency x season cells (%)", share(check.rule_accuracy))
    table.add_row("Mail/hold variance explained by the cells (%)", share(check.explained_share))
    for name, value in check.explained_share_by_predictor.items():
        table.add_row(f"  by {name.replace('_', ' ')} alone (%)", share(value))
    console.print(table)
    if not check.rho_estimable:
        console.print("No customer-quarter was left unmailed: rho, the response without a piece, cannot be estimated.")
    elif check.followed_rules:
        console.print(
            f"Mailing followed the firm's own rules (thresholds: {EXPLAINED_SHARE_THRESHOLD:.0%} of the variance explained or "
            f"{100 * ACCURACY_GAIN_THRESHOLD:.0f} points of accuracy gained); {str(check.strongest_predictor).replace('_', ' ')} explains most."
        )
    else:
        console.print(
            f"Mailing looks like chance: the cells explain {share(check.explained_share)}% of who was mailed "
            f"(rules from {EXPLAINED_SHARE_THRESHOLD:.0%}) and gain {100 * check.accuracy_gain:+.1f} points of accuracy (rules from +{100 * ACCURACY_GAIN_THRESHOLD:.0f})."
        )


def print_lapse_curves(console: Console, curves) -> None:
    if curves.empty:
        return
    table = Table(
        title="Lapse curve: P(alive) / P(order next quarter if mailed), in %, after k more mailed quarters without an order",
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
    gap = result.relative_difference
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
    for column in ("Quarter", "Quarter of year", "Mailed (%)", "Actual", "Predicted"):
        table.add_column(column, justify="right" if column != "Quarter" else "left")
    for row in result.by_quarter.itertuples():
        table.add_row(row.quarter, str(row.quarter_of_year), f"{100 * row.mailed_share:.0f}", f"{row.actual:,}", f"{row.predicted:,.1f}")
    console.print(table)
    console.print(f"The model predicted {result.predicted:,.0f} repeat purchases against {result.actual:,.0f} actual ({gap:+.1%}).")


def print_scores(console: Console, totals: dict, horizon: int, out, planned=None) -> None:
    """The scores at a glance (:func:`lapsewise.model.scores.score_totals`), with the stop rule's plan beside
    mailing every quarter when ``planned`` (:class:`~lapsewise.budget.planned.PlannedTotals`) is given."""
    table = Table(title="Scores written", title_justify="left")
    columns = ["Customers", "Mean P(alive) (%)", "Mean P(order next q) (%)", f"Expected orders, next {horizon} q", "Mean DERT (orders)"]
    if planned is not None:
        columns.insert(0, "Mailing")
    for column in columns:
        table.add_column(column, justify="left" if column == "Mailing" else "right")
    common = [f"{totals['customers']:,}", f"{100 * totals['mean_p_alive']:.1f}", f"{100 * totals['mean_p_buy']:.2f}"]
    every = [f"{totals['expected_orders']:,.0f}", f"{totals['mean_dert']:.3f}"]
    if planned is None:
        table.add_row(*common, *every)
    else:
        table.add_row("a piece every quarter", *common, *every)
        table.add_row("the stop rule's plan", *common, f"{totals['expected_orders_planned']:,.0f}", f"{totals['mean_dert_planned']:.3f}")
    console.print(table)
    console.print(f"{totals['likely_alive']:,} of {totals['customers']:,} customers are more likely alive than not; one row per customer is in {out}.")
    if planned is not None:
        console.print(
            f"expected_orders and dert assume a piece every quarter, for every future quarter; expected_orders_planned and dert_planned "
            f"follow the stop rule's own plan over the policy's {planned.horizon} quarters (no orders counted beyond them), each customer's "
            f"plan solved at the nearest of {len(planned.margins)} margins per order."
        )


def print_truth_comparison(console: Console, comparison) -> None:
    """The demo's fitted parameters beside the settings the scenario was drawn from
    (:func:`lapsewise.evaluate.scenario.compare_with_truth`)."""
    table = Table(title="Fitted against the scenario's true settings", title_justify="left")
    for column in ("Parameter", "True", "Fitted", "Std. error", "Within 2 std. errors"):
        table.add_column(column, justify="left" if column == "Parameter" else "right")
    for row in comparison.itertuples():
        fitted = "-" if row.fitted is None or row.fitted != row.fitted else f"{row.fitted:.4g}"
        error = "-" if row.std_error is None or row.std_error != row.std_error else f"{row.std_error:.3g}"
        table.add_row(row.parameter, f"{row.true:.4g}", fitted, error, "yes" if row.within_two_errors else "no")
    console.print(table)
    console.print(
        f"{int(comparison.within_two_errors.sum())} of {len(comparison)} true settings lie within two standard errors of the fit; about 95% should. "
        "Spend is fitted on net order values after the scenario's partial returns, so it sits a little below the truth."
    )


def _stop_text(stop_after: int, horizon: int) -> str:
    return f"mailed all {horizon} q" if stop_after < 0 else f"after {stop_after}"


def stop_table_rows_shown(table, horizon: int) -> list[tuple[int, int]]:
    """The (x, t_x) rows printed: a spread of frequencies, each at the t_x a customer buying at the mean rate would have."""
    mean_p = table.process.mean_p
    rows = []
    for x in (0, 1, 2, 3, 4, 6, 8, 12, 16):
        if x > horizon:
            break
        t_x = 0 if x == 0 else min(horizon, max(x, round(x / mean_p)))
        rows.append((x, t_x))
    return rows


def _percent(value: float) -> str:
    return "<1" if value < 0.005 else f"{100 * value:.0f}"


def plan_text(actions, horizon: int) -> str:
    """A plan for the silent quarters in our compact form: runs of one choice, "full ×3 · postcard ×4 · stop"."""
    runs: list[list] = []
    for action in actions:
        if runs and runs[-1][0] == action:
            runs[-1][1] += 1
        else:
            runs.append([action, 1])
    if runs and runs[-1][0] == "hold":
        runs[-1] = ["stop", 0]
    parts = [name if count == 0 else f"{name} ×{count}" for name, count in runs]
    if runs and runs[-1][0] != "stop":
        parts.append(f"to the {horizon}-quarter horizon")
    return " · ".join(parts)


SEASON_NAMES = ("Q1", "Q2", "Q3", "Q4")
"""Quarters of the fiscal year, as the tables name them."""


def print_calendar_stop_table(console: Console, table, model) -> None:
    """The calendar program's stop table: per band, the plan after the last order for the shown rows (and each
    quarter of the year of that order, with seasons), its stop point beside the breakeven rule's, and one line
    on what the calendar and the versions changed against one piece and no seasons."""
    from lapsewise.decide.stop_table import calendar_changes

    economics = table.economics
    horizon = economics.horizon_quarters
    shown = [(x, t_x) for x, t_x in stop_table_rows_shown(table, horizon) if x in (0, 1, 2, 4, 8)]
    console.print(
        f"Choices each quarter: hold or {', '.join(table.choices[1:])}; {economics.annual_discount_rate:.0%} a year, each decision looking "
        f"{horizon} quarters ahead{' (to the same quarter of the year: up to 3 more)' if table.seasonal else ''}; "
        f"a held customer orders at {table.process.rho:.2f} times the mailed rate."
    )
    if table.seasonal:
        overrides = "; ".join(f"{SEASON_NAMES[q]} {', '.join(f'{k} {v:g}' for k, v in pairs)}" for q, pairs in enumerate(economics.quarters) if pairs)
        if table.process.seasonal:
            sales = f"Sales by quarter of the year: {', '.join(f'{SEASON_NAMES[q]} {s:.2f}' for q, s in enumerate(table.process.multipliers))} (the model's seasons)"
        elif model.churn.process.seasonal:
            sales = "Sales alike in every quarter (no season of the model's is both 5% from 1 and more than two standard errors from it)"
        else:
            sales = "Sales alike in every quarter (the model has no seasons)"
        console.print(sales + (f"; the policy's own quarters: {overrides}." if overrides else "."))
    rows = table.rows
    changes = {c.band: c for c in calendar_changes(table)}
    for band in table.bands:
        grid = Table(title=f"'{band.label}' spend (order value {money(band.order_value)}): the plan for the silent quarters after the last order", title_justify="left")
        headings = ["x, t_x"] + (["Last order in"] if table.seasonal else []) + ["Plan", "Stop after", "Breakeven rule"]
        headings += [f"Range over {table.draws} draws"] if table.draws else []
        for column in headings:
            grid.add_column(column, justify="left" if column in ("x, t_x", "Plan", "Last order in") else "right")
        for x, t_x in shown:
            mine = rows[(rows["spend_band"] == band.label) & (rows["frequency"] == x) & (rows["last_purchase_quarter"] == t_x)]
            for row in mine.itertuples():
                line = [f"{x}, {t_x}"] + ([SEASON_NAMES[int(row.last_purchase_season) - 1]] if table.seasonal else [])
                line += [plan_text(row.actions, horizon), _stop_text(int(row.stop_after), horizon), _stop_text(int(row.breakeven_stop_after), horizon)]
                line += [_stop_range_text(int(row.stop_after_low), int(row.stop_after_high))] if table.draws else []
                grid.add_row(*line)
        console.print(grid)
        change = changes.get(band.label)
        if change is not None:
            shift = f" (by {abs(change.mean_shift):.1f} quarters on average)" if change.later + change.earlier else ""
            console.print(
                f"'{band.label}': against one piece and every quarter alike, {change.later} of {change.plans} plans stop later and "
                f"{change.earlier} earlier{shift}; {change.step_down} step down to a cheaper version before they stop; "
                f"{change.hold_between} hold in some quarter and mail again later."
            )
    console.print(
        "x = repeat purchases, t_x = quarter of the last one. A plan lists the choice for each silent quarter from the next one on "
        "(×n = for n quarters); it is followed while the customer stays silent and starts again after an order. Stop after = silent "
        "quarters after which no piece is planned. Breakeven rule (common practice): mail the standard piece while P(order next quarter) "
        "x that quarter's margin covers its piece cost."
    )
    print_draw_notes(console, table.notes)


def print_stop_table(console: Console, table, model) -> None:
    if table.calendar:
        print_calendar_stop_table(console, table, model)
        if table.sensitivity is not None:
            print_stop_sensitivity(console, table.sensitivity)
        return
    economics = table.economics
    horizon = economics.horizon_quarters
    shown = stop_table_rows_shown(table, horizon)
    columns = list(range(min(8, horizon) + 1))
    console.print(
        f"Piece cost {money(economics.piece_cost)}, gross margin {economics.gross_margin:.0%}, order cost {money(economics.order_cost)}, "
        f"{economics.annual_discount_rate:.0%} a year, each decision looking {horizon} quarters ahead; "
        f"a held customer orders at {table.process.rho:.2f} times the mailed rate."
    )
    if model.churn.process.seasonal:
        seasons = model.churn.seasons
        console.print(
            f"The model's seasons ({', '.join(f'{s:.2f}' for s in seasons)} by quarter of the year) are all within 5% or two standard errors "
            f"of 1, so the stop rule plans every quarter as an average one (multiplier {sum(seasons) / 4:.2f}); with seasons the data "
            "support, or quarters that differ in the policy, it follows the calendar."
        )
    cells = table.cells.set_index(["spend_band", "frequency", "last_purchase_quarter", "silent_quarters"])
    rows = table.rows.set_index(["spend_band", "frequency", "last_purchase_quarter"])
    for band in table.bands:
        margin = economics.margin(band.order_value)
        console.print(
            f"[bold]'{band.label}' spend[/bold] (order value {money(band.order_value)}, margin {money(margin)} per order): chance of an "
            "order next quarter if mailed (%), by silent quarters since the last order; (brackets) = do not mail."
        )
        grid = compact_table()
        grid.add_column("x, t_x", no_wrap=True)
        for k in columns:
            grid.add_column(str(k), justify="right")
        for x, t_x in shown:
            line = [f"{x}, {t_x}"]
            for k in columns:
                cell = cells.loc[(band.label, x, t_x, k)]
                text = _percent(cell.p_buy)
                line.append(text if cell["mail"] else f"[dim]({text})[/dim]")
            grid.add_row(*line)
        console.print(grid)
        compare = Table(title=f"'{band.label}' spend: stop after ... silent quarters", title_justify="left")
        headings = ["x, t_x", "Optimal"] + ([f"Range over {table.draws} draws", "Draws agreeing"] if table.draws else []) + ["Breakeven rule", "Optimal minus breakeven"]
        for column in headings:
            compare.add_column(column, justify="left" if column.startswith("x") else "right")
        for x, t_x in shown:
            row = rows.loc[(band.label, x, t_x)]
            optimal, breakeven = int(row.stop_after), int(row.breakeven_stop_after)
            extra = "-" if optimal < 0 or breakeven < 0 else f"{optimal - breakeven:+d}"
            spread = [_stop_range_text(int(row.stop_after_low), int(row.stop_after_high)), f"{row.agreement:.0%}"] if table.draws else []
            compare.add_row(f"{x}, {t_x}", _stop_text(optimal, horizon), *spread, _stop_text(breakeven, horizon), extra)
        console.print(compare)
        one_time = rows.loc[(band.label, 0, 0)]
        console.print(
            f"Stop mailing one-time buyers in the '{band.label}' band {_stop_text(int(one_time.stop_after), horizon)} silent quarters; "
            f"the breakeven rule would stop {_stop_text(int(one_time.breakeven_stop_after), horizon)}."
        )
    console.print(
        "x = repeat purchases, t_x = quarter of the last one. Breakeven rule (common practice): mail while P(order next quarter) x margin "
        "covers the piece cost. The optimal rule also counts the future an order buys and, when held customers still order, "
        "only the orders the piece adds."
    )
    print_draw_notes(console, table.notes)
    if table.draws:
        firm = float((table.rows["agreement"] >= 0.9).mean())
        console.print(
            f"Range = 5th to 95th percentile of the stop point over {table.draws} draws of the parameters from the fit's standard errors; "
            f"{firm:.0%} of the stop points are firm (at least 90% of draws agree). Where they are not, more data (or a control cell, for rho) would settle them."
        )
    if table.sensitivity is not None:
        print_stop_sensitivity(console, table.sensitivity)


def print_draw_notes(console: Console, notes) -> None:
    """How the parameter draws were made, where it departs from the fit's full covariance (one line each)."""
    for note in notes:
        console.print(f"Draws: {note}.")


def print_value_precision(console: Console, precision) -> None:
    """One line: how close the values at the estimates are to programs solved at each customer's own order value."""
    if precision is None:
        return
    if precision.largest_bound == 0:
        console.print(f"Values of mailing solved exactly at each of the {precision.programs:,} order values the customers hold.")
    elif precision.refined and precision.certified == 1.0:
        console.print(
            f"Values of mailing at each customer's own order value, from {precision.programs:,} order values solved: every one proved within "
            "1% (or 0.01) of a program solved at that customer's order value."
        )
    else:
        console.print(
            f"Values of mailing at each customer's own order value, read between {precision.programs:,} order values solved: "
            f"{precision.certified:.1%} proved within 1% (or 0.01) of a program solved at that order value, none further than "
            f"{precision.largest_bound:.2f}; --certify-values proves every one."
        )
    if precision.draw_margins:
        console.print(
            f"Each draw of the parameters enters as its difference from the values at the estimates, read between {precision.draw_margins} "
            "order values (measured within about 0.02 of solving every draw in full)."
        )


def print_stop_sensitivity(console: Console, sensitivity) -> None:
    """How many stop points move when each parameter is two standard errors lower or higher."""
    grid = Table(title="Stop points that move with each estimate (two standard errors either way)", title_justify="left")
    for column in ("Parameter", "Standard error", "Moved when lower", "Moved when higher", "Of stop points"):
        grid.add_column(column, justify="left" if column == "Parameter" else "right")
    for row in sensitivity.itertuples():
        grid.add_row(row.parameter, f"{row.std_error:.4g}", f"{row.moved_lower:,}", f"{row.moved_higher:,}", f"{row.stop_points:,}")
    console.print(grid)
    if len(sensitivity):
        top = sensitivity.assign(moved=sensitivity.moved_lower + sensitivity.moved_higher).sort_values("moved", ascending=False, kind="stable").iloc[0]
        console.print(
            f"The decisions hang most on {top.parameter} ({int(top.moved):,} stop points move); firm it up first"
            + (" (a randomised no-mail control cell measures rho)." if top.parameter == "rho" else " (more customers or a longer history).")
        )


def _stop_range_text(low: int, high: int) -> str:
    """The range of a stop point over the draws, in silent quarters: one number when the ends agree, else low-high
    ("all" for mailed throughout the horizon)."""
    low_text, high_text = ("all" if v < 0 else str(v) for v in (low, high))
    return low_text if low == high else f"{low_text}-{high_text}"


def economics_json(economics) -> dict:
    """The economics as JSON: the policy's keys, and the quarters' overrides (``"quarters": {"quarter_4": {...}}``) when there are any."""
    data = {k: v for k, v in dataclasses.asdict(economics).items() if k != "quarters"}
    if economics.seasonal:
        data["quarters"] = {f"quarter_{q + 1}": dict(pairs) for q, pairs in enumerate(economics.quarters) if pairs}
    return data


def stop_table_json(table, model) -> dict:
    economics = table.economics
    return {
        "economics": economics_json(economics),
        "unmailed_response_used": table.process.rho,
        "mailing_history": model.mailing_history,
        "spend_bands": [
            {"label": b.label, "low": b.low, "high": None if math.isinf(b.high) else b.high, "order_value": b.order_value} for b in table.bands
        ],
        "rows": [
            {
                "spend_band": r.spend_band,
                "order_value": float(r.order_value),
                "frequency": int(r.frequency),
                "last_purchase_quarter": int(r.last_purchase_quarter),
                "last_purchase_season": int(r.last_purchase_season) if table.seasonal else None,
                "stop_after": None if r.stop_after < 0 else int(r.stop_after),
                "breakeven_stop_after": None if r.breakeven_stop_after < 0 else int(r.breakeven_stop_after),
                "actions": list(r.actions),
                **(
                    {
                        "stop_after_low": None if r.stop_after_low < 0 else int(r.stop_after_low),
                        "stop_after_high": None if r.stop_after_high < 0 else int(r.stop_after_high),
                        "agreement": round(float(r.agreement), 4),
                    }
                    if table.draws
                    else {}
                ),
            }
            for r in table.rows.itertuples()
        ],
        "planned_with": "calendar" if table.calendar else "single piece",
        "draws": table.draws,
        "sensitivity": None if table.sensitivity is None else [
            {k: (round(float(v), 6) if k == "std_error" else v) for k, v in row.items()} for row in table.sensitivity.to_dict(orient="records")
        ],
    }


def print_simulation(console: Console, result, economics) -> None:
    console.print(
        f"{result.customers:,} new customers over {result.quarters} quarters (seed {result.seed}), order value {money(result.order_value)}, "
        f"margin {money(result.margin)} per order, piece cost {money(economics.piece_cost)}; every policy meets the same customers and random numbers."
    )
    console.print(
        "Discounted profit per customer (currency units: mean, 5th, 50th and 95th percentile), pieces and orders per customer, "
        "and the mean difference to the optimal policy with its standard error:"
    )
    table = compact_table()
    for column in ("Policy", "Mean", "P5", "P50", "P95", "Pieces", "Orders", "vs opt.", "SE"):
        table.add_column(column, justify="left" if column == "Policy" else "right", no_wrap=True)
    for row in result.summary.itertuples():
        table.add_row(
            row.policy,
            money(row.mean_profit),
            money(row.profit_p5),
            money(row.profit_p50),
            money(row.profit_p95),
            f"{row.pieces:.2f}",
            f"{row.orders:.2f}",
            "-" if row.policy == "optimal" else f"{row.difference_to_optimal:+.2f}",
            "-" if row.policy == "optimal" else f"{row.difference_std_error:.2f}",
        )
    console.print(table)
    optimal = result.summary.iloc[0]
    runner = result.best_rule
    single = result.summary[result.summary["policy"] == "single piece"]
    if len(single):
        row = single.iloc[0]
        console.print(
            "'optimal' is the calendar program's plan (a version or holding each quarter, each quarter with its own sales, costs and margin); "
            f"'single piece' is the program that mails one piece and takes every quarter alike. Planning on the calendar earns "
            f"{-row.difference_to_optimal:+.2f} ± {1.96 * row.difference_std_error:.2f} per customer (95%) against it, on the same customers."
        )
    elif result.seasons is not None:
        console.print(
            f"The simulated customers follow the model's seasons ({', '.join(f'{s:.2f}' for s in result.seasons)} by quarter of the year) "
            "from the quarter after the as-of date, while the stop rule plans every quarter as an average one: the gap to a rule of "
            "thumb includes what planning without the calendar costs, and the program's own value is for the average quarter."
        )
    if result.program_value is not None:
        console.print(
            f"The program values a new customer at {money(result.program_value)}; the simulation gives {money(optimal.mean_profit)} "
            f"± {money(1.96 * optimal.profit_std_error)} (95%)."
        )
    console.print(
        f"The optimal policy earns {money(optimal.mean_profit)} per customer; the best rule of thumb, '{runner.policy}', earns "
        f"{money(runner.mean_profit)} ({runner.difference_to_optimal:+.2f} ± {1.96 * runner.difference_std_error:.2f})."
    )


def print_suppression(console: Console, suppression) -> None:
    """How many of the suppression list's ids are customers here (they are never mailed), with a warning when few are."""
    if suppression is None:
        console.print("No suppression list given (--suppress): nobody is held back from mailing for opt-outs or returned mail.")
        return
    console.print(
        f"Suppression list {suppression.source}: {suppression.matched:,} of its {suppression.listed:,} ids are customers here; "
        "they are never mailed."
    )
    if suppression.few_matched:
        console.print(
            "[yellow]warning:[/yellow] fewer than half of the suppression list's ids match a customer; if the list should cover "
            "this base, check that both files use the same id format"
        )


def print_plan(console: Console, plan, panel, values) -> None:
    solution = plan.solution
    console.print(
        f"As of {panel.as_of}: {panel.customers:,} customers, {values.suppressed_count:,} of them suppressed (never mailed). "
        f"Budget {money(plan.budget)}; solver {solution.status} (relative gap tolerance {solution.gap_tolerance:g}) in {solution.solve_seconds:.2f} s."
    )
    table = compact_table()
    for column in ("Segment", "Version", "Customers", "Mailed", "Cost", "Orders", "Value"):
        table.add_column(column, justify="left" if column in ("Segment", "Version") else "right", no_wrap=True)
    for row in plan.segments.itertuples():
        table.add_row(row.segment, row.version, f"{row.customers:,}", f"{row.mailed:,}", f"{row.cost:,.0f}", f"{row.expected_orders:,.1f}", f"{row.expected_profit:,.0f}")
    totals = plan.totals
    table.add_row(
        "Total", "", f"{totals['customers']:,}", f"{totals['mailed']:,}", f"{totals['cost']:,.0f}",
        f"{totals['expected_orders']:,.1f}", f"{totals['expected_profit']:,.0f}", end_section=True,
    )
    console.print(
        "The plan: customers mailed per segment, piece cost and expected value (currency units; value is net of piece "
        "costs and counts the future an order buys), expected orders next quarter:"
    )
    console.print(table)
    if plan.setup_total:
        console.print(f"Setup costs of the versions used: {money(plan.setup_total)}.")
    console.print(
        f"Spend {money(solution.spent)} of {money(plan.budget)} for an expected {money(plan.expected_profit)} over what holding would earn; "
        f"one more unit of budget is worth about {plan.shadow_price:.2f} (the budget's shadow price, by re-solving)."
    )
    if plan.profit_range is not None:
        low, high = plan.profit_range
        console.print(
            f"Over {len(plan.drawn_profits)} draws of the parameters the plan's value ranges from {money(low)} to {money(high)} "
            f"(5th to 95th percentile); the decisions use the value averaged over the draws (--plug-in: the estimates alone)."
        )
    if plan.frontier is not None:
        frontier = compact_table()
        frontier.add_column("Budget", justify="right")
        frontier.add_column("Expected value", justify="right")
        for row in plan.frontier.itertuples():
            frontier.add_row(money(row.budget), money(row.expected_profit))
        console.print("Budget against expected value (currency units):")
        console.print(frontier)


def print_recurring_budget(console: Console, recurring) -> None:
    """The recurring budget's price and the plan's value under both readings (nothing without --recurring-budget)."""
    if recurring is None:
        return
    state = "settled" if recurring.settled else f"not settled after {len(recurring.prices)} rounds (the last price is used)"
    console.print(
        f"Recurring budget: later pieces valued at their cost plus the budget's shadow price, {recurring.price:.2f} a piece "
        f"({state}). The plan is worth {money(recurring.plan.expected_profit)} with later pieces at that price, and "
        f"{money(recurring.expected_profit_plain)} if later quarters had no budget limit (pieces at their cost)."
    )


def print_mail_list(console: Console, counts: dict[str, int], plan, out, flips: int = 0) -> None:
    """Customers per decision (:func:`lapsewise.budget.mail_list.decision_counts`) and where the list is."""
    table = compact_table()
    table.add_column("Decision")
    table.add_column("Customers", justify="right")
    for decision in ("mail", "over-budget", "stop", "suppressed"):
        table.add_row(decision, f"{counts[decision]:,}")
    console.print(table)
    budget = "no budget limit" if plan.budget is None else f"a budget of {money(plan.budget)}"
    console.print(
        f"With {budget}, mail {counts['mail']:,} customers for {money(plan.solution.spent)}; "
        f"the list, one row per customer, is in {out}. Cells that a spreadsheet would run as formulas start with a quote."
    )
    if plan.profit_range is not None:
        low, high = plan.profit_range
        console.print(
            f"Decided on the value of mailing averaged over {len(plan.drawn_profits)} draws of the parameters; the list's value_low and "
            f"value_high are its 5th and 95th percentiles, and may_flip marks the {flips:,} customers whose value changes sign within "
            f"them. The plan is worth {money(low)} to {money(high)} over the draws."
        )


@contextmanager
def progress(console: Console, steps: int, enabled: bool = True):
    """Yield ``step(description)``, a context manager per stage, shown as a progress bar on a terminal only.

    In CI, in a pipe or with ``--json`` (``enabled`` False) nothing is drawn.
    """
    if not (enabled and console.is_terminal):
        yield lambda description: nullcontext()
        return
    with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), TimeElapsedColumn(), console=console, transient=True) as bar:
        task = bar.add_task("", total=steps)

        @contextmanager
        def step(description: str):
            bar.update(task, description=description)
            yield
            bar.advance(task)

        yield step


# ---------------------------------------------------------------- the control cell


def print_control_cell(console: Console, cell, out) -> None:
    """The cell's size and what it buys (:class:`lapsewise.budget.control_cell.ControlCell`), per segment, and where it is."""
    table = Table(title="Control cell: customers held (not mailed) this quarter", title_justify="left")
    table.add_column("Figure")
    table.add_column("Value", justify="right")
    table.add_row("Customers the policy would mail (customers)", f"{cell.eligible:,}")
    table.add_row("Held in the cell (customers)", f"{cell.customers_in_cell:,} ({cell.customers_in_cell / cell.eligible:.1%})")
    table.add_row("rho planned with (share of response)", f"{cell.rho:.3g}")
    table.add_row("Order rate of those customers if mailed (per quarter)", f"{cell.rate_mailed:.2%}")
    table.add_row("95% half-width on rho asked (share of response)", f"+-{cell.precision_asked:.3g}")
    table.add_row("95% half-width on rho expected (share of response)", f"+-{cell.precision:.3g}")
    table.add_row("Expected value forgone (currency units)", money(cell.expected_value_forgone))
    table.add_row("Seed of the draw", str(cell.seed))
    console.print(table)
    segments = compact_table()
    for column in ("Segment", "Would mail", "Held"):
        segments.add_column(column, justify="left" if column == "Segment" else "right")
    for row in cell.segments.itertuples(index=False):
        segments.add_row(str(row.segment), f"{row.eligible:,}", f"{row.held:,}")
    console.print(segments)
    console.print(
        f"Hold these {cell.customers_in_cell:,} of the {cell.eligible:,} customers the policy would mail this quarter and mail the rest: "
        f"after the quarter, 'lapsewise fit --control {out}' estimates rho to within about +-{cell.precision:.3g} (95%), planned with "
        f"rho {cell.rho:.3g} ({cell.rho_source}), at an expected {money(cell.expected_value_forgone)} of value forgone. "
        f"The cell (customer_id, segment) is in {out}; drawn at random within segments with seed {cell.seed}, the same seed giving the same cell."
    )


def print_control_reading(console: Console, reading) -> None:
    """rho from the control cell beside the model's (:class:`lapsewise.budget.control_reading.ControlReading`); nothing without a cell."""
    if reading is None:
        return
    counts = reading.counts
    table = Table(title="rho from the control cell, beside the model's", title_justify="left")
    for column in ("Estimate", "rho (share of response)", "Std. error", "From"):
        table.add_column(column, justify="left" if column in ("Estimate", "From") else "right")
    table.add_row("control cell", f"{reading.rho_cell:.4g}", f"{reading.rho_cell_se:.3g}", f"{reading.customers:,} held customers against the mailed of their states")
    model_rho, model_error = _estimate(reading.rho_model, reading.rho_model_se)
    table.add_row("model", model_rho, model_error, "the fit of every customer's history")
    console.print(table)
    left_out = {
        "were mailed anyway in the quarter (a list error)": counts.mailed_anyway,
        "first ordered in the quarter (not customers when the cell was drawn)": counts.joined,
        "had no mailed customer of their state to compare with": counts.without_comparison,
        "are not customers in the orders": counts.listed - counts.matched,
    }
    for what, count in left_out.items():
        if count:
            console.print(f"[yellow]warning:[/yellow] {count:,} of the cell's {counts.listed:,} customers {what}; they are left out.")
    if reading.disagree:
        console.print(
            f"[yellow]warning:[/yellow] the cell's rho {reading.rho_cell:.3g} and the model's {reading.rho_model:.3g} differ by more than their "
            "errors allow (95%); the model's rho rests on the firm's own, non-random mailing, the cell's on a random hold. "
            "Consider setting unmailed_response in the policy from the cell's estimate."
        )
    else:
        console.print(
            f"The held customers ordered at {reading.rho_cell:.3g} times the rate of comparable mailed ones (95% interval "
            f"{reading.rho_cell - 1.96 * reading.rho_cell_se:.3g} to {reading.rho_cell + 1.96 * reading.rho_cell_se:.3g}); "
            "the model's rho is within their errors of it."
        )
