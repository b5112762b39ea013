"""The report: one self-contained HTML file with a figure per result, for the people who sign off the mail budget.

The report computes nothing of its own. :func:`collect` runs the same pipeline
functions as the commands (``summary``, ``fit``'s lapse curves, ``backtest``,
``stop-table``, ``simulate`` and ``plan``); :func:`report_html` draws each
result with matplotlib (SVG, inline), prints the numbers beside it and adds a
one-line reading beneath. Every number shown is a field of a stage's result
object; the figures only draw them.

The page needs nothing from outside itself: styles are inline, figures are
inline SVG with their text as text, and nothing is fetched. Print styles keep
each figure on one page on A4 and Letter.
"""

from __future__ import annotations

import html
import io
import math
import re
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from lapsewise import __version__  # noqa: E402
from lapsewise.app import pipeline  # noqa: E402
from lapsewise.app.render import ALL_MAILED_NOTE, CAUTION, _estimate, stop_table_rows_shown  # noqa: E402
from lapsewise.budget.integer_program import Plan  # noqa: E402
from lapsewise.budget.values import CustomerValues  # noqa: E402
from lapsewise.data.panel import Panel  # noqa: E402
from lapsewise.data.summary import BaseDescription, describe_base, summarize  # noqa: E402
from lapsewise.data.suppression import Suppression  # noqa: E402
from lapsewise.decide.stop_table import StopTable  # noqa: E402
from lapsewise.evaluate.backtest import Backtest, run_backtest  # noqa: E402
from lapsewise.evaluate.policies import Simulation  # noqa: E402
from lapsewise.files.policy_file import Policy  # noqa: E402
from lapsewise.model.fitted import Model  # noqa: E402
from lapsewise.model.scores import lapse_curves  # noqa: E402

FRONTIER_POINTS = 10
"""Budgets on the frontier (as ``plan --frontier``)."""
SIMULATED_CUSTOMERS = 10_000
SIMULATION_SEED = 1
"""The simulation's customers and seed: ``simulate``'s defaults."""
SILENT_COLUMNS = 12
"""Silent quarters shown in the stop-table heat maps (fewer when the horizon is shorter)."""

TITLES = {
    "base": "1. The customer base",
    "lapse": "2. The lapse curve",
    "stop": "3. When to stop mailing: the stop table",
    "frontier": "4. The budget frontier",
    "backtest": "5. The backtest: did the model track reality?",
    "policies": "6. The policies compared",
    "model": "7. The model, the data and the cautions",
}

LINE_STYLES = ("-", "--", ":", "-.", (0, (5, 1, 1, 1, 1, 1)), (0, (1, 3)))
MARKERS = ("o", "s", "^", "D", "v", "P")


