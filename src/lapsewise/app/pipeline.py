"""The pipeline: files -> panel -> model -> decisions -> plan -> mail list, one call per step.

The command line and the demo both call these functions, so a step is computed
the same way wherever it is shown. Which stages run side by side is decided
here and nowhere else: the stop-rule programs of the spend bands, the posterior
beside them, the summary beside the compression, and the plan's two solves (CBC
runs as its own process). Every stage function is pure; this module only wires
them together.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from lapsewise.budget.control_cell import ControlCell, check_precision, draw_control_cell
from lapsewise.budget.control_reading import CellCounts, ControlReading, cell_counts, read_control_cell
from lapsewise.budget.integer_program import Plan, make_plan
from lapsewise.budget.mail_list import mail_list
from lapsewise.budget.planned import PlannedTotals, planned_totals
from lapsewise.budget.values import CustomerValues, ValuePrecision, averaged_values, customer_values, margin_states, state_values, value_chances
from lapsewise.data.histories import compress
from lapsewise.data.panel import Panel, panel_from_files
from lapsewise.data.summary import CustomerSummary, summarize
from lapsewise.data.suppression import Suppression, match_suppression
from lapsewise.decide.order_values import typical_order_value
from lapsewise.decide.program import check_unmailed_purchases, decision_process, planning_process, program_bytes, seasons_supported, workers
from lapsewise.decide.calendar import calendar_bytes
from lapsewise.decide.stop_table import StopTable, build_stop_table, with_ranges, with_sensitivity
from lapsewise.errors import InputError
from lapsewise.machine import available_memory, gigabytes
from lapsewise.evaluate.policies import Simulation, simulate_policies
from lapsewise.files.inputs import ID_COLUMN, load_attributes, load_control_cell, load_id_list
from lapsewise.files.tables import Reading
from lapsewise.files.policy_file import Policy, load_policy
from lapsewise.model.churn import expand
from lapsewise.model.fitted import Model, fit_model, load_model
from lapsewise.model.process import Process
from lapsewise.model.posterior import posterior
from lapsewise.model.scores import lapse_curves, quarterly_rate
from lapsewise.model.uncertainty import Draws, model_draws, shifted_models


def two_at_a_time(function: Callable, items) -> list:
    """``[function(item) for item in items]``, two at a time on two threads (their numpy work releases the GIL)."""
    with workers() as pool:
        return list(pool.map(function, items))


def side_by_side_if_they_fit(sizes: list[int]) -> Callable:
    """Two stop-rule programs at a time when two of the largest fit in the free memory, else one after the other."""
    return two_at_a_time if 2 * max(sizes, default=0) < available_memory() else lambda function, items: list(map(function, items))


# ---------------------------------------------------------------- files to panel


def read_panel(orders: str | Path, mailings: str | Path | None, as_of: str | None, fiscal_year_start: int, columns: dict | None = None) -> Panel:
    """Load the orders (and mailings) and build the quarterly panel."""
    return panel_from_files(str(orders), str(mailings) if mailings else None, as_of, fiscal_year_start, **(columns or {}))


def read_policy(path: str | Path, overrides: dict | None = None) -> Policy:
    return load_policy(path, overrides)


def side_file_reading(columns: dict | None) -> Reading:
    """How to read the suppression and attributes files: in the encoding the options name; the rest is found."""
    return Reading(encoding=(columns or {}).get("encoding"))


def read_suppression(
    panel: Panel, path: str | Path | None, id_column: str = ID_COLUMN, orders_name: str = "the orders", reading: Reading | None = None
) -> Suppression | None:
    """The suppression list matched against the panel's customers (None without a list)."""
    if not path:
        return None
    return match_suppression(panel, load_id_list(path, id_column, reading), orders_name)


def attribute_values(
    panel: Panel, path: str | Path | None, column: str | None, id_column: str = ID_COLUMN, reading: Reading | None = None
) -> np.ndarray | None:
    """Each customer's value of an attributes file's column ("unknown" when missing); None without a file."""
    if not (path or column):
        return None
    if not (path and column):
        raise InputError("--attributes and --segment-column go together; give both or neither")
    table = load_attributes(path, column, id_column, reading).frame.set_index(ID_COLUMN)[column]
    return table.reindex(panel.customer_ids).fillna("unknown").to_numpy(dtype=object)