def holdout_quarters(covered_quarters: int) -> int:
    """The quarters the report's backtest holds out: a quarter of the history, at least 1 and at most 4 (the demo's rule)."""
    return max(1, min(4, covered_quarters // 4))


def covered_quarters(panel: Panel) -> int:
    """Quarters of history in the panel, from the earliest first purchase to the as-of quarter."""
    return int(panel.end_quarter - panel.first_quarter.min() + 1) if panel.customers else 0


def backtest_or_none(panel: Panel) -> Backtest | None:
    """The backtest at :func:`holdout_quarters`; None when the history is shorter than the 4 quarters it needs."""
    quarters = covered_quarters(panel)
    return run_backtest(panel, holdout_quarters(quarters)) if quarters >= 4 else None


@dataclass(frozen=True)
class ReportResults:
    """Every stage's result the report shows (each computed by the pipeline, as the commands compute it)."""

    orders: str
    policy_source: str
    panel: Panel
    base: BaseDescription
    model: Model
    curves: pd.DataFrame
    policy: Policy
    stop_table: StopTable
    backtest: Backtest | None
    simulation: Simulation
    values: CustomerValues
    plan: Plan
    suppression: Suppression | None


def collect(
    model_file: str | Path,
    orders: str | Path,
    policy_file: str | Path,
    budget: float | None,
    mailings: str | Path | None,
    as_of: str | None,
    suppress: str | Path | None,
    columns: dict,
    overrides: dict | None,
    draws: int = 0,
    seed: int = 0,
) -> ReportResults:
    """Run the stages the report shows, through the pipeline, on the commands' inputs (the values averaged over
    ``draws`` draws of the parameters, as ``plan`` does)."""
    inputs = pipeline.plan_inputs(model_file, orders, policy_file, mailings, as_of, suppress, None, None, columns, overrides, draws, seed)
    model, policy, panel = inputs.model, inputs.policy, inputs.panel
    return ReportResults(
        orders=str(orders),
        policy_source=str(policy_file),
        panel=panel,
        base=describe_base(panel),
        model=model,
        curves=lapse_curves(model, summarize(panel)),
        policy=policy,
        stop_table=pipeline.stop_table(model, policy),
        backtest=backtest_or_none(panel),
        simulation=pipeline.simulation(model, policy, SIMULATED_CUSTOMERS, None, SIMULATION_SEED),
        values=inputs.values,
        plan=pipeline.plan(inputs.values, policy, budget, FRONTIER_POINTS),
        suppression=inputs.suppression,
    )


# ---------------------------------------------------------------- figures


def svg(figure: Figure, name: str) -> str:
    """The figure as an inline ``<svg>`` element: text kept as text, ids unique to the figure, no metadata."""
    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": f"lapsewise-{name}", "svg.fonttype": "none", "font.size": 9}):
        figure.savefig(buffer, format="svg", bbox_inches="tight", metadata={"Date": None, "Creator": None, "Format": None, "Type": None})
    text = buffer.getvalue()
    text = re.sub(r"<metadata>.*?</metadata>", "", text[text.index("<svg") :], flags=re.S)
    return text.replace("<svg ", f'<svg role="img" aria-label="{html.escape(TITLES[name])}" ', 1)


def _figure(width: float, height: float, columns: int = 1) -> tuple[Figure, list]:
    figure = Figure(figsize=(width, height), layout="constrained")
    axes = figure.subplots(1, columns, squeeze=False)[0]
    return figure, list(axes)


def _style(index: int) -> dict:
    colour = matplotlib.colormaps["cividis"](0.85 * index / 5)
    return {"color": colour, "linestyle": LINE_STYLES[index % len(LINE_STYLES)], "marker": MARKERS[index % len(MARKERS)], "markersize": 4}


def _grid_text_colour(value: float, top: float) -> str:
    return "black" if top and value / top > 0.6 else "white"


def base_figure(base: BaseDescription) -> str:
    cells = base.cells
    rows = list(dict.fromkeys(cells["frequency_band"]))
    columns = list(dict.fromkeys(cells["silent_band"]))
    counts = cells["customers"].to_numpy().reshape(len(rows), len(columns))
    figure, (axes,) = _figure(6.5, 3.4)
    image = axes.imshow(counts, cmap="cividis", aspect="auto")
    for i in range(len(rows)):
        for j in range(len(columns)):
            axes.text(j, i, f"{counts[i, j]:,}", ha="center", va="center", color=_grid_text_colour(counts[i, j], counts.max()), fontsize=8)
    axes.set_xticks(range(len(columns)), columns)
    axes.set_yticks(range(len(rows)), rows)
    axes.set_xlabel("Silent quarters since the last purchase (quarters)")
    axes.set_ylabel("Repeat purchases (count)")
    axes.set_title("Customers by repeat purchases and silent quarters")
    figure.colorbar(image, ax=axes, label="Customers (count)")
    return svg(figure, "base")


def lapse_figure(curves: pd.DataFrame, breakeven: float) -> str:
    figure, (alive, buy) = _figure(8.0, 3.4, 2)
    for index, (band, rows) in enumerate(curves.groupby("band", sort=False)):
        first = rows.iloc[0]
        label = f"{band} repeat (x={first.x}, t_x={first.t_x})"
        alive.plot(rows["k"], 100 * rows["p_alive"], label=label, **_style(index))
        buy.plot(rows["k"], 100 * rows["p_buy"], label=label, **_style(index))
    buy.axhline(100 * breakeven, color="black", linewidth=1.2, linestyle=(0, (6, 2)), label=f"breakeven {100 * breakeven:.1f}%")
    alive.set_title("P(alive)")
    buy.set_title("P(order next quarter if mailed)")
    for axes, what in ((alive, "P(alive)"), (buy, "P(order next quarter)")):
        axes.set_xlabel("Further mailed quarters without an order (quarters)")
        axes.set_ylabel(f"{what} (%)")
        axes.set_ylim(bottom=0)
        axes.grid(True, color="0.85", linewidth=0.5)
    buy.legend(fontsize=7)
    return svg(figure, "lapse")


def stop_figure(table: StopTable) -> str:
    horizon = table.economics.horizon_quarters
    shown = stop_table_rows_shown(table, horizon)
    silent = list(range(min(SILENT_COLUMNS, horizon) + 1))
    cells = table.cells.set_index(["spend_band", "frequency", "last_purchase_quarter", "silent_quarters"])
    rows = table.rows.set_index(["spend_band", "frequency", "last_purchase_quarter"])
    figure, panels = _figure(3.2 * len(table.bands) + 0.8, 3.6, len(table.bands))
    image = None
    for axes, band in zip(panels, table.bands):
        grid = np.array([[100 * cells.loc[(band.label, x, t_x, k), "p_buy"] for k in silent] for x, t_x in shown])
        mail = np.array([[bool(cells.loc[(band.label, x, t_x, k), "mail"]) for k in silent] for x, t_x in shown])
        image = axes.imshow(grid, cmap="cividis", aspect="auto", vmin=0, vmax=max(1.0, grid.max()))
        held_rows, held_columns = np.nonzero(~mail)
        axes.plot(held_columns, held_rows, linestyle="none", marker=".", color="white", markersize=2)
        for i, (x, t_x) in enumerate(shown):
            stop = int(rows.loc[(band.label, x, t_x), "stop_after"])
            if 0 <= stop <= silent[-1]:
                axes.add_patch(matplotlib.patches.Rectangle((stop - 0.5, i - 0.5), 1, 1, fill=False, edgecolor="black", linewidth=2))
                axes.add_patch(matplotlib.patches.Rectangle((stop - 0.5, i - 0.5), 1, 1, fill=False, edgecolor="white", linewidth=0.8))
        axes.set_xticks(silent[::2], [str(k) for k in silent[::2]])
        axes.set_yticks(range(len(shown)), [f"{x}, {t_x}" for x, t_x in shown])
        axes.set_xlabel("Silent quarters, mailed (quarters)")
        axes.set_title(f"'{band.label}' spend: order value {band.order_value:,.2f}", fontsize=9)
    panels[0].set_ylabel("Repeat purchases x, last purchase quarter t_x")
    figure.colorbar(image, ax=panels, label="Chance of an order next quarter if mailed (%)")
    return svg(figure, "stop")


def frontier_figure(plan: Plan) -> str:
    figure, (axes,) = _figure(6.5, 3.4)
    frontier = plan.frontier
    axes.plot(frontier["budget"], frontier["expected_profit"], color=_style(0)["color"], marker="o", markersize=4, label="expected value at each budget")
    if plan.budget is not None:
        axes.axvline(plan.budget, color="black", linestyle="--", linewidth=1, label=f"chosen budget {plan.budget:,.0f}")
        axes.plot([plan.budget], [plan.expected_profit], marker="D", color="black", linestyle="none", markersize=6, label="the plan")
        if plan.shadow_price is not None:
            span = 0.15 * float(frontier["budget"].max())
            budgets = np.array([plan.budget - span, plan.budget + span])
            axes.plot(budgets, plan.expected_profit + plan.shadow_price * (budgets - plan.budget), color="0.4", linestyle=":", linewidth=1.5,
                      label=f"shadow price {plan.shadow_price:.2f} per unit")
    axes.set_xlabel("Mail budget this quarter (currency units)")
    axes.set_ylabel("Expected value over holding (currency units)")
    axes.set_title("Expected value against budget")
    axes.grid(True, color="0.85", linewidth=0.5)
    axes.legend(fontsize=7, loc="lower right")
    return svg(figure, "frontier")


def backtest_figure(result: Backtest) -> str:
    figure, (by_quarter, by_frequency) = _figure(8.0, 3.4, 2)
    quarters = result.by_quarter
    place = np.arange(len(quarters))
    by_quarter.bar(place - 0.2, quarters["actual"], width=0.4, color=_style(1)["color"], label="actual")
    by_quarter.bar(place + 0.2, quarters["predicted"], width=0.4, color="white", edgecolor="black", hatch="///", label="predicted")
    by_quarter.set_xticks(place, quarters["quarter"], rotation=25, ha="right", fontsize=7)
    by_quarter.set_xlabel("Holdout quarter")
    by_quarter.set_ylabel("Repeat purchases (count)")
    by_quarter.set_title("By quarter")
    frequency = result.by_frequency
    place = np.arange(len(frequency))
    by_frequency.plot(place, frequency["actual_mean"], label="actual", **_style(1))
    by_frequency.plot(place, frequency["predicted_mean"], label="predicted", **{**_style(4), "color": "black"})
    by_frequency.set_xticks(place, [str(f) for f in frequency["frequency"]])
    by_frequency.set_xlabel("Repeat purchases in calibration (count)")
    by_frequency.set_ylabel("Mean repeat purchases in holdout (per customer)")
    by_frequency.set_title("By calibration frequency")
    for axes in (by_quarter, by_frequency):
        axes.legend(fontsize=7)
        axes.grid(True, axis="y", color="0.85", linewidth=0.5)
    return svg(figure, "backtest")


def policies_figure(result: Simulation) -> str:
    summary = result.summary
    figure, (axes,) = _figure(6.5, 0.3 * len(summary) + 1.2)
    place = np.arange(len(summary))[::-1]
    axes.hlines(place, summary["profit_p5"], summary["profit_p95"], color="0.5", linewidth=2, label="5th to 95th percentile")
    axes.plot(summary["profit_p50"], place, linestyle="none", marker="|", markersize=10, color="black", label="median")
    axes.plot(summary["mean_profit"], place, linestyle="none", marker="D", markersize=5, color=_style(0)["color"], label="mean")
    axes.set_yticks(place, summary["policy"])
    axes.set_xlabel("Discounted profit per customer (currency units)")
    axes.set_title(f"{result.customers:,} simulated new customers over {result.quarters} quarters")
    axes.grid(True, axis="x", color="0.85", linewidth=0.5)
    axes.legend(fontsize=7, loc="lower right")
    return svg(figure, "policies")


# ---------------------------------------------------------------- the page


def _money(value: float | None) -> str:
    return "-" if value is None or (isinstance(value, float) and math.isnan(value)) else f"{value:,.2f}"


def _number(key: str, text: str) -> str:
    """A number the tests read back: ``<span data-key=KEY>TEXT</span>``."""
    return f'<span class="number" data-key="{html.escape(key)}">{html.escape(text)}</span>'


def _table(header: list[str], rows: list[list[str]], caption: str = "", kind: str = "") -> str:
    """An HTML table; cells are HTML already (escape text before)."""
    head = "".join(f"<th>{html.escape(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    caption = f"<caption>{html.escape(caption)}</caption>" if caption else ""
    kind = f' class="{kind}"' if kind else ""
    return f"<table{kind}>{caption}<thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _section(name: str, figure: str, reading: str, beside: str = "", note: str = "") -> str:
    parts = [f'<section class="figure" id="{name}"><h2>{html.escape(TITLES[name])}</h2>']
    if note:
        parts.append(f'<p class="note">{note}</p>')
    parts.append(f"<figure>{figure}<figcaption>{reading}</figcaption></figure>" if figure else f'<p class="reading">{reading}</p>')
    parts.append(beside)
    parts.append("</section>")
    return "".join(parts)


def base_section(results: ReportResults) -> str:
    base, panel = results.base, results.panel
    reading = html.escape(
        f"{base.one_time_share:.0%} of the {base.customers:,} customers have bought only once; {base.lapsed_share:.0%} have been silent "
        f"for {base.lapsed_after} quarters or more, the ones a 'stop after {base.lapsed_after} silent quarters' rule would stop mailing."
    )
    note = html.escape(f"As of {panel.as_of}; {panel.customers:,} customers in {results.orders}." + ("" if panel.mailing_history else f" {ALL_MAILED_NOTE}"))
    return _section("base", base_figure(base), reading, note=note)


def lapse_section(results: ReportResults) -> str:
    simulation, economics = results.simulation, results.policy.economics
    breakeven = economics.piece_cost / simulation.margin
    curves = results.curves
    if curves.empty:
        return _section("lapse", "", "No customers to draw a lapse curve for.")
    band, rows = next(iter(curves.groupby("band", sort=False)))
    last = rows.iloc[-1]
    reading = html.escape(
        f"A typical customer with {band} repeat purchases has a {100 * rows.iloc[0].p_buy:.1f}% chance of ordering if mailed now; after "
        f"{int(last.k)} more mailed quarters without an order it is {100 * last.p_buy:.1f}%. Below the breakeven line "
        f"({100 * breakeven:.1f}%) one order no longer pays for the piece."
    )
    note = html.escape(
        f"Breakeven = piece cost {economics.piece_cost:,.2f} / margin per order {simulation.margin:,.2f} (the policy's economics at the typical "
        f"order value {simulation.order_value:,.2f}). 'Typical' = the median repeat purchases and last purchase quarter of each frequency band."
    )
    return _section("lapse", lapse_figure(curves, breakeven), reading, note=note)


def _stop_text(stop_after: int) -> str:
    return "never (mailed throughout)" if stop_after < 0 else str(stop_after)


def stop_section(results: ReportResults) -> str:
    table = results.stop_table.in_season(1)
    economics = table.economics
    horizon = economics.horizon_quarters
    shown = stop_table_rows_shown(table, horizon)
    rows = table.rows.set_index(["spend_band", "frequency", "last_purchase_quarter"])
    header = ["x, t_x"] + [f"'{band.label}' optimal / breakeven" for band in table.bands]
    lines = []
    for x, t_x in shown:
        line = [f"{x}, {t_x}"]
        for band in table.bands:
            row = rows.loc[(band.label, x, t_x)]
            optimal, breakeven = int(row.stop_after), int(row.breakeven_stop_after)
            line.append(_number(f"stop.{band.label}.{x}.{t_x}", _stop_text(optimal)) + " / " + _number(f"breakeven.{band.label}.{x}.{t_x}", _stop_text(breakeven)))
        lines.append(line)
    beside = _table(header, lines, "Stop mailing a silent customer after ... silent quarters (optimal / breakeven rule)")
    band = table.bands[0]
    one_time = rows.loc[(band.label, 0, 0)]
    reading = html.escape(
        f"Stop mailing one-time buyers in the '{band.label}' band after {_stop_text(int(one_time.stop_after))} silent quarters; "
        f"the breakeven rule would stop after {_stop_text(int(one_time.breakeven_stop_after))}."
    )
    note = html.escape(
        f"Piece cost {economics.piece_cost:,.2f}, gross margin {economics.gross_margin:.0%}, order cost {economics.order_cost:,.2f}, "
        f"{economics.annual_discount_rate:.0%} a year, each decision looking {horizon} quarters ahead; a held customer orders at "
        f"{table.process.rho:.2f} times the mailed rate. The framed cell is the stop point; dotted cells are not mailed. "
        "x = repeat purchases, t_x = quarter of the last one."
        + (" Planned on the calendar: shown for customers whose last order fell in quarter 1 of the fiscal year; "
           "lapsewise stop-table shows every quarter and the versions each plan uses." if table.seasonal else
           " Planned with the policy's versions: lapsewise stop-table shows which each plan uses." if table.calendar else "")
    )
    return _section("stop", stop_figure(table), reading, beside, note)


def frontier_section(results: ReportResults) -> str:
    plan = results.plan
    rows = [[_money(float(r.budget)), _money(float(r.expected_profit))] for r in plan.frontier.itertuples()]
    facts = [
        ["Budget", _number("plan.budget", "no limit" if plan.budget is None else _money(plan.budget))],
        ["Spent", _number("plan.spent", _money(plan.solution.spent))],
        ["Expected value", _number("plan.expected_profit", _money(plan.expected_profit))],
        ["Shadow price (per unit of budget)", _number("plan.shadow_price", "-" if plan.shadow_price is None else f"{plan.shadow_price:.4f}")],
        ["Customers suppressed (never mailed)", _number("plan.suppressed", f"{results.values.suppressed_count:,}")],
    ]
    if plan.profit_range is not None:
        low, high = plan.profit_range
        facts.append([f"Expected value, 5th to 95th percentile over {len(plan.drawn_profits)} draws of the parameters",
                      _number("plan.expected_profit_range", f"{_money(low)} to {_money(high)}")])
    beside = _table(["The plan", "Currency units"], facts) + _table(["Budget", "Expected value"], rows, "The frontier (currency units)")
    if plan.budget is None:
        reading = f"Without a budget limit everyone worth mailing is mailed, for {_money(plan.solution.spent)} and an expected {_money(plan.expected_profit)}."
    else:
        reading = (
            f"At a budget of {_money(plan.budget)} the plan spends {_money(plan.solution.spent)} for an expected {_money(plan.expected_profit)} over "
            f"holding; one more unit of budget is worth about {plan.shadow_price:.2f}."
        )
    note = "Expected value is net of piece costs and counts the future an order buys; each budget is a full solve of the budget program."
    if plan.profit_range is not None:
        note += (f" The values are averaged over {len(plan.drawn_profits)} draws of the parameters from the fit's standard errors "
                 "(the frontier too); the range shows how far the plan's value could lie from its expectation.")
    return _section("frontier", frontier_figure(plan), html.escape(reading), beside, note)


def backtest_section(results: ReportResults) -> str:
    result = results.backtest
    if result is None:
        return _section("backtest", "", "The history is shorter than 4 quarters: too short to hold quarters out for a backtest.")
    totals = [[_number("backtest.actual", f"{result.actual:,.0f}"), _number("backtest.predicted", f"{result.predicted:,.1f}"), f"{result.relative_difference:+.1%}"]]
    quarters = [
        [html.escape(str(r.quarter)), f"{100 * r.mailed_share:.0f}", _number(f"backtest.quarter.{r.quarter}.actual", f"{r.actual:,}"),
         _number(f"backtest.quarter.{r.quarter}.predicted", f"{r.predicted:,.1f}")]
        for r in result.by_quarter.itertuples()
    ]
    frequency = [
        [html.escape(str(r.frequency)), f"{r.customers:,}", f"{r.actual_mean:.3f}", f"{r.predicted_mean:.3f}"] for r in result.by_frequency.itertuples()
    ]
    beside = (
        _table(["Actual", "Predicted", "Difference"], totals, "Repeat purchases in the holdout quarters (count)")
        + _table(["Quarter", "Mailed (%)", "Actual", "Predicted"], quarters, "By quarter (count)")
        + _table(["Repeat purchases", "Customers", "Actual mean", "Predicted mean"], frequency, "By calibration frequency (per customer)")
    )
    note = (
        html.escape(f"Fitted afresh on the data up to {result.calibration_as_of} and predicting the last ")
        + _number("backtest.holdout", str(result.holdout_quarters))
        + html.escape(f" quarters (a quarter of the history, at least 1 and at most 4) for {result.customers:,} customers, given the mailings actually made.")
    )
    reading = html.escape(f"The model predicted {result.predicted:,.0f} repeat purchases against {result.actual:,.0f} actual ({result.relative_difference:+.1%}).")
    return _section("backtest", backtest_figure(result), reading, beside, note)


def policies_section(results: ReportResults) -> str:
    result = results.simulation
    lines = [
        [
            html.escape(r.policy),
            _number(f"simulation.{r.policy}.mean_profit", _money(r.mean_profit)),
            _money(r.profit_p5), _money(r.profit_p50), _money(r.profit_p95), f"{r.pieces:.2f}", f"{r.orders:.2f}",
            "-" if r.policy == "optimal" else _number(f"simulation.{r.policy}.difference", f"{r.difference_to_optimal:+.2f}"),
            "-" if r.policy == "optimal" else f"{r.difference_std_error:.2f}",
        ]
        for r in result.summary.itertuples()
    ]
    beside = _table(["Policy", "Mean", "P5", "P50", "P95", "Pieces", "Orders", "Mean vs optimal", "Std. error"], lines,
                    "Discounted profit per customer (currency units), pieces and orders per customer")
    optimal, runner = result.summary.iloc[0], result.best_rule
    reading = html.escape(
        f"The optimal policy earns {_money(optimal.mean_profit)} per customer; the best rule of thumb, '{runner.policy}', earns "
        f"{_money(runner.mean_profit)} ({runner.difference_to_optimal:+.2f} ± {1.96 * runner.difference_std_error:.2f}, 95%)."
    )
    note = html.escape(
        f"{result.customers:,} new customers drawn from the fitted model over {result.quarters} quarters (seed {result.seed}), "
        f"order value {_money(result.order_value)}, margin {_money(result.margin)} per order; every policy meets the same customers "
        "and random numbers, so the differences are paired."
    )
    return _section("policies", policies_figure(result), reading, beside, note)


def model_section(results: ReportResults) -> str:
    model, panel = results.model, results.panel
    churn = model.churn
    lines = []
    meanings = {
        "alpha": "purchase probability p ~ Beta(alpha, beta)",
        "beta": f"mean p = {churn.process.mean_p:.3f} per mailed quarter",
        "gamma": "churn probability theta ~ Beta(gamma, delta)",
        "delta": f"mean theta = {churn.process.mean_theta:.3f} per quarter",
        "rho": "share of the purchase probability left in an unmailed quarter",
    }
    for name, meaning in meanings.items():
        estimate, error = _estimate(getattr(churn, name), churn.std_errors.get(name))
        lines.append([name, _number(f"model.{name}", estimate), error, html.escape(meaning)])
    if churn.seasons is not None:
        for q, multiplier in enumerate(churn.seasons):
            estimate, error = _estimate(multiplier, churn.std_errors.get(f"season_{q + 1}"))
            lines.append([f"season_{q + 1}", _number(f"model.season_{q + 1}", estimate), error, html.escape(f"multiplier of p in quarter {q + 1} of the year (the largest is 1)")])
    if churn.season_test is not None:
        test = churn.season_test
        lines.append(["seasons against none", f"{test['statistic']:,.1f}", "-", html.escape(f"likelihood-ratio statistic, {test['degrees_of_freedom']} degrees of freedom, p-value {test['p_value']:.3g}")])
    if model.spend is not None:
        for name in ("p", "q", "gamma"):
            estimate, error = _estimate(getattr(model.spend, name), model.spend.std_errors.get(name))
            lines.append([f"spend {name}", estimate, error, "order value ~ gamma-gamma" if name == "p" else ""])
    parameters = _table(["Parameter", "Estimate", "Std. error", "Meaning"], lines, f"Fitted on {model.customers:,} customers as of {model.as_of}", "words")
    repairs = [[html.escape(what), f"{count:,}"] for what, count in panel.counts.items()] or [["Nothing was left out or repaired.", ""]]
    repairs_table = _table(["Left out or repaired while reading the files", "Count"], repairs)
    warnings = "".join(f"<li>warning: {html.escape(w)}</li>" for w in model.warnings)
    suppression = results.suppression
    suppressed = (
        "No suppression list was given (--suppress): nobody was held back for opt-outs or returned mail."
        if suppression is None
        else f"Suppression list {suppression.source}: {suppression.matched:,} of its {suppression.listed:,} ids are customers here; they are never mailed."
    )
    assumptions = [
        "Each quarter a customer who is still active orders with their own probability p; mailing raises it (an unmailed quarter keeps only the share rho)"
        + ("; a quarter of the year multiplies it by its season's multiplier (the stop rule plans an average quarter)." if churn.process.seasonal else "."),
        "After each quarter a customer may lapse for good, with their own probability theta; nobody comes back once lapsed, and lapsing is never seen directly.",
        "Customers differ: p and theta vary across customers as Beta distributions; order values vary around each customer's own mean (gamma-gamma), independent of how often they buy.",
        "A piece is worth mailing when the orders it adds now and the future those orders buy, discounted, exceed its cost.",
        "The past is a guide to the next quarters: prices, catalog and competition stay roughly as they were.",
    ]
    cautions = [
        CAUTION,
        suppressed,
        "Honour opt-outs, deceased and moved-away lists and mail-preference services before any list leaves this machine.",
        "Direct-mail and data-protection rules differ by country and state; check local law before mailing.",
        "Every figure here is an estimate from a model fitted to past behaviour, not a guarantee; the standard errors and the backtest show how far to trust it.",
    ]
    body = (
        parameters
        + repairs_table
        + (f"<ul>{warnings}</ul>" if warnings else "")
        + "<h3>Assumptions in plain words</h3><ul>" + "".join(f"<li>{html.escape(a)}</li>" for a in assumptions) + "</ul>"
        + '<h3>Cautions</h3><ul class="cautions">' + "".join(f"<li>{html.escape(c)}</li>" for c in cautions) + "</ul>"
    )
    reading = html.escape(
        f"Log-likelihood {churn.log_likelihood:,.2f} over {model.customers:,} customers in {churn.histories:,} distinct histories; "
        f"{'converged' if churn.converged else 'NOT converged'}."
    )
    return f'<section class="figure" id="model"><h2>{html.escape(TITLES["model"])}</h2><p class="reading">{reading}</p>{body}</section>'


STYLE = """
body { font-family: "DejaVu Sans", Helvetica, Arial, sans-serif; color: #111; background: #fff; margin: 2em auto; max-width: 60em; padding: 0 1em; line-height: 1.35; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; }
h2 { font-size: 1.25em; border-bottom: 1px solid #888; padding-bottom: 0.1em; margin-top: 1.6em; }
h3 { font-size: 1.05em; }
figure { margin: 0.5em 0; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption, .reading { font-weight: bold; margin: 0.3em 0 0.8em 0; }
.note { color: #333; font-size: 0.9em; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.85em; }
caption { text-align: left; font-style: italic; padding-bottom: 0.2em; }
th, td { border-bottom: 1px solid #bbb; padding: 0.15em 0.6em; text-align: right; }
th:first-child, td:first-child, table.words td:last-child, table.words th:last-child { text-align: left; }
.cautions li { margin-bottom: 0.3em; }
@page { margin: 14mm; }
@media print {
  body { margin: 0; max-width: none; font-size: 10pt; }
  section.figure { break-inside: avoid; page-break-inside: avoid; }
  figure, table { break-inside: avoid; page-break-inside: avoid; }
  figure svg { max-height: 120mm; }
  h2 { break-after: avoid; page-break-after: avoid; }
}
"""


def report_html(results: ReportResults) -> str:
    """The whole report as one HTML page."""
    panel, policy = results.panel, results.policy
    budget = "no budget limit" if results.plan.budget is None else f"a budget of {_money(results.plan.budget)}"
    intro = html.escape(
        f"{panel.customers:,} customers as of {panel.as_of}, policy {results.policy_source} ({len(policy.versions)} version(s)), {budget}. "
        f"Every number here is computed by the same functions as the lapsewise commands (summary, fit, stop-table, plan --frontier, backtest, simulate)."
    )
    sections = [
        base_section(results),
        lapse_section(results),
        stop_section(results),
        frontier_section(results),
        backtest_section(results),
        policies_section(results),
        model_section(results),
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>lapsewise report: when to stop mailing and how to spread the budget</title><style>{STYLE}</style></head><body>"
        "<h1>When to stop mailing, and how to spread the mail budget</h1>"
        f'<p class="note">lapsewise {html.escape(__version__)}. {intro}</p>'
        + "".join(sections)
        + "</body></html>\n"
    )