# ---------------------------------------------------------------- the model


@dataclass(frozen=True)
class Fitted:
    """A fitted model with the per-customer summary it was fitted with and its lapse curves."""

    model: Model
    summary: CustomerSummary
    curves: pd.DataFrame


def fit(panel: Panel, seasons: bool = True) -> Fitted:
    """Fit both models on the panel (the churn model with or without ``seasons``) and compute the lapse curves of typical customers."""
    summary = summarize(panel)
    model = fit_model(panel, summary, seasons)
    return Fitted(model, summary, lapse_curves(model, summary))


# ---------------------------------------------------------------- decisions


def stop_table(model: Model, policy: Policy, draws: int | None = 0, seed: int = 0, sensitivity: bool = False, default_draws: int = 0) -> StopTable:
    """The stop table, the spend bands' programs two at a time when memory allows.

    With ``draws``, the range of each stop point over that many draws of the parameters
    (:func:`~lapsewise.model.uncertainty.model_draws`, seeded); with ``sensitivity``, how many stop points move
    when each parameter is two standard errors lower or higher. ``draws`` None takes ``default_draws``, or none
    when the table plans on the calendar (each draw solves the calendar program again), and says so.
    """
    economics = policy.economics
    horizon = economics.horizon_quarters
    size = max(program_bytes(horizon, 2 * horizon, 0, 0, horizon), calendar_bytes(horizon + 3, 2 * horizon, horizon, horizon, 4))

    def table(fitted: Model, layout: StopTable | None = None) -> StopTable:
        return build_stop_table(
            fitted.churn, fitted.spend, economics, policy.segments.spend_bands, each=side_by_side_if_they_fit([size]), rho_estimable=model.rho_estimable, policy_source=policy.source,
            versions=policy.versions, calendar=None if layout is None else layout.calendar, seasonal_rows=None if layout is None else layout.seasonal,
        )

    started = time.perf_counter()
    point = table(model)
    if draws is None:
        draws = 0 if point.calendar else default_draws
        if point.calendar and default_draws:
            took = time.perf_counter() - started
            point = replace(point, notes=point.notes + (
                f"no ranges over parameter draws by default when planning on the calendar: each draw solves the calendar program "
                f"again (this table took {took:.0f} s); pass --draws {default_draws} for them",
            ))
    if draws:
        drawn = model_draws(model, draws, seed)
        point = with_ranges(point, [table(fitted, point) for fitted in drawn.models], tuple(drawn.notes()))
    if sensitivity:
        point = with_sensitivity(point, [(name, error, table(lower, point), table(higher, point)) for name, error, lower, higher in shifted_models(model)])
    return point


def planned_scores(model: Model, panel: Panel, policy_file: str | Path, quarters: int, annual_discount_rate: float) -> PlannedTotals:
    """Expected orders in the next ``quarters`` quarters and DERT (at ``annual_discount_rate``) under the stop rule's plan."""
    return planned_totals(model, panel, read_policy(policy_file), quarters, quarterly_rate(annual_discount_rate))


def simulation(model: Model, policy: Policy, customers: int, quarters: int | None, seed: int) -> Simulation:
    """The optimal policy against the rules of thumb on new customers drawn from the model.

    With seasons the customers follow them on the calendar from the quarter after the as-of quarter, while the
    single-piece program plans an average quarter (:func:`~lapsewise.decide.program.decision_process`); when the
    calendar program is needed (seasons the data support, quarters that differ in the policy, versions), it is the
    optimal policy and the single-piece program runs beside it."""
    economics = policy.economics
    process = decision_process(model.churn, economics.unmailed_response, rho_estimable=model.rho_estimable, policy_source=policy.source)
    order_value = typical_order_value(model.spend, economics)
    churn = model.churn
    world = Process(churn.alpha, churn.beta, churn.gamma, churn.delta, process.rho, churn.seasons) if churn.process.seasonal else None
    planning = planning_process(churn, economics.unmailed_response, rho_estimable=model.rho_estimable, policy_source=policy.source)
    if not seasons_supported(churn):
        planning = planning.without_seasons()
    return simulate_policies(
        process, economics, order_value, customers, quarters or economics.horizon_quarters, seed, world, model.end_quarter + 1, policy.versions, planning
    )


# ---------------------------------------------------------------- values, plan and mail list


def value_customers(
    model: Model,
    panel: Panel,
    policy: Policy,
    suppressed: np.ndarray | None = None,
    attribute: np.ndarray | None = None,
    budget_price: float = 0.0,
    draws: Draws | None = None,
    certify: bool = False,
) -> CustomerValues:
    """Every customer's value of mailing this quarter, per version.

    On two workers: the summary beside the compression, then the posterior beside
    the first programs. Each customer is valued at their own margin per order
    (:mod:`lapsewise.decide.own_margins`): on a grid of margins with a certified
    bound per value, or, with ``certify``, refined until every value is within 1%
    (or 0.01 currency units) of a program solved at the customer's own margin.
    ``budget_price`` is added to the cost of every later quarter's piece (a recurring budget's shadow price).
    With ``draws``, the values are the mean over the drawn models and keep each
    draw's difference from that mean (:func:`~lapsewise.budget.values.averaged_values`). A draw's values are
    the estimates' values plus the draw's difference from them, both read on a coarser grid of margins
    (:data:`DRAW_GRID_MARGINS`); with ``certify`` every draw is certified on its own instead.
    """
    economics = policy.economics
    if draws:
        check_draws_memory(len(draws), panel.customers, len(policy.versions))
    with workers() as pool:
        summary_job = pool.submit(summarize, panel)
        histories = compress(panel)
        check_unmailed_purchases(model.churn, economics.unmailed_response, histories, policy.source)
        summary = summary_job.result()
        # The posterior's layout of the histories does not depend on the parameters: the draws share it.
        expansion = expand(histories) if draws else None
        states, valued, post = _state_values(model, policy, histories, summary, pool, budget_price, expansion, refine=certify)
        point = valued.values[states.inverse]
        spread = None
        if draws and certify:
            # Every draw certified too: the draws' values themselves.
            drawn = [_customer_state_values(fitted, policy, histories, summary, pool, budget_price, expansion, refine=True) for fitted in draws.models]
            point, spread = averaged_values(point, drawn)
        elif draws:
            # Each draw's difference from the estimates' values, both on the draws' coarser grid of margins.
            coarse = {"grid_margins": DRAW_GRID_MARGINS, "bounds": False}
            estimates = _customer_state_values(model, policy, histories, summary, pool, budget_price, expansion, **coarse)
            drawn = [point + (_customer_state_values(fitted, policy, histories, summary, pool, budget_price, expansion, **coarse) - estimates) for fitted in draws.models]
            point, spread = averaged_values(point, drawn)
    precision = ValuePrecision.of(valued, states.inverse, certify, DRAW_GRID_MARGINS if draws and not certify else None)
    return customer_values(panel.customer_ids, summary, policy, histories, post, point, suppressed, attribute, spread, precision)


def _customer_state_values(model: Model, policy: Policy, histories, summary: CustomerSummary, pool, budget_price: float, expansion, **grid) -> np.ndarray:
    """Every customer's values under ``model`` (:func:`_state_values` spread back to the customers)."""
    states, valued, _ = _state_values(model, policy, histories, summary, pool, budget_price, expansion, **grid)
    return valued.values[states.inverse]


def check_draws_memory(draws: int, customers: int, versions: int) -> None:
    """Refuse, before any work, draws whose per-customer values would not fit in the memory this machine has free.

    The values keep each draw's difference for every customer and version (4 bytes each) for the percentiles, with
    room for one copy as they are taken.
    """
    size = 2 * 4 * draws * customers * versions
    free = available_memory()
    if size > free:
        fits = max(int(free // (2 * 4 * customers * versions)), 0)
        raise InputError(
            f"--draws {draws}: keeping every draw's value for {customers:,} customers and {versions} version(s) needs about "
            f"{gigabytes(size)} of memory and {gigabytes(free)} is free; use --draws {fits} or fewer, or --plug-in"
        )


DRAW_GRID_MARGINS = 7
"""Margins each draw of the parameters is solved at (chords, no bounds): a draw's values enter only as its difference
from the estimates' values read the same way (:func:`value_customers`), in which much of a coarser grid's error cancels."""


def _state_values(model: Model, policy: Policy, histories, summary: CustomerSummary, pool, budget_price: float, expansion=None, **grid):
    """The distinct (history, margin) states, their values per version at their own margins
    (:func:`~lapsewise.budget.values.state_values`, which takes ``grid``'s keywords), and the posterior, under
    ``model``'s parameters (``expansion``: the histories' :func:`~lapsewise.model.churn.expand`, when shared between
    draws). The posterior is computed beside the first programs."""
    economics = policy.economics
    process = decision_process(model.churn, economics.unmailed_response, rho_estimable=model.rho_estimable, policy_source=policy.source)
    posterior_job = pool.submit(posterior, process, histories, expansion)
    states = margin_states(model.spend, policy, histories, summary)
    shared = value_chances(process, policy, states, budget_price)
    valued = state_values(shared, policy, states, lambda: posterior_job.result().alive_now, **grid)
    return states, valued, posterior_job.result()


def plan(values: CustomerValues, policy: Policy, budget: float | None, frontier_points: int = 0) -> Plan:
    """The budget plan, its shadow-price re-solve beside it."""
    return make_plan(values, policy, budget, frontier_points, each=two_at_a_time)


PRICE_TOLERANCE = 0.005
"""The recurring budget's price has settled when a re-solve moves it by less than this share (or 0.001 currency units)."""
MAX_PRICE_ROUNDS = 12


@dataclass(frozen=True)
class RecurringBudget:
    """A budget that binds every quarter: the shadow price that later pieces are valued with, and the plan at it.

    ``price`` is the fixed point of "value later pieces at piece cost plus the price, plan, read the plan's shadow
    price"; ``settled`` says whether the rounds met :data:`PRICE_TOLERANCE`; ``prices`` lists the price of each
    round. ``plain_values`` are the values with later pieces at piece cost, for the plan's profit under that reading.
    """

    price: float
    settled: bool
    prices: tuple[float, ...]
    plan: Plan
    values: CustomerValues
    plain_values: CustomerValues

    @property
    def expected_profit_plain(self) -> float:
        """The chosen plan's expected value with later pieces valued at their piece cost (the one-quarter reading)."""
        mailed = self.plan.assignment >= 0
        chosen = self.plan.assignment[mailed]
        return float(self.plain_values.values[np.flatnonzero(mailed), chosen].sum() - self.plan.setup_total)

    def to_dict(self) -> dict:
        return {
            "price": round(self.price, 6),
            "settled": self.settled,
            "rounds": len(self.prices),
            "expected_profit_recurring": round(self.plan.expected_profit, 4),
            "expected_profit_one_quarter": round(self.expected_profit_plain, 4),
        }


def budget_plan(inputs: "PlanInputs", budget: float | None, recurring: bool, frontier_points: int = 0) -> tuple[Plan, "RecurringBudget | None"]:
    """The plan for this quarter's budget; with ``recurring`` (or the policy's ``recurring_budget``) one that binds every quarter."""
    if not (recurring or inputs.policy.economics.recurring_budget):
        return plan(inputs.values, inputs.policy, budget, frontier_points), None
    if budget is None:
        raise InputError("--recurring-budget: a budget that binds every quarter needs --budget, the quarter's amount")
    recurring_result = recurring_budget_plan(inputs.model, inputs.panel, inputs.policy, budget, inputs.values, inputs.suppressed, inputs.attribute, inputs.draws, inputs.certify)
    chosen = recurring_result.plan if not frontier_points else plan(recurring_result.values, inputs.policy, budget, frontier_points)
    return chosen, recurring_result


def recurring_budget_plan(
    model: Model,
    panel: Panel,
    policy: Policy,
    budget: float,
    values: CustomerValues,
    suppressed: np.ndarray | None = None,
    attribute: np.ndarray | None = None,
    draws: Draws | None = None,
    certify: bool = False,
) -> RecurringBudget:
    """Plan with a budget that binds every quarter: later pieces cost piece cost plus the budget's shadow price.

    Starting from the plan on ``values`` (later pieces at piece cost), each round values the customers with the
    last round's shadow price added to later pieces and re-plans, until the price settles. Rounds average the last
    two prices, which damps the see-saw a discrete plan's price can show.
    """
    plain = plan(values, policy, budget)
    price = max(float(plain.shadow_price or 0.0), 0.0)
    prices, current, current_values, settled = [price], plain, values, price == 0.0
    for _ in range(MAX_PRICE_ROUNDS if not settled else 0):
        current_values = value_customers(model, panel, policy, suppressed, attribute, budget_price=price, draws=draws, certify=certify)
        current = plan(current_values, policy, budget)
        found = max(float(current.shadow_price or 0.0), 0.0)
        settled = abs(found - price) <= max(PRICE_TOLERANCE * price, 0.001)
        price = found if settled else (price + found) / 2
        prices.append(price)
        if settled:
            break
    return RecurringBudget(price, settled, tuple(prices), current, current_values, values)


def mail_list_rows(values: CustomerValues, chosen: Plan) -> pd.DataFrame:
    """The mail list: one row per customer with the version and the decision."""
    return mail_list(values, chosen.assignment, chosen.rule)


@dataclass(frozen=True)
class PlanInputs:
    model: Model
    policy: Policy
    panel: Panel
    values: CustomerValues
    suppression: Suppression | None
    attribute: np.ndarray | None = None
    draws: Draws | None = None
    certify: bool = False

    @property
    def suppressed(self) -> np.ndarray | None:
        return None if self.suppression is None else self.suppression.flags


def plan_inputs(
    model_file: str | Path,
    orders: str | Path,
    policy_file: str | Path,
    mailings: str | Path | None,
    as_of: str | None,
    suppress: str | Path | None,
    attributes: str | Path | None,
    segment_column: str | None,
    columns: dict,
    overrides: dict | None,
    draws: int = 0,
    seed: int = 0,
    certify: bool = False,
) -> PlanInputs:
    """Load everything a plan needs and value every customer (the stages, in order), averaged over ``draws`` draws
    of the parameters (seeded; 0: at the estimates); ``certify`` refines the values until each is certified."""
    model = load_model(model_file)
    policy = read_policy(policy_file, overrides)
    panel = read_panel(orders, mailings, as_of, model.fiscal_year_start, columns)
    side = side_file_reading(columns)
    suppression = read_suppression(panel, suppress, columns["id_column"], str(orders), side)
    attribute = attribute_values(panel, attributes, segment_column, columns["id_column"], side)
    flags = None if suppression is None else suppression.flags
    drawn = model_draws(model, draws, seed) if draws else None
    values = value_customers(model, panel, policy, flags, attribute, draws=drawn, certify=certify)
    return PlanInputs(model, policy, panel, values, suppression, attribute, drawn, certify)


# ---------------------------------------------------------------- the control cell


def planning_rho(model: Model, policy: Policy) -> tuple[float, str]:
    """The rho a control cell is sized with, and where it comes from: the policy's unmailed_response, else the model's rho."""
    if policy.economics.unmailed_response is not None:
        return float(policy.economics.unmailed_response), "the policy's unmailed_response"
    if model.churn.rho is None:
        raise InputError(
            "the model was fitted without a mailings file, so it has no rho to size the cell with; "
            "set unmailed_response in the policy (or pass --unmailed-response) to a planning guess"
        )
    return float(model.churn.rho), "the model's rho"


def control_cell(inputs: PlanInputs, precision: float, seed: int) -> ControlCell:
    """This quarter's randomised no-mail cell among the customers the policy would mail.

    The cell is sized with the eligible customers' chance of an order next quarter if mailed; with a seasonal model
    that is the seasonal posterior's, at the next quarter's multiplier (the values plan an average quarter)."""
    check_precision(precision)
    rho, source = planning_rho(inputs.model, inputs.policy)
    values = inputs.values
    churn = inputs.model.churn
    if churn.process.seasonal:
        process = replace(churn.process, rho=rho)
        histories = compress(inputs.panel, seasons=True)
        values = replace(values, p_buy=posterior(process, histories).p_buy[histories.inverse])
    return draw_control_cell(values, precision, rho, source, seed)


def read_control_counts(panel: Panel, path: str | Path, columns: dict | None, orders_name: str) -> CellCounts:
    """The control cell file against the panel's as-of quarter (refused before any fitting when it matches nobody)."""
    return cell_counts(panel, load_control_cell(path, side_file_reading(columns)), orders_name)


def control_reading(counts: CellCounts, model: Model) -> ControlReading:
    """rho from the cell beside the model's."""
    return read_control_cell(counts, model.churn.rho, model.churn.std_errors.get("rho"))
